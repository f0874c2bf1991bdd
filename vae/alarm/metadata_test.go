package alarm

import (
	"errors"
	"slices"
	"strings"
	"testing"
)

// mapMeta is an in-memory Metadata, as vae.Model keeps it.
type mapMeta map[string]string

func (m mapMeta) Extra() map[string]string {
	out := map[string]string{}
	for k, v := range m {
		out[k] = v
	}
	return out
}

func (m mapMeta) SetExtra(k, v string) error {
	if k == "" {
		return errors.New("empty key")
	}
	m[k] = v
	return nil
}

func TestPutGet(t *testing.T) {
	c, err := Calibrate([]float64{0.5, 3, 1.25, 2, 8, 4}, 0.2) // k = ceil(7*0.8) = 6: threshold 8
	if err != nil {
		t.Fatal(err)
	}
	m := mapMeta{"other": "kept"}
	if err := Put(m, c); err != nil {
		t.Fatal(err)
	}
	if m["other"] != "kept" || !strings.Contains(m[MetadataKey], `"threshold":8`) {
		t.Errorf("metadata after Put: %v", m)
	}
	back, err := Get(m)
	if err != nil {
		t.Fatal(err)
	}
	if back.Threshold() != 8 || back.Alpha() != 0.2 || !slices.Equal(back.Scores(), []float64{0.5, 1.25, 2, 3, 4, 8}) {
		t.Errorf("Get: threshold %v alpha %v scores %v", back.Threshold(), back.Alpha(), back.Scores())
	}

	if _, err := Get(mapMeta{}); !errors.Is(err, ErrNoCalibration) || !strings.Contains(err.Error(), MetadataKey) {
		t.Errorf("Get without a calibration: %v", err)
	}
	for name, v := range map[string]string{"not JSON": "{", "threshold off": strings.Replace(m[MetadataKey], `"threshold":8`, `"threshold":4`, 1)} {
		if _, err := Get(mapMeta{MetadataKey: v}); !errors.Is(err, ErrBadCalibration) {
			t.Errorf("%s: err = %v, want ErrBadCalibration", name, err)
		}
	}
	if err := Put(nil, c); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("Put(nil): %v", err)
	}
	if err := Put(m, nil); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("Put(nil calibration): %v", err)
	}
	if _, err := Get(nil); !errors.Is(err, ErrInvalidArgument) {
		t.Errorf("Get(nil): %v", err)
	}
}
