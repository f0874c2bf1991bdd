package schedule_test

import (
	"encoding/json"
	"fmt"

	"lowerbound.dev/vae/schedule"
)

func ExampleLinearWarmup() {
	beta := schedule.LinearWarmup{Start: 0, End: 1, Steps: 4}
	if err := beta.Validate(); err != nil {
		panic(err)
	}
	for step := 0; step <= 5; step++ {
		fmt.Printf("step %d: beta %.2f\n", step, beta.At(step))
	}
	// Output:
	// step 0: beta 0.00
	// step 1: beta 0.25
	// step 2: beta 0.50
	// step 3: beta 0.75
	// step 4: beta 1.00
	// step 5: beta 1.00
}

func ExampleCyclical() {
	// Cycles of 4 steps; beta rises during the first half of each cycle.
	beta := schedule.Cyclical{Period: 4, Ratio: 0.5, Max: 1}
	for step := 0; step < 8; step++ {
		fmt.Printf("%.1f ", beta.At(step))
	}
	fmt.Println()
	// Output:
	// 0.0 0.5 1.0 1.0 0.0 0.5 1.0 1.0
}

func ExampleFreeBits_Objective() {
	fb := schedule.FreeBits{Lambda: 0.5}
	// KL per latent dimension, averaged over the minibatch.
	total, clamped, err := fb.Objective([]float64{0.1, 1.2, 0.4})
	if err != nil {
		panic(err)
	}
	fmt.Printf("objective %.2f, clamped %v\n", total, clamped)
	// Output:
	// objective 2.20, clamped [true false true]
}

func ExampleCapacity_Penalty() {
	c := schedule.Capacity{Gamma: 100, Max: 20, Steps: 1000}
	fmt.Printf("target %.0f, penalty %.0f\n", c.Target(500), c.Penalty(12, 500))
	// Output:
	// target 10, penalty 200
}

func ExampleDescribe() {
	spec, err := schedule.Describe(schedule.Cyclical{Period: 1000, Ratio: 0.5, Max: 1})
	if err != nil {
		panic(err)
	}
	raw, _ := json.Marshal(spec)
	fmt.Println(string(raw))

	var stored schedule.Spec
	if err := json.Unmarshal(raw, &stored); err != nil {
		panic(err)
	}
	beta, err := schedule.FromSpec(stored)
	if err != nil {
		panic(err)
	}
	fmt.Println(beta.At(250))
	// Output:
	// {"kind":"cyclical","config":{"period":1000,"ratio":0.5,"max":1}}
	// 0.5
}
