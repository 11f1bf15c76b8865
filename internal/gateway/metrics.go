package gateway

import (
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
)

// The gateway's own series are its backups' (backup_schedule.go); the
// ingest series are registered by internal/ingest (its metrics.go).

// RegisterRuntime adds the Go and process collectors to reg (the caller
// does it once per process, so tests can build several gateways).
func RegisterRuntime(reg prometheus.Registerer) error {
	for _, c := range []prometheus.Collector{collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{})} {
		if err := reg.Register(c); err != nil {
			return err
		}
	}
	return nil
}
