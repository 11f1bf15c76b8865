package store

import (
	"slices"
	"sort"
)

// SeqSpan is a run of consecutive sequence numbers a device's ledger holds,
// with the device times of its first and last message (Unix ms).
type SeqSpan struct {
	First, Last           uint64
	FirstDevMS, LastDevMS int64
}

// LedgerCoverage returns, per device id, the sequence numbers the ingest
// ledger holds, merged into ascending spans that neither overlap nor touch
// (a message stored twice counts once here; LedgerTotals reports it). Only
// the devices in only are returned when it is not empty. Merged history
// queries across gateways use it: a device numbers its messages from 1
// without holes, so the numbers no reachable gateway holds are elsewhere.
func (db *DB) LedgerCoverage(only ...string) (map[string][]SeqSpan, error) {
	byIdx := map[uint32][]SeqSpan{}
	names, err := db.scanLedger(func(r *ledgerRange) {
		byIdx[r.idx] = append(byIdx[r.idx], SeqSpan{First: r.first, Last: r.last, FirstDevMS: r.firstDev, LastDevMS: r.lastDv})
	})
	if err != nil {
		return nil, err
	}
	out := make(map[string][]SeqSpan, len(byIdx))
	for idx, spans := range byIdx {
		id := names[idx]
		if len(only) > 0 && !slices.Contains(only, id) {
			continue
		}
		out[id] = MergeSpans(spans)
	}
	return out, nil
}

// MergeSpans sorts spans by first sequence and merges those that overlap
// or touch; the device times of a merged span are its first and last
// message's. spans is reordered in place.
func MergeSpans(spans []SeqSpan) []SeqSpan {
	sort.Slice(spans, func(i, j int) bool { return spans[i].First < spans[j].First })
	var out []SeqSpan
	for _, s := range spans {
		n := len(out)
		if n == 0 || s.First > out[n-1].Last+1 {
			out = append(out, s)
			continue
		}
		if s.Last > out[n-1].Last {
			out[n-1].Last, out[n-1].LastDevMS = s.Last, s.LastDevMS
		}
	}
	return out
}
