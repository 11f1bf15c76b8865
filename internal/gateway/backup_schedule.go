package gateway

import (
	"context"
	"fmt"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/pulsefleet/pulsefleet/internal/store"
)

// BackupSchedule configures scheduled snapshots (serve --backup-dir,
// --backup-every, --backup-keep). The store does the work
// (store.DB.BackupToDir); this is the timer and the metrics.
type BackupSchedule struct {
	Dir   string        // directory of the snapshots; "" takes none
	Every time.Duration // interval between snapshots
	Keep  int           // complete snapshots kept (the oldest beyond are removed)
}

// Validate checks the schedule's bounds.
func (b BackupSchedule) Validate() error {
	if b.Dir == "" {
		return nil
	}
	if b.Every < time.Second || b.Every > 30*24*time.Hour {
		return fmt.Errorf("backup-every: %v, want 1s..720h", b.Every)
	}
	if b.Keep < 1 || b.Keep > 10000 {
		return fmt.Errorf("backup-keep: %d, want 1..10000", b.Keep)
	}
	return nil
}

type backupMetrics struct {
	lastSuccess prometheus.Gauge
	interval    prometheus.Gauge
	failures    prometheus.Counter
}

func newBackupMetrics(reg prometheus.Registerer, s BackupSchedule, _ string) (*backupMetrics, error) {
	m := &backupMetrics{
		lastSuccess: prometheus.NewGauge(prometheus.GaugeOpts{Name: "pulsefleet_backup_last_success_timestamp_seconds",
			Help: "Unix time of the newest complete scheduled backup (0 = none yet)."}),
		interval: prometheus.NewGauge(prometheus.GaugeOpts{Name: "pulsefleet_backup_interval_seconds",
			Help: "Interval of scheduled backups (serve --backup-every); 0 when scheduled backups are off."}),
		failures: prometheus.NewCounter(prometheus.CounterOpts{Name: "pulsefleet_backup_failures_total",
			Help: "Scheduled backups that failed."}),
	}
	for _, c := range []prometheus.Collector{m.lastSuccess, m.interval, m.failures} {
		if err := reg.Register(c); err != nil {
			return nil, err
		}
	}
	if s.Dir != "" {
		m.interval.Set(s.Every.Seconds())
	}
	return m, nil
}

// runBackups takes a snapshot every Backups.Every until ctx ends. The first
// is due one interval after the newest complete backup already in the
// directory (at once when there is none or it is older).
func (g *Gateway) runBackups(ctx context.Context) {
	s := g.opt.Backups
	if s.Dir == "" {
		return
	}
	next := g.opt.Now()
	if bs, err := store.ListBackups(s.Dir); err == nil && len(bs) > 0 {
		last := bs[len(bs)-1].Taken
		g.backups.lastSuccess.Set(float64(last.Unix()))
		next = last.Add(s.Every)
	}
	for {
		wait := next.Sub(g.opt.Now())
		if wait > 0 {
			t := time.NewTimer(wait)
			select {
			case <-ctx.Done():
				t.Stop()
				return
			case <-t.C:
			}
		}
		if ctx.Err() != nil {
			return
		}
		now := g.opt.Now()
		path, n, err := g.db.BackupToDir(ctx, s.Dir, s.Keep, now)
		if ctx.Err() != nil {
			return
		}
		entry := &store.AuditEntry{TimeMS: g.opt.Now().UnixMilli(), Actor: "gateway", Action: "backup.done",
			Detail: fmt.Sprintf("scheduled snapshot %s, %d bytes", path, n)}
		if err != nil && path == "" {
			g.backups.failures.Inc()
			g.log.Error("scheduled backup failed", "dir", s.Dir, "err", err)
			entry.Action, entry.Detail = "backup.failed", fmt.Sprintf("scheduled snapshot into %s: %v", s.Dir, err)
		} else {
			if err != nil { // the snapshot is complete; retention failed
				g.log.Warn("scheduled backup: retention", "err", err)
			}
			g.backups.lastSuccess.Set(float64(now.Unix()))
			g.log.Info("scheduled backup", "file", path, "bytes", n)
		}
		if aerr := g.db.AppendAudit(entry); aerr != nil {
			g.log.Warn("backup audit entry not written", "err", aerr)
		}
		next = now.Add(s.Every)
	}
}
