package consumer

import (
	"fmt"
	"strconv"
	"strings"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/fhirmap"
)

// Default names of the message contract. A site may change every one of them
// through configuration; deploy/ uses these values and a test checks that.
const (
	DefaultInputStream   = "FHIR_INPUT"
	DefaultInputSubjects = "fhir.input.>" // e.g. fhir.input.lab, fhir.input.device, fhir.input.adt
	DefaultOutputStream  = "VENTDERIVE"
	DefaultDurable       = "ventderive"
	// DefaultFreshDurable is the fresh lane's durable consumer
	// (FreshConsumerConfig): the Durable's name with "-fresh".
	DefaultFreshDurable   = DefaultDurable + FreshSuffix
	FreshSuffix           = "-fresh"
	DefaultObservationSub = "ventderive.observation"
	DefaultProvenanceSub  = "ventderive.provenance"
	DefaultDeadLetterSub  = "ventderive.deadletter"
	DefaultOutputSubjects = "ventderive.>"
)

// Header names the service sets on what it publishes.
const (
	HeaderContentType = "Content-Type" // application/fhir+json
	HeaderKind        = "Ventderive-Kind"
	HeaderStatus      = "Ventderive-Status"
	HeaderAlgorithm   = "Ventderive-Algorithm"
	HeaderReason      = "Ventderive-Reason"     // dead letters: the reason code
	HeaderDetail      = "Ventderive-Detail"     // dead letters: the field or entry at fault, no payload values
	HeaderStreamSeq   = "Ventderive-Stream-Seq" // dead letters: the input stream sequence
	FHIRContentType   = "application/fhir+json"
)

// Config is the pipeline's configuration. cmd fills it from flags and
// environment; zero values mean the defaults of DefaultConfig.
type Config struct {
	InputStream    string
	Durable        string
	ObservationSub string
	ProvenanceSub  string
	DeadLetterSub  string

	// Window is the pairing window around a blood gas.
	Window fhirmap.Window
	// TemperatureWindow is the window in which a body temperature is paired
	// with a blood gas (fhirmap.Site.TemperatureWindow).
	TemperatureWindow fhirmap.Window
	// Horizon bounds how far from a patient-level fact (height, sex, ...)
	// blood gases are recomputed when it arrives.
	Horizon time.Duration

	// AckWait is the consumer's ack wait: the failover time for a dead replica.
	AckWait time.Duration
	// MaxAckPending bounds in-flight messages per consumer.
	MaxAckPending int
	// Fetch is how many messages one pull asks for.
	Fetch int
	// RetryBase and RetryMax bound the NakWithDelay back-off for transient failures.
	RetryBase time.Duration
	RetryMax  time.Duration
	// MaxDeliver bounds redeliveries; -1 is unlimited (transient store
	// outages must not turn into lost input).
	MaxDeliver int
	// RelayInterval is how often the outbox relay polls when idle.
	RelayInterval time.Duration
	// StallAfter is how long the watchdog tolerates pending messages with no
	// progress; readiness then reports "intake" until progress resumes.
	StallAfter time.Duration
	// FailingAfter is how long the outbox relay or the dead-letter path may
	// keep failing before readiness reports it ("relay", "dead-letter").
	FailingAfter time.Duration

	// FreshDurable is the fresh lane's durable consumer ("": Durable
	// with "-fresh"). The lane records at once an input published while
	// the replica runs, less than FreshAge old when it is received and
	// more than FreshLag stream sequences ahead of the main consumer, so
	// that live input does not wait behind a backlog; it acknowledges
	// every other input unrecorded (the main consumer records each input
	// in any case). FreshAge below zero turns the lane off.
	FreshDurable string
	FreshAge     time.Duration
	FreshLag     int
}

// DefaultConfig returns the defaults documented in the README.
func DefaultConfig() Config {
	return Config{
		InputStream:    DefaultInputStream,
		Durable:        DefaultDurable,
		ObservationSub: DefaultObservationSub,
		ProvenanceSub:  DefaultProvenanceSub,
		DeadLetterSub:  DefaultDeadLetterSub,
		Window:         fhirmap.Window{Before: fhirmap.DefaultWindowBefore, After: fhirmap.DefaultWindowAfter},
		TemperatureWindow: fhirmap.Window{Before: fhirmap.DefaultTemperatureWindowBefore,
			After: fhirmap.DefaultTemperatureWindowAfter},
		Horizon:       14 * 24 * time.Hour,
		AckWait:       30 * time.Second,
		MaxAckPending: 256,
		Fetch:         64,
		RetryBase:     500 * time.Millisecond,
		RetryMax:      30 * time.Second,
		MaxDeliver:    -1,
		RelayInterval: 200 * time.Millisecond,
		StallAfter:    2 * time.Minute,
		FailingAfter:  time.Minute,
		FreshAge:      5 * time.Second,
		FreshLag:      512,
	}
}

// InputStreamConfig is the input stream the service expects (deploy/ holds
// the same definition for the deploy identity to create). The service does
// not create it in production; the demo and tests do.
func InputStreamConfig(name string) jetstream.StreamConfig {
	if name == "" {
		name = DefaultInputStream
	}
	return jetstream.StreamConfig{
		Name:     name,
		Subjects: []string{DefaultInputSubjects},
		Storage:  jetstream.FileStorage,
		// Limits retention: inputs stay for replay and reconciliation after
		// the service acknowledged them; PostgreSQL is the source of truth.
		Retention: jetstream.LimitsPolicy,
		MaxAge:    7 * 24 * time.Hour,
		// A gateway that retries a publish within this window is deduplicated
		// by Nats-Msg-Id; later repeats are caught by the inbox.
		Duplicates: 10 * time.Minute,
		MaxMsgSize: 1 << 20,
		Discard:    jetstream.DiscardOld,
	}
}

// OutputStreamConfig is the stream for derived Observations, Provenance and
// dead letters.
func OutputStreamConfig() jetstream.StreamConfig {
	return jetstream.StreamConfig{
		Name:      DefaultOutputStream,
		Subjects:  []string{DefaultOutputSubjects},
		Storage:   jetstream.FileStorage,
		Retention: jetstream.LimitsPolicy,
		MaxAge:    30 * 24 * time.Hour,
		// The outbox relay republishes with the same Nats-Msg-Id after a
		// crash; an hour covers any restart. The outbox's published mark
		// covers the rest.
		Duplicates: time.Hour,
		MaxMsgSize: 1 << 20,
		Discard:    jetstream.DiscardOld,
	}
}

// ConsumerConfig is the durable pull consumer the service creates or
// updates at start (and recreates if it is deleted).
func ConsumerConfig(c Config) jetstream.ConsumerConfig {
	return jetstream.ConsumerConfig{
		Durable:       c.Durable,
		Description:   "ventderive: derive CO2-elimination physiology from blood gases and ventilator data",
		DeliverPolicy: jetstream.DeliverAllPolicy,
		AckPolicy:     jetstream.AckExplicitPolicy,
		AckWait:       c.AckWait,
		MaxDeliver:    c.MaxDeliver,
		MaxAckPending: c.MaxAckPending,
		FilterSubject: DefaultInputSubjects,
		ReplayPolicy:  jetstream.ReplayInstantPolicy,
	}
}

// orDurable is the main durable's name, the default when unset.
func orDurable(d string) string {
	if d == "" {
		return DefaultDurable
	}
	return d
}

// FreshConsumerConfig is the fresh lane's durable pull consumer, created
// or updated beside the main one. It sees every input subject, as the main
// consumer does, from the moment it is first created (deliver new: a
// backlog already in the stream is the main consumer's), and acknowledges
// all up to a message with one ack (ack all): nothing depends on its
// acknowledgements, since the main consumer records every input.
func FreshConsumerConfig(c Config) jetstream.ConsumerConfig {
	durable := c.FreshDurable
	if durable == "" {
		durable = orDurable(c.Durable) + FreshSuffix
	}
	return jetstream.ConsumerConfig{
		Durable:       durable,
		Description:   "ventderive fresh lane: live input recorded ahead of a backlog (the main consumer records every input too)",
		DeliverPolicy: jetstream.DeliverNewPolicy,
		AckPolicy:     jetstream.AckAllPolicy,
		AckWait:       c.AckWait,
		MaxDeliver:    c.MaxDeliver,
		MaxAckPending: c.MaxAckPending,
		FilterSubject: DefaultInputSubjects,
		ReplayPolicy:  jetstream.ReplayInstantPolicy,
	}
}

// MinServerVersion is the oldest nats-server the service runs against. It
// needs 2.10: the consumer create-or-update API with its action field
// (CreateOrUpdateConsumer), a terminated message staying terminated (2.9.x
// servers were seen redelivering TermWithReason'd messages every 30 s), and
// the sync_interval setting deploy/nats/nats-server.conf uses for durable
// JetStream writes.
const MinServerVersion = "2.10.0"

// CheckServerVersion refuses a server older than MinServerVersion (v as the
// server's INFO reports it, e.g. "2.9.10" or "2.11.0-beta.1").
func CheckServerVersion(v string) error {
	got, ok := parseVersion(v)
	want, _ := parseVersion(MinServerVersion)
	if !ok {
		return fmt.Errorf("nats-server version %q is not a version; this service needs %s or later", v, MinServerVersion)
	}
	for i := range want {
		if got[i] != want[i] {
			if got[i] < want[i] {
				return fmt.Errorf("nats-server %s is older than %s, the oldest this service runs against: upgrade the server", v, MinServerVersion)
			}
			return nil
		}
	}
	return nil
}

// parseVersion reads "major.minor.patch", ignoring a "-pre" or "+build" suffix.
func parseVersion(v string) ([3]int, bool) {
	var out [3]int
	v = strings.TrimPrefix(v, "v")
	if i := strings.IndexAny(v, "-+"); i >= 0 {
		v = v[:i]
	}
	parts := strings.Split(v, ".")
	if len(parts) != 3 {
		return out, false
	}
	for i, p := range parts {
		n, err := strconv.Atoi(p)
		if err != nil || n < 0 {
			return out, false
		}
		out[i] = n
	}
	return out, true
}
