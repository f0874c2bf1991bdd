package fleet

// This file generates the demo data. The data is invented: there is no real
// fleet, site or sensor behind it. The pumping stations, their sensors, the
// demand curve and the faults are a plausible-looking simulation written for
// the example programs, so that they have something realistic in shape to
// work on. Do not read engineering conclusions into its numbers.

import (
	"fmt"
	"math"
	"math/rand/v2"
	"time"
)

// Sensor indices into Record.Values.
const (
	Flow              = iota // m3/h
	SuctionPressure          // bar (gauge)
	DischargePressure        // bar (gauge)
	BearingTempDE            // drive-end bearing temperature, degC
	BearingTempNDE           // non-drive-end bearing temperature, degC
	WindingTemp              // motor winding temperature, degC
	VibrationX               // overall velocity, horizontal radial, mm/s RMS
	VibrationY               // overall velocity, vertical radial, mm/s RMS
	VibrationZ               // overall velocity, axial, mm/s RMS
	MotorCurrent             // A
	Power                    // electrical input power, kW
	Speed                    // rpm
	NumSensors               // number of sensors per record
)

// SensorNames returns the column names of the sensors, in index order.
func SensorNames() []string {
	return []string{
		"flow_m3h", "suction_bar", "discharge_bar",
		"bearing_de_c", "bearing_nde_c", "winding_c",
		"vib_x_mms", "vib_y_mms", "vib_z_mms",
		"current_a", "power_kw", "speed_rpm",
	}
}

// Fault is the label of a record: normal operation or one injected fault.
type Fault int

// The fault labels.
const (
	Normal      Fault = iota
	BearingWear       // vibration and bearing temperature drift up slowly
	Cavitation        // suction pressure and flow dip, vibration bursts
	StuckSensor       // one sensor repeats a constant value
	NumFaults         // number of labels, Normal included
)

// Faults returns the fault types (every label except Normal).
func Faults() []Fault { return []Fault{BearingWear, Cavitation, StuckSensor} }

func (f Fault) String() string {
	switch f {
	case Normal:
		return "normal"
	case BearingWear:
		return "bearing_wear"
	case Cavitation:
		return "cavitation"
	case StuckSensor:
		return "stuck_sensor"
	}
	return fmt.Sprintf("fault(%d)", int(f))
}

// StationType holds the nominal duty of one kind of pumping station.
type StationType struct {
	Name       string
	FlowNom    float64 // m3/h at full speed
	HeadNom    float64 // m of water at full speed
	Suction    float64 // bar, suction pressure at zero flow
	SpeedNom   float64 // rpm at full speed
	Efficiency float64 // pump efficiency at the duty point
	Vibration  float64 // mm/s RMS, horizontal, at full speed
}

// StationTypes returns the three invented kinds of station in the fleet.
func StationTypes() []StationType {
	return []StationType{
		{Name: "booster", FlowNom: 120, HeadNom: 45, Suction: 2.2, SpeedNom: 2960, Efficiency: 0.68, Vibration: 1.6},
		{Name: "district", FlowNom: 380, HeadNom: 62, Suction: 1.4, SpeedNom: 1485, Efficiency: 0.74, Vibration: 1.9},
		{Name: "transfer", FlowNom: 900, HeadNom: 88, Suction: 0.7, SpeedNom: 1490, Efficiency: 0.79, Vibration: 2.4},
	}
}

// Station is one pumping station: its type and the small ways in which it
// differs from the nominal station of its type.
type Station struct {
	ID          int
	Type        int     // index into StationTypes
	DemandScale float64 // multiplies the demand curve
	PeakShift   float64 // hours; shifts the daily curve
	EffOffset   float64 // added to the pump efficiency
	VibFactor   float64 // multiplies the vibration level
	SuctionOff  float64 // bar
	TempOff     [3]float64
}

// Record is one sample of one station: the twelve sensor readings at a
// time, and the label of the fault injected at that time (Normal when none).
type Record struct {
	Station int
	Type    int
	Time    time.Time
	Values  [NumSensors]float64
	Fault   Fault
	// Mode is the operating mode, an index into Modes(): the drive's
	// speed band (low, normal, high).
	Mode int
	// Starts counts the pump's starts and stops during the interval
	// before the record.
	Starts int
	// Dropped marks the readings lost to a transmitter dropout
	// (FleetConfig.Missing); Values still holds the true reading.
	Dropped [NumSensors]bool
}

// Modes returns the names of the operating modes, in index order.
func Modes() []string { return []string{"low", "normal", "high"} }

// FaultEvent is one fault injected into the test period.
type FaultEvent struct {
	Station     int
	StationType int
	Fault       Fault
	Start, End  time.Time // records with Start <= Time < End may be affected
	Sensor      int       // the stuck sensor, or -1
}

// FleetConfig configures GenerateFleet.
type FleetConfig struct {
	Stations    int           // number of stations, >= 1
	HistoryDays int           // days of normal operation before the test period, >= 1
	TestDays    int           // days of the test period, >= 1
	Interval    time.Duration // sampling interval; zero means 10 minutes
	Seed        uint64
	// Missing is the long-run fraction of sensor readings lost to
	// transmitter dropouts, in [0, 0.9]: each sensor of each station
	// drops out in bursts of 3 records on average. Zero loses none.
	Missing float64
}

// Fleet is the generated data set.
type Fleet struct {
	Stations []Station
	// History holds the normal operation before the test period, ordered
	// by station and then time.
	History []Record
	// Test holds the test period with the faults injected and labelled,
	// and TestClean the same records before injection.
	Test, TestClean []Record
	Events          []FaultEvent
}

// Start returns the (invented) time of the first record of every station,
// Monday 3 March 2025, 00:00 UTC. The history begins here and the test
// period follows it.
func Start() time.Time { return time.Date(2025, time.March, 3, 0, 0, 0, 0, time.UTC) }

// GenerateFleet simulates the fleet. The data is invented for this demo
// (no real station or sensor is behind it). The same configuration always
// gives the same records: every random draw comes from PCG generators
// seeded with cfg.Seed.
func GenerateFleet(cfg FleetConfig) (*Fleet, error) {
	if cfg.Stations < 1 {
		return nil, fmt.Errorf("GenerateFleet: Stations: %d, want >= 1", cfg.Stations)
	}
	if cfg.HistoryDays < 1 || cfg.TestDays < 1 {
		return nil, fmt.Errorf("GenerateFleet: HistoryDays %d and TestDays %d, want both >= 1", cfg.HistoryDays, cfg.TestDays)
	}
	if cfg.Interval == 0 {
		cfg.Interval = 10 * time.Minute
	}
	if !(cfg.Missing >= 0 && cfg.Missing <= 0.9) {
		return nil, fmt.Errorf("GenerateFleet: Missing: %v, want a fraction in [0, 0.9]", cfg.Missing)
	}
	if cfg.Interval < time.Minute || cfg.Interval > 6*time.Hour {
		return nil, fmt.Errorf("GenerateFleet: Interval: %v, want between 1m and 6h", cfg.Interval)
	}
	perDay := int((24 * time.Hour) / cfg.Interval)
	nHist, nTest := cfg.HistoryDays*perDay, cfg.TestDays*perDay
	rng := rand.New(rand.NewPCG(cfg.Seed, 0xf1ee7))
	types := StationTypes()

	// Fleet-wide weather: a daily mean temperature following an AR(1)
	// around 14 degC.
	days := cfg.HistoryDays + cfg.TestDays + 1
	weather := make([]float64, days)
	w := rng.NormFloat64() * 3
	for d := range weather {
		w = 0.7*w + rng.NormFloat64()*3*math.Sqrt(1-0.49)
		weather[d] = 14 + w
	}

	f := &Fleet{}
	for i := range cfg.Stations {
		st := Station{
			ID:          i,
			Type:        i % len(types),
			DemandScale: 0.85 + 0.25*rng.Float64(),
			PeakShift:   rng.NormFloat64() * 0.5,
			EffOffset:   rng.NormFloat64() * 0.015,
			VibFactor:   0.8 + 0.45*rng.Float64(),
			SuctionOff:  rng.NormFloat64() * 0.1,
		}
		for j := range st.TempOff {
			st.TempOff[j] = rng.NormFloat64() * 1.5
		}
		f.Stations = append(f.Stations, st)
		recs := simulate(st, types[st.Type], weather, cfg.Interval, nHist+nTest, rand.New(rand.NewPCG(cfg.Seed, uint64(i)+1)))
		f.History = append(f.History, recs[:nHist]...)
		f.TestClean = append(f.TestClean, recs[nHist:]...)
	}

	// One fault (or none) per station in the test period: the kinds are
	// dealt in turn, bearing wear, cavitation, stuck sensor, none, and then
	// shuffled among the stations.
	kinds := []Fault{BearingWear, Cavitation, StuckSensor, Normal}
	assign := make([]Fault, cfg.Stations)
	for i := range assign {
		assign[i] = kinds[i%len(kinds)]
	}
	rng.Shuffle(len(assign), func(i, j int) { assign[i], assign[j] = assign[j], assign[i] })
	f.Test = make([]Record, len(f.TestClean))
	copy(f.Test, f.TestClean)
	for i, kind := range assign {
		if kind == Normal {
			continue
		}
		recs := f.Test[i*nTest : (i+1)*nTest]
		clean := f.TestClean[i*nTest : (i+1)*nTest]
		ev := injectFault(kind, f.Stations[i], types[f.Stations[i].Type], recs, clean, cfg.Interval, rng)
		f.Events = append(f.Events, ev)
	}
	// Operating mode, starts and dropouts, from generators of their own
	// so that the readings above do not depend on them.
	for i := range cfg.Stations {
		hist := f.History[i*nHist : (i+1)*nHist]
		test, clean := f.Test[i*nTest:(i+1)*nTest], f.TestClean[i*nTest:(i+1)*nTest]
		ty := types[f.Stations[i].Type]
		modeRng := rand.New(rand.NewPCG(cfg.Seed, 0x30de+uint64(i)))
		prev := -1.0
		for _, part := range [][]Record{hist, clean} {
			for j := range part {
				sr := part[j].Values[Speed] / ty.SpeedNom
				part[j].Mode = 1
				if sr < 0.6 {
					part[j].Mode = 0
				} else if sr > 0.9 {
					part[j].Mode = 2
				}
				rate := 0.05
				if prev >= 0 {
					rate += 3 * math.Abs(sr-prev)
				}
				prev = sr
				part[j].Starts = poisson(modeRng, rate)
			}
		}
		for j := range test {
			test[j].Mode, test[j].Starts = clean[j].Mode, clean[j].Starts
		}
		if cfg.Missing > 0 {
			dropRng := rand.New(rand.NewPCG(cfg.Seed, 0xd809+uint64(i)))
			const burst = 3.0 // mean dropout length, records
			recover := 1 / burst
			start := cfg.Missing * recover / (1 - cfg.Missing)
			for s := range NumSensors {
				down := dropRng.Float64() < cfg.Missing
				for _, part := range [][]Record{hist, test} {
					for j := range part {
						if down {
							down = dropRng.Float64() >= recover
						} else {
							down = dropRng.Float64() < start
						}
						part[j].Dropped[s] = down
					}
				}
			}
		}
	}
	return f, nil
}

// poisson draws a Poisson count of the given (small) rate by counting
// uniform products above exp(-rate) (Knuth, TAOCP vol. 2, 3.4.1).
func poisson(rng *rand.Rand, rate float64) int {
	l, k, p := math.Exp(-rate), 0, 1.0
	for {
		p *= rng.Float64()
		if p <= l {
			return k
		}
		k++
	}
}

// demandCurve is the daily demand shape at hour h (0..24): a night trough,
// a morning peak, a midday shoulder and an evening peak. Weekend mornings
// peak later and lower.
func demandCurve(h float64, weekend bool) float64 {
	bump := func(centre, width float64) float64 {
		d := math.Abs(h - centre)
		d = math.Min(d, 24-d) // the day wraps around
		return math.Exp(-d * d / (2 * width * width))
	}
	if weekend {
		return 0.15 + 0.6*bump(9, 1.8) + 0.4*bump(13.5, 2.5) + 0.65*bump(19.5, 1.8)
	}
	return 0.15 + 0.8*bump(7.5, 1.4) + 0.35*bump(13, 2.5) + 0.65*bump(19.5, 1.8)
}

// ar1 is a unit-variance first-order autoregressive process.
type ar1 struct{ phi, x float64 }

func (a *ar1) next(rng *rand.Rand) float64 {
	a.x = a.phi*a.x + math.Sqrt(1-a.phi*a.phi)*rng.NormFloat64()
	return a.x
}

// simulate runs one station for n samples from start.
func simulate(st Station, ty StationType, weather []float64, interval time.Duration, n int, rng *rand.Rand) []Record {
	dtMin := interval.Minutes()
	// AR(1) coefficients are set per 10 minutes and converted to the
	// sampling interval.
	phi := func(per10 float64) float64 { return math.Pow(per10, dtMin/10) }
	demandNoise := &ar1{phi: phi(0.9)}
	hydraulic := &ar1{phi: phi(0.85)} // network disturbance: valves, other pumps
	level := &ar1{phi: phi(0.98)}     // suction reservoir level
	electrical := &ar1{phi: phi(0.5)} // supply voltage and power-factor wander
	vib := &ar1{phi: phi(0.7)}        // common vibration variation
	lag := func(tauMin float64) float64 { return 1 - math.Exp(-dtMin/tauMin) }
	aDE, aNDE, aW := lag(100), lag(120), lag(45)

	eff := ty.Efficiency + st.EffOffset
	const motorEff, volts, pf = 0.94, 400.0, 0.87
	ratedKW := 9.81 * ty.FlowNom / 3600 * ty.HeadNom / (eff * motorEff)
	ratedLoadA := ratedKW * 1000 / (math.Sqrt(3) * volts * pf)
	magA := 0.3 * ratedLoadA
	ratedA := math.Hypot(magA, ratedLoadA)

	start := Start()
	out := make([]Record, n)
	var tDE, tNDE, tW float64
	for i := range n {
		t := start.Add(time.Duration(i) * interval)
		day := int(t.Sub(start).Hours() / 24)
		h := float64(t.Hour()) + float64(t.Minute())/60
		weekend := t.Weekday() == time.Saturday || t.Weekday() == time.Sunday
		hs := math.Mod(h-st.PeakShift+24, 24)
		amb := weather[day] + 5*math.Sin(2*math.Pi*(h-9)/24) // warmest at 15:00

		// Speed ratio of the variable-speed drive follows demand.
		s := 0.5 + 0.45*st.DemandScale*demandCurve(hs, weekend) + 0.03*demandNoise.next(rng)
		s = math.Max(0.42, math.Min(1.05, s))
		eh := hydraulic.next(rng)
		// Affinity laws: flow ~ speed, head ~ speed^2; the network
		// disturbance trades flow against head.
		q := ty.FlowNom * s * (1 + 0.04*eh)
		head := ty.HeadNom * s * s * (1 - 0.03*eh)
		ps := ty.Suction + st.SuctionOff + 0.08*level.next(rng) - 0.35*(q/ty.FlowNom)*(q/ty.FlowNom)
		pd := ps + 0.0981*head
		kw := 9.81 * q / 3600 * head / (eff * motorEff)
		ee := electrical.next(rng)
		loadA := kw * 1000 / (math.Sqrt(3) * volts * pf)
		amps := math.Hypot(magA, loadA) * (1 + 0.006*ee)
		kw *= 1 + 0.004*ee

		// Temperatures follow the load with first-order lags.
		targetDE := amb + 18 + 22*s*s + st.TempOff[0]
		targetNDE := amb + 14 + 15*s*s + st.TempOff[1]
		targetW := amb + 25 + 60*(amps/ratedA)*(amps/ratedA) + st.TempOff[2]
		if i == 0 {
			tDE, tNDE, tW = targetDE, targetNDE, targetW
		} else {
			tDE += aDE * (targetDE - tDE)
			tNDE += aNDE * (targetNDE - tNDE)
			tW += aW * (targetW - tW)
		}

		ev := vib.next(rng)
		vbase := ty.Vibration * st.VibFactor * (0.45 + 0.55*s*s)

		r := Record{Station: st.ID, Type: st.Type, Time: t}
		v := &r.Values
		v[Flow] = q * (1 + 0.01*rng.NormFloat64())
		v[SuctionPressure] = ps + 0.02*rng.NormFloat64()
		v[DischargePressure] = pd + 0.03*rng.NormFloat64()
		v[BearingTempDE] = tDE + 0.2*rng.NormFloat64()
		v[BearingTempNDE] = tNDE + 0.2*rng.NormFloat64()
		v[WindingTemp] = tW + 0.3*rng.NormFloat64()
		v[VibrationX] = vbase * (1 + 0.08*ev + 0.04*rng.NormFloat64())
		v[VibrationY] = 0.9 * vbase * (1 + 0.08*ev + 0.04*rng.NormFloat64())
		v[VibrationZ] = 0.6 * vbase * (1 + 0.06*ev + 0.05*rng.NormFloat64())
		v[MotorCurrent] = amps * (1 + 0.005*rng.NormFloat64())
		v[Power] = kw * (1 + 0.005*rng.NormFloat64())
		v[Speed] = ty.SpeedNom*s + 3*rng.NormFloat64()
		out[i] = r
	}
	return out
}

// injectFault changes the records of one station's test period in place
// (clean holds the same records unchanged) and returns the event.
func injectFault(kind Fault, st Station, ty StationType, recs, clean []Record, interval time.Duration, rng *rand.Rand) FaultEvent {
	n := len(recs)
	perDay := int((24 * time.Hour) / interval)
	// Window length: nominal duration, at most half the test period.
	nominal := map[Fault]int{BearingWear: 3 * perDay, Cavitation: 2 * perDay, StuckSensor: perDay * 3 / 2}[kind]
	length := max(1, min(nominal, n/2))
	lo := n / 8
	first := lo + rng.IntN(max(1, n-length-lo+1))
	if first+length > n {
		first = n - length
	}
	ev := FaultEvent{Station: st.ID, StationType: st.Type, Fault: kind, Start: recs[first].Time,
		End: recs[first].Time.Add(time.Duration(length) * interval), Sensor: -1}
	window := recs[first : first+length]
	switch kind {
	case BearingWear:
		// Slow drift: radial vibration grows to about 3.5 times its usual
		// level and the drive-end bearing runs up to 12 degC hotter by the
		// end of the window; the onset is gradual, so the first hours look
		// normal.
		for j := range window {
			sev := float64(j+1) / float64(length)
			v := &window[j].Values
			speed := clean[first+j].Values[Speed] / ty.SpeedNom
			vbase := ty.Vibration * st.VibFactor * (0.45 + 0.55*speed*speed)
			v[VibrationX] += vbase * sev * (2.5 + 0.4*math.Abs(rng.NormFloat64()))
			v[VibrationY] += 0.9 * vbase * sev * (2.2 + 0.4*math.Abs(rng.NormFloat64()))
			v[VibrationZ] += 0.6 * vbase * sev * (1.0 + 0.3*math.Abs(rng.NormFloat64()))
			v[BearingTempDE] += 12 * sev
			v[BearingTempNDE] += 3 * sev
			window[j].Fault = BearingWear
		}
	case Cavitation:
		// At peak demand (high flow, least suction head available) the
		// pump cavitates: suction pressure and flow dip, the head falls
		// and vibration comes in bursts. Off-peak records stay normal.
		for j := range window {
			h := window[j].Time.Hour()
			if !(h >= 6 && h < 10 || h >= 18 && h < 22) {
				continue
			}
			c := 0.5 + 0.5*rng.Float64()
			v := &window[j].Values
			q := 1 - (0.08 + 0.07*c)
			dps := 0.35 + 0.3*c
			speed := v[Speed] / ty.SpeedNom
			dHead := 0.0981 * ty.HeadNom * speed * speed * (0.06 + 0.04*c)
			v[Flow] *= q
			v[SuctionPressure] -= dps
			v[DischargePressure] -= dps + dHead
			v[Power] *= 1 - 0.06*c
			v[MotorCurrent] *= 1 - 0.04*c
			burst := 1 + c*(0.6+1.2*math.Abs(rng.NormFloat64()))
			v[VibrationX] *= burst
			v[VibrationY] *= burst
			v[VibrationZ] *= 1 + c*(0.8+1.5*math.Abs(rng.NormFloat64()))
			window[j].Fault = Cavitation
		}
	case StuckSensor:
		// One sensor repeats the value it read at the start of the window.
		s := rng.IntN(NumSensors)
		ev.Sensor = s
		stuck := window[0].Values[s]
		for j := range window {
			window[j].Values[s] = stuck
			window[j].Fault = StuckSensor
		}
	}
	return ev
}
