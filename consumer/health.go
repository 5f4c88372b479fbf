package consumer

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/promhttp"
)

// Ready reports whether the replica can do its work. It returns what is not
// ready, by component, with a reason; empty means ready:
//
//   - nats: the connection's state when not connected;
//   - postgres: "unreachable" when a round trip fails;
//   - consumer: "inactive" when the durable consumer is missing or fetches fail;
//   - fresh: "inactive" when the fresh lane's consumer is missing or its
//     pulls fail (input is still recorded, but live input waits behind a
//     backlog); absent when the lane is off;
//   - intake: input is pending and no message was settled for StallAfter
//     (a full in-flight limit, a store that refuses every write);
//   - relay: the outbox relay has failed for longer than FailingAfter
//     (with its last error: a denied subject, no acknowledgement, stored
//     dictionaries that cannot be read); damaged rows are not a failure
//     (Degraded);
//   - dead-letter: recording or copying dead letters has failed for longer
//     than FailingAfter.
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
	if p.cfg.FreshAge >= 0 && !p.freshActive.Load() {
		problems["fresh"] = "inactive: live input waits behind any backlog"
	}
	now := p.now()
	// A message settled since the watchdog's last look ends the stall.
	if since := p.stalledSince.Load(); since != 0 && p.progress.Load() == p.stalledProgress.Load() {
		problems["intake"] = fmt.Sprintf("no input settled for %s with %d messages pending", roundSince(now, since), p.stalledPending.Load())
	}
	if since := p.relayFailSince.Load(); since != 0 && now.Sub(time.Unix(0, since)) >= p.cfg.FailingAfter {
		last, _ := p.relayErr.Load().(string)
		problems["relay"] = fmt.Sprintf("outbox relay failing for %s: %s", roundSince(now, since), last)
	}
	if since := p.dlFailingSince.Load(); since != 0 && now.Sub(time.Unix(0, since)) >= p.cfg.FailingAfter {
		problems["dead-letter"] = fmt.Sprintf("dead letters failing for %s", roundSince(now, since))
	}
	return problems
}

// Degraded reports what the replica does not do although it is ready, by
// component, with a reason; empty means nothing:
//
//   - outbox: outbox rows the relay found damaged (a stored payload that
//     does not decode, or not to the SHA-256 and size stored beside it),
//     with their count and first sequence numbers, and how many later
//     versions are held behind unpublished ones. They are not published,
//     and every pass checks them again, so a repaired row goes out.
//
// Damage is not unreadiness: it stays in the database whatever replica
// runs, every other row is published, and a replica reported unready for
// it would only block a rollout (perhaps the one with the fix).
func (p *Pipeline) Degraded() map[string]string {
	out := map[string]string{}
	if s, _ := p.outboxDamage.Load().(string); s != "" {
		out["outbox"] = s
	}
	return out
}

// roundSince is the time from since (Unix nanoseconds) to now, in seconds.
func roundSince(now time.Time, since int64) time.Duration {
	return now.Sub(time.Unix(0, since)).Round(time.Second)
}

// Handler serves /healthz (the process is alive), /readyz (Ready, with
// Degraded: 200 "ready", 200 "degraded" with its reasons, or 503 "not
// ready" with the problems and any degraded reasons) and /metrics
// (Prometheus text format from gatherer).
func (p *Pipeline) Handler(gatherer prometheus.Gatherer) http.Handler {
	mux := http.NewServeMux()
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "application/json")
		_, _ = w.Write([]byte(`{"status":"alive"}` + "\n"))
	})
	mux.HandleFunc("GET /readyz", func(w http.ResponseWriter, r *http.Request) {
		problems, degraded := p.Ready(r.Context()), p.Degraded()
		w.Header().Set("Content-Type", "application/json")
		body := map[string]any{"status": "ready"}
		if len(degraded) > 0 {
			body = map[string]any{"status": "degraded", "degraded": degraded}
		}
		if len(problems) > 0 {
			w.WriteHeader(http.StatusServiceUnavailable)
			body = map[string]any{"status": "not ready", "problems": problems}
			if len(degraded) > 0 {
				body["degraded"] = degraded
			}
		}
		_ = json.NewEncoder(w).Encode(body)
	})
	mux.Handle("GET /metrics", promhttp.HandlerFor(gatherer, promhttp.HandlerOpts{}))
	return mux
}
