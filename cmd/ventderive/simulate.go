package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"maps"
	"slices"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/scenario"
	"github.com/ventderive/ventderive/consumer"
)

func init() {
	register(command{
		name:    "simulate",
		summary: "publish the invented ICU scenario to a NATS server (integration testing)",
		run:     runSimulate,
	})
}

// simulateConfig is the resolved configuration of simulate.
type simulateConfig struct {
	natsURL   string
	creds     string
	tlsCA     string
	tlsCert   string
	tlsKey    string
	seed      int64
	start     string
	duration  time.Duration
	ventEvery time.Duration
	speed     float64
	prefix    string
	dryRun    bool
	window    int
}

func runSimulate(ctx context.Context, args []string, e env) error {
	fs := flag.NewFlagSet("simulate", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	var c simulateConfig
	defURL := e.getenv("VENTDERIVE_NATS_URL")
	if defURL == "" {
		defURL = nats.DefaultURL
	}
	fs.StringVar(&c.natsURL, "nats-url", defURL, "NATS server URL(s), comma-separated; user:password@ allowed (env VENTDERIVE_NATS_URL)")
	fs.StringVar(&c.creds, "creds", "", "NATS credentials file (user JWT and seed) of an identity that may publish the input subjects")
	fs.StringVar(&c.tlsCA, "nats-tls-ca", "", "CA certificate file for the NATS server")
	fs.StringVar(&c.tlsCert, "nats-tls-cert", "", "client certificate file for NATS (mutual TLS)")
	fs.StringVar(&c.tlsKey, "nats-tls-key", "", "client key file for NATS (mutual TLS)")
	fs.Int64Var(&c.seed, "seed", 1, "scenario seed: the same seed sends the same bytes")
	fs.StringVar(&c.start, "start", "", "simulated start, RFC 3339 with zone (default "+scenario.DefaultStart.Format(time.RFC3339)+")")
	fs.DurationVar(&c.duration, "duration", scenario.DefaultDuration, "simulated span (at least 6h)")
	fs.DurationVar(&c.ventEvery, "vent-every", scenario.DefaultVentEvery, "interval of ventilator readings (1s to 10m)")
	fs.Float64Var(&c.speed, "speed", 0, "simulated seconds per real second; 0 sends as fast as the server acknowledges")
	fs.StringVar(&c.prefix, "subject-prefix", scenario.DefaultSubjectPrefix, "subject prefix: messages go to <prefix>.lab, <prefix>.device, <prefix>.adt")
	fs.BoolVar(&c.dryRun, "dry-run", false, "print what would be sent as NDJSON on standard output; connect to nothing")
	fs.IntVar(&c.window, "window", 256, "most publishes awaiting their acknowledgement at once")
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return nil
		}
		return fmt.Errorf("%w: %w", errUsage, err)
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(e.stderr, "simulate: unexpected arguments %q\n", fs.Args())
		return errUsage
	}
	opts, err := c.options()
	if err != nil {
		fmt.Fprintln(e.stderr, "simulate:", err)
		return fmt.Errorf("%w: %w", errUsage, err)
	}

	log := slog.New(slog.NewTextHandler(e.stderr, nil))
	sc := scenario.Generate(opts)
	if c.dryRun {
		return dryRun(e.stdout, sc, c.prefix)
	}
	log.Info("simulate", "nats_url", maskURL(c.natsURL), "creds", c.creds, "tls_ca", c.tlsCA,
		"seed", c.seed, "start", sc.Start.Format(time.RFC3339), "duration", sc.Duration.String(),
		"vent_every", c.ventEvery.String(), "speed", c.speed, "subject_prefix", c.prefix,
		"messages", len(sc.Messages), "patients", len(sc.Patients))

	nc, err := c.connect()
	if err != nil {
		return err
	}
	defer nc.Close()
	res, err := publishScenario(ctx, nc, sc, c, log)
	fmt.Fprintf(e.stdout, "simulate: %s, %s: %d messages, %d stored, %d duplicates, %d failed, in %s\n",
		sc.Hospital, sc.Unit, len(sc.Messages), res.stored, res.duplicates, res.failed, res.elapsed.Round(time.Millisecond))
	for _, s := range slices.Sorted(maps.Keys(res.bySubject)) {
		fmt.Fprintf(e.stdout, "  %-24s %d\n", s, res.bySubject[s])
	}
	if err != nil {
		return err
	}
	return nc.Drain()
}

// options checks the flags and turns them into scenario options.
func (c simulateConfig) options() (scenario.Options, error) {
	o := scenario.Options{Seed: c.seed, Duration: c.duration, VentEvery: c.ventEvery}
	if c.start != "" {
		t, err := time.Parse(time.RFC3339, c.start)
		if err != nil {
			return o, fmt.Errorf("start: %w", err)
		}
		o.Start = t
	}
	if c.duration < scenario.MinDuration {
		return o, fmt.Errorf("duration %s below %s", c.duration, scenario.MinDuration)
	}
	if c.ventEvery < time.Second || c.ventEvery > 10*time.Minute {
		return o, fmt.Errorf("vent-every %s outside 1s..10m", c.ventEvery)
	}
	if c.speed < 0 {
		return o, fmt.Errorf("speed %g below 0", c.speed)
	}
	if c.window < 1 {
		return o, fmt.Errorf("window %d below 1", c.window)
	}
	if !validPrefix(c.prefix) {
		return o, fmt.Errorf("subject prefix %q: want dot-separated tokens without wildcards or spaces", c.prefix)
	}
	return o, nil
}

// validPrefix accepts a NATS subject usable as a literal prefix.
func validPrefix(p string) bool {
	if p == "" {
		return false
	}
	for _, tok := range strings.Split(p, ".") {
		if tok == "" || tok == "*" || tok == ">" || strings.ContainsAny(tok, " \t\r\n*>") {
			return false
		}
	}
	return true
}

// subjectFor moves a scenario subject under prefix.
func subjectFor(s, prefix string) string {
	return prefix + strings.TrimPrefix(s, scenario.DefaultSubjectPrefix)
}

// dryRunLine is one NDJSON line of --dry-run. Payload holds the FHIR JSON
// as is; a malformed payload that is not JSON goes to PayloadText instead.
type dryRunLine struct {
	At          string          `json:"at"`
	Subject     string          `json:"subject"`
	MsgID       string          `json:"msg_id"`
	Patient     string          `json:"patient"`
	Malformed   bool            `json:"malformed,omitempty"`
	Reason      string          `json:"dead_letter_reason,omitempty"`
	Payload     json.RawMessage `json:"payload,omitempty"`
	PayloadText string          `json:"payload_text,omitempty"`
}

func dryRun(w io.Writer, sc scenario.Scenario, prefix string) error {
	enc := json.NewEncoder(w)
	for _, m := range sc.Messages {
		l := dryRunLine{At: m.At.Format(time.RFC3339), Subject: subjectFor(m.Subject, prefix), MsgID: m.MsgID,
			Patient: m.Patient, Malformed: m.Malformed, Reason: m.DeadLetterReason}
		if json.Valid(m.Payload) {
			l.Payload = m.Payload
		} else {
			l.PayloadText = string(m.Payload)
		}
		if err := enc.Encode(l); err != nil {
			return fmt.Errorf("write dry run: %w", err)
		}
	}
	return nil
}

// connect opens the NATS connection. Unlike serve it does not retry a failed
// first connection: an operator running simulate wants to know at once.
func (c simulateConfig) connect() (*nats.Conn, error) {
	opts := []nats.Option{nats.Name("ventderive-simulate"), nats.MaxReconnects(-1), nats.ReconnectWait(time.Second)}
	auth, err := natsAuth(c.creds, c.tlsCA, c.tlsCert, c.tlsKey)
	if err != nil {
		return nil, err
	}
	opts = append(opts, auth...)
	nc, err := nats.Connect(c.natsURL, opts...)
	if err != nil {
		return nil, fmt.Errorf("connect nats: %w", err)
	}
	return nc, nil
}

// publishResult counts what the server acknowledged.
type publishResult struct {
	stored     int // new messages in the stream
	duplicates int // acknowledged as duplicates of an earlier Nats-Msg-Id
	failed     int
	bySubject  map[string]int // acknowledged, by subject
	elapsed    time.Duration
}

// publishScenario publishes every message with its deterministic message id,
// at most c.window awaiting acknowledgement, paced by c.speed, and waits for
// every acknowledgement. A republish within the stream's duplicate window is
// acknowledged as a duplicate and not stored again.
func publishScenario(ctx context.Context, nc *nats.Conn, sc scenario.Scenario, c simulateConfig, log *slog.Logger) (publishResult, error) {
	res := publishResult{bySubject: map[string]int{}}
	js, err := jetstream.New(nc, jetstream.WithPublishAsyncMaxPending(c.window), jetstream.WithPublishAsyncTimeout(30*time.Second))
	if err != nil {
		return res, fmt.Errorf("jetstream: %w", err)
	}
	type pending struct {
		f       jetstream.PubAckFuture
		subject string
	}
	var queue []pending
	var firstErr error
	settle := func(p pending, ack *jetstream.PubAck, err error) {
		if err != nil {
			res.failed++
			if firstErr == nil {
				firstErr = fmt.Errorf("publish %s: %w", p.subject, err)
				if errors.Is(err, jetstream.ErrNoStreamResponse) {
					firstErr = fmt.Errorf("publish %s: no stream captures the subject (create %s from deploy/nats/streams): %w",
						p.subject, consumer.DefaultInputStream, err)
				}
			}
			return
		}
		res.bySubject[p.subject]++
		if ack.Duplicate {
			res.duplicates++
		} else {
			res.stored++
		}
	}
	// drain settles acknowledged publishes from the front of the queue;
	// with block it waits for all of them.
	drain := func(block bool) {
		for len(queue) > 0 {
			p := queue[0]
			select {
			case ack := <-p.f.Ok():
				settle(p, ack, nil)
			case err := <-p.f.Err():
				settle(p, nil, err)
			default:
				if !block {
					return
				}
				select {
				case ack := <-p.f.Ok():
					settle(p, ack, nil)
				case err := <-p.f.Err():
					settle(p, nil, err)
				}
			}
			queue = queue[1:]
		}
	}

	began := time.Now()
	progressEvery := max(len(sc.Messages)/10, 1)
	var ctxErr error
	for i, m := range sc.Messages {
		if c.speed > 0 {
			due := began.Add(time.Duration(float64(m.At.Sub(sc.Start)) / c.speed))
			if err := sleepUntil(ctx, due); err != nil {
				ctxErr = err
				break
			}
		} else if err := ctx.Err(); err != nil {
			ctxErr = err
			break
		}
		msg := nats.NewMsg(subjectFor(m.Subject, c.prefix))
		msg.Data = m.Payload
		msg.Header.Set(consumer.HeaderContentType, consumer.FHIRContentType)
		f, err := js.PublishMsgAsync(msg, jetstream.WithMsgID(m.MsgID), jetstream.WithStallWait(30*time.Second))
		if err != nil {
			res.failed++
			if firstErr == nil {
				firstErr = fmt.Errorf("publish %s: %w", msg.Subject, err)
			}
			break
		}
		queue = append(queue, pending{f: f, subject: msg.Subject})
		drain(false)
		if (i+1)%progressEvery == 0 {
			log.Info("simulate progress", "sent", i+1, "of", len(sc.Messages), "simulated", m.At.Format(time.RFC3339))
		}
	}
	drain(true)
	res.elapsed = time.Since(began)
	switch {
	case firstErr != nil:
		return res, fmt.Errorf("%d of %d messages not acknowledged: %w", len(sc.Messages)-res.stored-res.duplicates, len(sc.Messages), firstErr)
	case ctxErr != nil:
		return res, fmt.Errorf("interrupted after %d of %d messages: %w", res.stored+res.duplicates, len(sc.Messages), ctxErr)
	}
	return res, nil
}

func sleepUntil(ctx context.Context, t time.Time) error {
	d := time.Until(t)
	if d <= 0 {
		return ctx.Err()
	}
	tm := time.NewTimer(d)
	defer tm.Stop()
	select {
	case <-ctx.Done():
		return ctx.Err()
	case <-tm.C:
		return nil
	}
}
