package consumer

import (
	"github.com/prometheus/client_golang/prometheus"
)

// Metrics are the pipeline's Prometheus metrics. Labels never carry patient
// identifiers: only outcomes, kinds and reason codes, which are bounded sets.
type Metrics struct {
	Inputs        *prometheus.CounterVec // by outcome: accepted, duplicate, retry, dead-letter
	Ignored       *prometheus.CounterVec // resources ignored by reason (e.g. unknown-code)
	Derived       *prometheus.CounterVec // new derivation versions by kind
	Retractions   prometheus.Counter
	Refusals      *prometheus.CounterVec // by reason code
	DeadLetters   *prometheus.CounterVec // by reason code
	Redeliveries  prometheus.Counter
	Published     prometheus.Counter
	OutboxBacklog prometheus.Gauge
	Latency       prometheus.Histogram // input publish to ack, seconds
	Handling      prometheus.Histogram // handler time, seconds
	Stalls        prometheus.Counter
	// DeadLetterCopyFailures counts failed publishes of dead-letter copies;
	// DeadLetterFailing is 1 while the dead-letter path (copy or record)
	// fails, 0 once a dead letter went through again.
	DeadLetterCopyFailures prometheus.Counter
	DeadLetterFailing      prometheus.Gauge
	// RelayFailures counts relay passes that left rows unpublished;
	// RelayFailing is 1 while the relay fails, 0 once a pass published
	// every row it met.
	RelayFailures prometheus.Counter
	RelayFailing  prometheus.Gauge
	// OutboxDamaged is the number of outbox rows the relay's last pass
	// found damaged (a stored payload that does not decode, or not to its
	// stored SHA-256 and size: never published, met again by every pass);
	// OutboxHeld the rows that pass left unpublished behind an earlier
	// version of their derivation that was not published.
	OutboxDamaged prometheus.Gauge
	OutboxHeld    prometheus.Gauge
	// IntakeStalled is 1 while the watchdog finds input pending and no
	// message settled for StallAfter.
	IntakeStalled prometheus.Gauge
	// LockFallbacks counts group commits that waited out a patient lock
	// and were recorded message by message.
	LockFallbacks prometheus.Counter
	// Fresh counts the fresh lane's messages by outcome: recorded (ahead
	// of the main consumer), passed (not fresh, or poison: left to the
	// main consumer), duplicate, failed (left to the main consumer).
	Fresh *prometheus.CounterVec
	// FreshActive is 1 while the fresh lane's consumer exists and its
	// pulls succeed, else 0.
	FreshActive prometheus.Gauge
	// RandomIndexBytes is the size of each random-order unique index every
	// input writes (postgres.RandomIndexes, by name; for fact_row's the
	// partitions that can receive inserts), SharedBuffersBytes the
	// server's shared_buffers, as serve's buffer check last read them
	// (cmd/ventderive: at start, then hourly).
	RandomIndexBytes   *prometheus.GaugeVec
	SharedBuffersBytes prometheus.Gauge
}

// NewMetrics creates the metrics and registers them with reg when it is not nil.
func NewMetrics(reg prometheus.Registerer) *Metrics {
	buckets := []float64{.001, .0025, .005, .01, .025, .05, .1, .25, .5, 1, 2.5, 5, 10, 30}
	m := &Metrics{
		Inputs: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "ventderive_inputs_total", Help: "Input messages by outcome (accepted, duplicate, retry, dead-letter).",
		}, []string{"outcome"}),
		Ignored: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "ventderive_ignored_resources_total", Help: "Resources in accepted messages that carried nothing the service uses, by reason.",
		}, []string{"reason"}),
		Derived: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "ventderive_derived_total", Help: "New derived-value versions recorded, by kind.",
		}, []string{"kind"}),
		Retractions: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "ventderive_retractions_total", Help: "Derived values withdrawn (entered-in-error versions).",
		}),
		Refusals: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "ventderive_refusals_total", Help: "Derivations refused, by reason code.",
		}, []string{"reason"}),
		DeadLetters: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "ventderive_dead_letters_total", Help: "Poison messages terminated and recorded, by reason code.",
		}, []string{"reason"}),
		Redeliveries: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "ventderive_redeliveries_total", Help: "Messages received with a delivery count above one.",
		}),
		Published: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "ventderive_published_total", Help: "Outbox messages published and acknowledged by the server.",
		}),
		OutboxBacklog: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "ventderive_outbox_backlog", Help: "Outbox rows not yet published.",
		}),
		Latency: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "ventderive_input_latency_seconds", Help: "From input publish (stream timestamp) to acknowledgement.", Buckets: buckets,
		}),
		Handling: prometheus.NewHistogram(prometheus.HistogramOpts{
			Name: "ventderive_processing_seconds", Help: "Handler time per input message.", Buckets: buckets,
		}),
		Stalls: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "ventderive_consumer_stalls_total", Help: "Times the watchdog found pending input with no progress and rebuilt the consumer.",
		}),
		DeadLetterCopyFailures: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "ventderive_dead_letter_copy_failures_total", Help: "Failed publishes of a dead-letter copy (retried, or recorded without the copy after a few deliveries).",
		}),
		DeadLetterFailing: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "ventderive_dead_letter_failing", Help: "1 while the dead-letter path (copy or record) fails, else 0.",
		}),
		RelayFailures: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "ventderive_relay_failures_total", Help: "Outbox relay passes that left rows unpublished (publish refused, unacknowledged or store failure).",
		}),
		RelayFailing: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "ventderive_relay_failing", Help: "1 while the outbox relay fails, else 0.",
		}),
		OutboxDamaged: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "ventderive_outbox_damaged", Help: "Outbox rows not published because their stored payload does not decode, or not to its stored SHA-256 and size (last relay pass).",
		}),
		OutboxHeld: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "ventderive_outbox_held", Help: "Outbox rows the last relay pass held back behind an earlier unpublished version of their derivation.",
		}),
		IntakeStalled: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "ventderive_intake_stalled", Help: "1 while input is pending and no message was settled for the stall limit, else 0.",
		}),
		LockFallbacks: prometheus.NewCounter(prometheus.CounterOpts{
			Name: "ventderive_lock_fallbacks_total", Help: "Group commits that waited out a patient lock (lock_timeout) and were recorded message by message.",
		}),
		Fresh: prometheus.NewCounterVec(prometheus.CounterOpts{
			Name: "ventderive_fresh_inputs_total", Help: "Messages of the fresh lane by outcome (recorded ahead of the main consumer, passed to it, duplicate, failed).",
		}, []string{"outcome"}),
		FreshActive: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "ventderive_fresh_lane_active", Help: "1 while the fresh lane's consumer exists and its pulls succeed, else 0.",
		}),
		RandomIndexBytes: prometheus.NewGaugeVec(prometheus.GaugeOpts{
			Name: "ventderive_random_index_bytes", Help: "Size of each random-order unique index every input writes (fact_row's: the partitions that can receive inserts), at the last buffer check.",
		}, []string{"index"}),
		SharedBuffersBytes: prometheus.NewGauge(prometheus.GaugeOpts{
			Name: "ventderive_shared_buffers_bytes", Help: "PostgreSQL shared_buffers in bytes, at the last buffer check.",
		}),
	}
	if reg != nil {
		reg.MustRegister(m.Inputs, m.Ignored, m.Derived, m.Retractions, m.Refusals, m.DeadLetters,
			m.Redeliveries, m.Published, m.OutboxBacklog, m.Latency, m.Handling, m.Stalls,
			m.DeadLetterCopyFailures, m.DeadLetterFailing, m.RelayFailures, m.RelayFailing, m.OutboxDamaged, m.OutboxHeld, m.IntakeStalled, m.LockFallbacks,
			m.Fresh, m.FreshActive, m.RandomIndexBytes, m.SharedBuffersBytes)
	}
	return m
}
