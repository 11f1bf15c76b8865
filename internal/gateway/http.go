package gateway

import (
	"fmt"
	"net/http"

	"github.com/prometheus/client_golang/prometheus/promhttp"
)

// httpHandler serves /metrics, /healthz, /readyz, and the web page and its
// JSON (internal/web).
func (g *Gateway) httpHandler() http.Handler {
	mux := http.NewServeMux()
	metricsH := promhttp.HandlerFor(g.opt.Gatherer, promhttp.HandlerOpts{ErrorLog: nil, Registry: g.opt.Registerer})
	mux.Handle("GET /metrics", http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		g.ingest.RefreshDeviceSeries() // per-device gauges as of this scrape
		metricsH.ServeHTTP(w, r)
	}))
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "text/plain; charset=utf-8")
		fmt.Fprintln(w, "ok")
	})
	mux.HandleFunc("GET /readyz", func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "text/plain; charset=utf-8")
		if !g.Ready() {
			w.WriteHeader(http.StatusServiceUnavailable)
			if err := g.ingest.StoreFailure(); err != nil {
				fmt.Fprintf(w, "not ready: store write failed: %v\n", err)
				return
			}
			fmt.Fprintln(w, "not ready")
			return
		}
		if d := g.controlPlaneStatus(); d != "" {
			fmt.Fprintln(w, "ready (degraded: "+d+")") // ingest goes on: not a reason to take the gateway out of service
			return
		}
		fmt.Fprintln(w, "ready")
	})
	g.web.Routes(mux) // the web page, its JSON and the login (internal/web)
	return mux
}
