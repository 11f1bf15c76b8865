package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

const storeSummary = `Look into a store: store stats prints where its bytes go.

  pulsefleet store stats (--data DIR | --gateway ADDR) [--format text|json]

For every kind of record (top-level bucket: trend, recent = trend points not
yet compacted, ledger, raw, episodes, audit, alarmstate, ...) it prints the
bytes of the pages it occupies, the records and what they hold (trend points,
ledger messages, raw chunks), and the bytes per device-day: device-days are
the trend points held / 86,400 (one point per device-second). Free pages are
space the file already has for later writes. It reads every page (read-only,
shared lock) of a stopped gateway's store; --gateway ADDR asks a running
gateway (AdminService.GetStoreStats, viewer role; its /metrics carries the
same as pulsefleet_store_bytes, refreshed every 10 minutes).`

func init() {
	register(command{name: "store", summary: storeSummary, run: runStore})
}

func runStore(ctx context.Context, args []string, s stdio) error {
	if len(args) == 0 || args[0] != "stats" {
		return usagef("store: want a subcommand: stats")
	}
	fs := newFlagSet("store stats", "(--data DIR | --gateway ADDR) [--format text|json]", s.err)
	var cf clientFlags
	cf.register(fs)
	data := fs.String("data", "", "data directory of a stopped gateway, holding pulsefleet.db")
	format := fs.String("format", "text", "output: text or json")
	wait := fs.Duration("wait", time.Second, "with --data: how long to wait for the store's lock")
	if err := parseFlags(fs, args[1:]); err != nil {
		return err
	}
	if (*data == "") == (cf.gateways == "") {
		return usagef("--data, --gateway: give one (--data for a stopped gateway's store, --gateway for a running one)")
	}
	if *format != "text" && *format != "json" {
		return usagef("--format: %q, want text or json", *format)
	}
	var st *store.Stats
	var err error
	if *data != "" {
		st, err = localStoreStats(*data, *wait)
	} else {
		st, err = remoteStoreStats(ctx, &cf)
	}
	if err != nil {
		return err
	}
	if *format == "json" {
		enc := json.NewEncoder(s.out)
		enc.SetIndent("", "  ")
		return enc.Encode(st)
	}
	return writeStoreStats(s.out, st)
}

func localStoreStats(data string, wait time.Duration) (*store.Stats, error) {
	db, err := store.Open(data, store.Options{ReadOnly: true, Timeout: wait})
	if errors.Is(err, store.ErrLocked) {
		return nil, fmt.Errorf("--data %s: %w: store stats reads the file read-only but a running gateway holds it: use --gateway ADDR", data, err)
	}
	if err != nil {
		return nil, fmt.Errorf("--data %s: %w", data, err)
	}
	defer db.Close()
	st, err := db.Stats()
	if err != nil {
		return nil, fmt.Errorf("store stats %s: %w", data, err)
	}
	return st, nil
}

func remoteStoreStats(ctx context.Context, cf *clientFlags) (*store.Stats, error) {
	addrs, err := cf.addrs()
	if err != nil {
		return nil, err
	}
	if len(addrs) != 1 {
		return nil, usagef("--gateway: one address, got %d (each gateway of a sharded fleet has its own store)", len(addrs))
	}
	conn, err := cf.dial(addrs[0])
	if err != nil {
		return nil, err
	}
	defer conn.Close()
	r, err := pb.NewAdminServiceClient(conn).GetStoreStats(cf.ctx(ctx), &pb.GetStoreStatsRequest{})
	if err != nil {
		return nil, fmt.Errorf("--gateway %s: store stats: %w", addrs[0], err)
	}
	st := &store.Stats{Path: r.GetPath(), FileBytes: r.GetFileBytes(), PageSize: int(r.GetPageSize()), FreeBytes: r.GetFreeBytes(),
		TrendPoints: r.GetTrendPoints(), DeviceDays: r.GetDeviceDays(), RawSeconds: r.GetRawSeconds()}
	for _, k := range r.GetKinds() {
		st.Kinds = append(st.Kinds, store.KindStats{Kind: k.GetKind(), Bytes: k.GetBytes(), InUse: k.GetInUseBytes(), Records: k.GetRecords(), Items: k.GetItems()})
	}
	return st, nil
}

func writeStoreStats(w io.Writer, st *store.Stats) error {
	fmt.Fprintf(w, "store %s: %s, %d-byte pages; %.3f device-days of trend (%d points), %.0f device-seconds of raw\n",
		safeCell(st.Path), humanBytes(st.FileBytes), st.PageSize, st.DeviceDays, st.TrendPoints, st.RawSeconds)
	t := newTable(w, 0, "KIND", "BYTES", "IN USE", "RECORDS", "ITEMS", "BYTES/DEVICE-DAY")
	perDay := func(b int64) string {
		if st.DeviceDays == 0 {
			return "-"
		}
		return humanBytes(int64(st.PerDeviceDay(b)))
	}
	var sum int64
	for _, k := range st.Kinds {
		sum += k.Bytes
		t.row(safeCell(k.Kind), humanBytes(k.Bytes), humanBytes(k.InUse), fmt.Sprint(k.Records), fmt.Sprint(k.Items), perDay(k.Bytes))
	}
	t.row("(free pages)", humanBytes(st.FreeBytes), "-", "-", "-", "-")
	t.row("(file)", humanBytes(st.FileBytes), humanBytes(sum), "-", "-", perDay(st.FileBytes))
	return t.flush()
}

// humanBytes prints a byte count with a binary unit.
func humanBytes(n int64) string {
	switch {
	case n >= 1<<30:
		return fmt.Sprintf("%.2f GiB", float64(n)/(1<<30))
	case n >= 1<<20:
		return fmt.Sprintf("%.2f MiB", float64(n)/(1<<20))
	case n >= 1<<10:
		return fmt.Sprintf("%.1f KiB", float64(n)/(1<<10))
	}
	return fmt.Sprintf("%d B", n)
}
