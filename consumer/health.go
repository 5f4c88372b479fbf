package consumer

import (
	"context"
	"encoding/json"
	"net/http"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"
)

// Ready reports whether the replica can do its work: NATS connected,
// PostgreSQL reachable and the consumer active. It returns what is not ready,
// by component (nats, postgres, consumer); empty means ready.
func (p *Pipeline) Ready(ctx context.Context) map[string]string {
	problems := map[string]string{}
	if p.nc.Status() != nats.CONNECTED {
		problems["nats"] = p.nc.Status().String()
	}
	ctx, cancel := context.WithTimeout(ctx, 2*time.Second)
	defer cancel()
	if err := p.store.Ping(ctx); err != nil {
		problems["postgres"] = "unreachable"
	}
	if !p.active.Load() {
		problems["consumer"] = "inactive"
	}
	return problems
}

// Handler serves /healthz (the process is alive), /readyz (Ready) and
// /metrics (Prometheus text format from gatherer).
func (p *Pipeline) Handler(gatherer prometheus.Gatherer) http.Handler {
	mux := http.NewServeMux()
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "application/json")
		_, _ = w.Write([]byte(`{"status":"alive"}` + "\n"))
	})
	mux.HandleFunc("GET /readyz", func(w http.ResponseWriter, r *http.Request) {
		problems := p.Ready(r.Context())
		w.Header().Set("Content-Type", "application/json")
		body := map[string]any{"status": "ready"}
		if len(problems) > 0 {
			w.WriteHeader(http.StatusServiceUnavailable)
			body = map[string]any{"status": "not ready", "problems": problems}
		}
		_ = json.NewEncoder(w).Encode(body)
	})
	mux.Handle("GET /metrics", promhttp.HandlerFor(gatherer, promhttp.HandlerOpts{}))
	return mux
}
