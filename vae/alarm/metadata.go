package alarm

import (
	"encoding/json"
	"errors"
	"fmt"
)

// MetadataKey is the checkpoint metadata key under which Put stores a
// calibration and Get finds it. Every program that scores with the model
// (the training program, a scoring service, a batch pipeline) reads the
// same key, so all of them raise the same alarms.
const MetadataKey = "alarm.calibration"

// ErrNoCalibration is wrapped by the error Get returns when the metadata
// holds no calibration.
var ErrNoCalibration = errors.New("no calibration in the metadata")

// Metadata is the free-form string metadata that travels with a model's
// checkpoint. *vae.Model satisfies it (Model.Extra and Model.SetExtra;
// vae.Save writes the pairs into the safetensors header and vae.Load
// restores them). The package uses this interface instead of importing
// vae, so it depends on nothing but gonum.
type Metadata interface {
	Extra() map[string]string
	SetExtra(key, value string) error
}

// Put stores c as JSON (see Calibration.MarshalJSON) under MetadataKey in
// m; a later Save of the model writes it into the checkpoint.
func Put(m Metadata, c *Calibration) error {
	if m == nil || c == nil {
		return fmt.Errorf("alarm.Put: nil model or calibration: %w", ErrInvalidArgument)
	}
	b, err := json.Marshal(c)
	if err != nil {
		return fmt.Errorf("alarm.Put: %w", err)
	}
	if err := m.SetExtra(MetadataKey, string(b)); err != nil {
		return fmt.Errorf("alarm.Put: %w", err)
	}
	return nil
}

// Get reads the calibration that Put stored in m (for example in a model
// read back with vae.Load). A missing key is an error wrapping
// ErrNoCalibration; a value that does not decode or does not check out is
// an error wrapping ErrBadCalibration.
func Get(m Metadata) (*Calibration, error) {
	if m == nil {
		return nil, fmt.Errorf("alarm.Get: nil model: %w", ErrInvalidArgument)
	}
	v, ok := m.Extra()[MetadataKey]
	if !ok {
		return nil, fmt.Errorf("alarm.Get: key %q: %w", MetadataKey, ErrNoCalibration)
	}
	c := new(Calibration)
	if err := json.Unmarshal([]byte(v), c); err != nil {
		if !errors.Is(err, ErrBadCalibration) {
			err = fmt.Errorf("%w: %w", ErrBadCalibration, err)
		}
		return nil, fmt.Errorf("alarm.Get: key %q: %w", MetadataKey, err)
	}
	return c, nil
}
