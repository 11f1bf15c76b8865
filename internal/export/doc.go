// Package export writes a store's trend history as CSV or as an HL7 FHIR R4
// Bundle, streaming: points are written as the store yields them, so a long
// range never sits in memory.
//
// Nouns:
//
//	Run         reads devices and trend points from a Source (a *store.DB) into a Writer
//	CSVWriter   t_s,device,spo2_pct,pulse_bpm,pi_pct,sqi,ratio,flags,source: the
//	            replay/tune trend columns first, so an export replays directly
//	FHIRWriter  a Bundle of type collection: one Device resource per device, then
//	            Observations (SpO2 with LOINC 59408-5 and 2708-6, pulse rate 8867-4,
//	            perfusion index with ISO/IEEE 11073 150448), UCUM units, status final
//
// Missing values (NaN in the store) become empty CSV cells and no
// Observation; nothing is made up. Values are stored as float32 and written in
// the shortest form that reads back to the same float32.
//
// Caveats: the FHIR output is plain FHIR R4 (it validates against the
// official JSON schema) and claims no implementation guide; Observations have
// no subject because a pilot's store links devices, not patients. A Source
// is a stopped gateway's *store.DB (one read transaction per device) or,
// in cmd/pulsefleet, running gateways through FleetService.ExportTrend
// (which read in bounded slices): the writers see the same points either
// way, so the output is the same.
package export
