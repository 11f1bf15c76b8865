package alarms_test

import (
	"encoding/json"
	"fmt"
	"math"

	"github.com/pulsefleet/pulsefleet/alarms"
)

// One engine per stream: feed it samples, let it emit events, persist its
// snapshot when Revision changes, restore it after a restart.
func Example() {
	p, err := alarms.ParseProfile([]byte(`
name: example
conditions:
  - {kind: spo2_low, limit: 90, hysteresis: 2, delay: 15s, priority: medium,
     escalate: {below: 85, after: 60s, priority: high}}
`))
	if err != nil {
		panic(err)
	}
	e, _ := alarms.NewEngine(p, "bed-12")
	print := func(ev alarms.Event) {
		fmt.Printf("%g %s %s %s\n", ev.T, ev.Type, ev.Episode.Condition, ev.Episode.Priority)
	}
	nan := math.NaN()
	for i, v := range []float64{96, 89, 88, 88} {
		e.Eval(alarms.Sample{T: float64(i * 10), SpO2: v, Pulse: nan, PI: nan, SQI: nan}, print)
	}
	// Persist (the gateway stores this JSON whenever e.Revision() changed).
	b, _ := json.Marshal(e.Snapshot())

	// After a restart: restore before evaluating; nothing is announced again.
	var st alarms.State
	_ = json.Unmarshal(b, &st)
	r, _ := alarms.Restore(p, st)
	fmt.Println("restored priority:", r.Priority())
	r.Eval(alarms.Sample{T: 30, SpO2: 88, Pulse: nan, PI: nan, SQI: nan}, print) // a resent sample: ignored
	r.Eval(alarms.Sample{T: 40, SpO2: 84, Pulse: nan, PI: nan, SQI: nan}, print)
	r.Acknowledge("nurse-a", 41, print)
	r.Eval(alarms.Sample{T: 50, SpO2: 93, Pulse: nan, PI: nan, SQI: nan}, print)
	// Output:
	// 10 onset spo2_low medium
	// 30 announced spo2_low medium
	// restored priority: medium
	// 40 escalated spo2_low high
	// 41 acknowledged spo2_low high
	// 50 ended spo2_low high
}
