// Package scenario describes a simulated fleet over time: which devices
// exist, the patient behind each one (baseline saturation, pulse, perfusion,
// breathing), its battery, random background events drawn from a seed, and
// scripted events at set scenario times (a desaturation to 84 % over 40 s
// held for 90 s, a sensor-off spell, a motion burst, a device that goes
// offline or onto its charger).
//
// A [Scenario] is plain typed data; [Parse] reads the YAML file format
// documented in docs/scenarios.md and names the key path and the bound of
// anything it rejects. [Generic] builds an unscripted fleet of seed-derived
// patients for load runs. A [Track] evaluates one device's [State] at any
// scenario time; it is cheap (a few sines and a scan of the events near t)
// so the load client can call it once per chunk.
//
// Scenario time starts at 0 when the fleet starts. The simulator may run it
// faster than wall time (time compression); device clocks follow scenario
// time. Nothing here reads the wall clock.
//
// Caveat: the physiology is a plausible caricature for demos and load, not a
// validated patient model. All names in the shipped scenarios are invented.
package scenario
