package consumer_test

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// testNATS is an in-process nats-server with JetStream on a fixed port and
// store, so that a test can restart it on the same data.
type testNATS struct {
	t         testing.TB
	dir       string
	port      int
	srv       *server.Server
	configure func(*server.Options) // e.g. users and permissions; nil: none
	user      string                // "user:password@" of the test's own connections, or ""
}

func startNATS(t testing.TB, configure func(*server.Options), user string) *testNATS {
	t.Helper()
	n := &testNATS{t: t, dir: t.TempDir(), port: freePort(t), configure: configure, user: user}
	n.start()
	t.Cleanup(n.stop)
	return n
}

func freePort(t testing.TB) int {
	t.Helper()
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port
}

func (n *testNATS) start() {
	n.t.Helper()
	opts := &server.Options{
		Host: "127.0.0.1", Port: n.port, JetStream: true, StoreDir: n.dir,
		NoLog: true, NoSigs: true,
	}
	if n.configure != nil {
		n.configure(opts)
	}
	srv, err := server.NewServer(opts)
	if err != nil {
		n.t.Fatalf("nats-server: %v", err)
	}
	srv.Start()
	if !srv.ReadyForConnections(10 * time.Second) {
		n.t.Fatal("nats-server not ready")
	}
	n.srv = srv
}

func (n *testNATS) stop() {
	if n.srv != nil {
		n.srv.Shutdown()
		n.srv.WaitForShutdown()
		n.srv = nil
	}
}

func (n *testNATS) restart() { n.stop(); n.start() }

func (n *testNATS) url() string { return fmt.Sprintf("nats://%s127.0.0.1:%d", n.user, n.port) }

// harness is one test's world: NATS, a migrated database, replicas.
type harness struct {
	t     *testing.T
	nats  *testNATS
	dbURL string
	pool  *pgxpool.Pool
	pub   *nats.Conn
	js    jetstream.JetStream
	cfg   consumer.Config
	site  fhirmap.Site
	codes *fhirmap.CodeTable // the replicas' code table and the offline derivation's; DefaultCodes unless a test sets it
	logs  *syncBuffer
	key   []byte

	mu       sync.Mutex
	replicas []*replica
	sent     map[string]bool   // inbox keys of every payload published
	metrics  *consumer.Metrics // for the next replica started; nil: unregistered metrics

	natsConfig  func(*server.Options) // users and permissions of the server, nil: none
	natsUser    string                // "user:password@" of the test's publisher
	replicaUser string                // "user:password@" of the replicas; "" means natsUser
}

type replica struct {
	p      *consumer.Pipeline
	nc     *nats.Conn
	pool   *pgxpool.Pool
	cancel context.CancelFunc
	done   chan error
}

type harnessOpt func(*harness)

func withDatabaseURL(url string) harnessOpt { return func(h *harness) { h.dbURL = url } }

// withNATSUsers configures the server's users; the test publishes as
// admin and the replicas connect as replica ("user:password@").
func withNATSUsers(configure func(*server.Options), admin, replica string) harnessOpt {
	return func(h *harness) { h.natsConfig, h.natsUser, h.replicaUser = configure, admin, replica }
}

func newHarness(t *testing.T, opts ...harnessOpt) *harness {
	t.Helper()
	h := &harness{t: t, logs: &syncBuffer{}, key: []byte("test-key-not-a-secret")}
	for _, o := range opts {
		o(h)
	}
	h.nats = startNATS(t, h.natsConfig, h.natsUser)
	if h.dbURL == "" {
		h.dbURL = pgtest.NewDatabase(t)
	}
	var err error
	h.pool, err = pgxpool.New(context.Background(), h.dbURL)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(h.pool.Close)
	h.pub = h.connect()
	h.js, err = jetstream.New(h.pub)
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	if _, err := h.js.CreateStream(ctx, consumer.InputStreamConfig("")); err != nil {
		t.Fatal(err)
	}
	if _, err := h.js.CreateStream(ctx, consumer.OutputStreamConfig()); err != nil {
		t.Fatal(err)
	}
	h.cfg = consumer.DefaultConfig()
	h.cfg.AckWait = 2 * time.Second
	h.cfg.RetryBase = 50 * time.Millisecond
	h.cfg.RetryMax = time.Second
	h.cfg.RelayInterval = 50 * time.Millisecond
	h.cfg.StallAfter = 5 * time.Second
	h.site = fhirmap.DefaultSite()
	h.site.ApparatusDeadSpaceML = 50
	h.site.ApparatusDeadSpaceConfigured = true
	h.codes = fhirmap.DefaultCodes()
	t.Cleanup(h.stopAll)
	t.Cleanup(func() {
		// On failure, show the service's warnings and errors (they carry no
		// payloads or identifiers, which assertNoPHI checks).
		if t.Failed() {
			for _, line := range strings.Split(h.logs.String(), "\n") {
				if strings.Contains(line, `"level":"WARN"`) || strings.Contains(line, `"level":"ERROR"`) {
					t.Log(line)
				}
			}
		}
	})
	return h
}

func (h *harness) connect() *nats.Conn { return h.connectURL(h.nats.url()) }

func (h *harness) connectURL(url string) *nats.Conn {
	h.t.Helper()
	log := slog.New(slog.NewJSONHandler(h.logs, nil))
	nc, err := nats.Connect(url, nats.MaxReconnects(-1), nats.ReconnectWait(100*time.Millisecond),
		nats.RetryOnFailedConnect(true),
		nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) { log.Warn("nats async error", "err", err) }))
	if err != nil {
		h.t.Fatal(err)
	}
	h.t.Cleanup(nc.Close)
	return nc
}

// startReplica starts one pipeline with its own connections.
func (h *harness) startReplica(hooks *consumer.Hooks) *replica {
	h.t.Helper()
	pool, err := pgxpool.New(context.Background(), h.dbURL)
	if err != nil {
		h.t.Fatal(err)
	}
	url := h.nats.url()
	if h.replicaUser != "" {
		url = fmt.Sprintf("nats://%s127.0.0.1:%d", h.replicaUser, h.nats.port)
	}
	nc := h.connectURL(url)
	log := slog.New(slog.NewJSONHandler(h.logs, &slog.HandlerOptions{Level: slog.LevelDebug}))
	store := postgres.New(pool, postgres.Options{PatientKey: h.key, Logger: log})
	p, err := consumer.New(nc, store, consumer.Options{
		Config: h.cfg, Site: h.site, Codes: h.codes, Logger: log, Hooks: hooks, Workers: 4, Metrics: h.metrics,
	})
	if err != nil {
		h.t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	r := &replica{p: p, nc: nc, pool: pool, cancel: cancel, done: make(chan error, 1)}
	go func() { r.done <- p.Run(ctx) }()
	h.mu.Lock()
	h.replicas = append(h.replicas, r)
	h.mu.Unlock()
	return r
}

// stop shuts a replica down gracefully, as SIGTERM would.
func (r *replica) stop(t testing.TB) {
	t.Helper()
	if r.cancel == nil {
		return
	}
	r.cancel()
	r.cancel = nil
	select {
	case err := <-r.done:
		if err != nil {
			t.Errorf("replica: %v", err)
		}
	case <-time.After(30 * time.Second):
		t.Error("replica did not stop within 30 s")
	}
	r.nc.Close()
	r.pool.Close()
}

func (h *harness) stopAll() {
	h.mu.Lock()
	rs := slices.Clone(h.replicas)
	h.mu.Unlock()
	for _, r := range rs {
		r.stop(h.t)
	}
}

// testMsg is one input message.
type testMsg struct {
	subject string
	msgID   string
	payload []byte
	poison  string // expected dead-letter reason, "" for good input
}

// publish sends messages with their message ids and waits for every PubAck.
func (h *harness) publish(msgs []testMsg) {
	h.t.Helper()
	for _, m := range msgs {
		h.mu.Lock()
		if h.sent == nil {
			h.sent = map[string]bool{}
		}
		h.sent[inboxKey(m.payload)] = true
		h.mu.Unlock()
		nm := nats.NewMsg(m.subject)
		nm.Data = m.payload
		var opts []jetstream.PublishOpt
		if m.msgID != "" {
			opts = append(opts, jetstream.WithMsgID(m.msgID))
		}
		ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
		_, err := h.js.PublishMsg(ctx, nm, opts...)
		cancel()
		if err != nil {
			h.t.Fatalf("publish: %v", err)
		}
	}
}

// waitSettled waits until the consumer has nothing pending or in flight and
// the outbox is empty.
func (h *harness) waitSettled(timeout time.Duration) {
	h.t.Helper()
	deadline := time.Now().Add(timeout)
	ctx := context.Background()
	for {
		info, err := h.js.Consumer(ctx, consumer.DefaultInputStream, h.cfg.Durable)
		var pending, ackPending uint64
		if err == nil {
			ci, err := info.Info(ctx)
			if err == nil {
				pending, ackPending = ci.NumPending, uint64(ci.NumAckPending)
			} else {
				pending = 1
			}
		} else {
			pending = 1
		}
		// Every distinct payload published must be recorded (inbox) or
		// dead-lettered: the consumer's counters alone can read zero for a
		// moment while a message is between the server and the replica.
		var backlog, recorded int64 = 1, 0
		_ = h.pool.QueryRow(ctx, `SELECT (SELECT count(*) FROM outbox WHERE published_at IS NULL),
			(SELECT count(*) FROM inbox) + (SELECT count(*) FROM dead_letter)`).Scan(&backlog, &recorded)
		h.mu.Lock()
		want := int64(len(h.sent))
		h.mu.Unlock()
		if pending == 0 && ackPending == 0 && backlog == 0 && recorded >= want {
			return
		}
		if time.Now().After(deadline) {
			h.t.Fatalf("not settled after %s: pending %d, ack pending %d, outbox backlog %d, recorded %d of %d distinct inputs",
				timeout, pending, ackPending, backlog, recorded, want)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// outputMsg is one message read back from the output stream.
type outputMsg struct {
	subject string
	msgID   string
	data    []byte
}

// readOutput reads the whole output stream with an ordered consumer.
func (h *harness) readOutput() []outputMsg {
	h.t.Helper()
	ctx := context.Background()
	s, err := h.js.Stream(ctx, consumer.DefaultOutputStream)
	if err != nil {
		h.t.Fatal(err)
	}
	info, err := s.Info(ctx)
	if err != nil {
		h.t.Fatal(err)
	}
	n := int(info.State.Msgs)
	if n == 0 {
		return nil
	}
	c, err := s.OrderedConsumer(ctx, jetstream.OrderedConsumerConfig{})
	if err != nil {
		h.t.Fatal(err)
	}
	var out []outputMsg
	for len(out) < n {
		batch, err := c.Fetch(min(n-len(out), 500), jetstream.FetchMaxWait(5*time.Second))
		if err != nil {
			h.t.Fatal(err)
		}
		got := 0
		for m := range batch.Messages() {
			out = append(out, outputMsg{subject: m.Subject(), msgID: m.Headers().Get(jetstream.MsgIDHeader), data: m.Data()})
			got++
		}
		if got == 0 {
			h.t.Fatalf("output stream: read %d of %d", len(out), n)
		}
	}
	return out
}

// headState is the final state of one derivation key.
type headState struct {
	refused bool
	reason  string // for refusals
	status  string
	value   float64
}

// heads reads the final state of every derivation key from the store.
func (h *harness) heads() map[string]headState {
	h.t.Helper()
	rows, err := h.pool.Query(context.Background(), `
		SELECT h.key, h.refused, coalesce(r.reason, ''), coalesce(d.status, ''), coalesce(d.value, 0)
		FROM head h
		LEFT JOIN refusal r ON r.id = h.refusal_id
		LEFT JOIN derivation d ON d.id = h.derivation_id`)
	if err != nil {
		h.t.Fatal(err)
	}
	defer rows.Close()
	out := map[string]headState{}
	for rows.Next() {
		var k string
		var s headState
		if err := rows.Scan(&k, &s.refused, &s.reason, &s.status, &s.value); err != nil {
			h.t.Fatal(err)
		}
		out[k] = s
	}
	if err := rows.Err(); err != nil {
		h.t.Fatal(err)
	}
	return out
}

// expectedHeads runs the offline derivation over every good input: the
// service's final state must equal it whatever the order of arrival.
func expectedHeads(t testing.TB, site fhirmap.Site, msgs []testMsg) map[string]headState {
	t.Helper()
	return expectedHeadsWith(t, site, fhirmap.DefaultCodes(), msgs)
}

// expectedHeadsWith is expectedHeads with the code table of the replicas.
func expectedHeadsWith(t testing.TB, site fhirmap.Site, codes *fhirmap.CodeTable, msgs []testMsg) map[string]headState {
	t.Helper()
	var facts []fhirmap.Fact
	for _, m := range msgs {
		if m.poison != "" {
			continue
		}
		d, err := fhirmap.Decode(m.payload, codes)
		if err != nil {
			t.Fatalf("test input does not decode: %v", err)
		}
		facts = append(facts, d.Facts...)
	}
	derived, refused := fhirmap.DeriveAll(facts, site)
	out := map[string]headState{}
	for _, d := range derived {
		out[d.Key] = headState{status: string(d.Status), value: d.Result.Value}
	}
	for _, r := range refused {
		out[r.Key] = headState{refused: true, reason: r.Reason}
	}
	return out
}

// compareHeads checks the service's final state against the offline run.
// Status is compared as valid-or-retracted: "amended" and "final" differ only
// by whether an earlier version was published, which depends on order.
func compareHeads(t testing.TB, got, want map[string]headState) {
	t.Helper()
	for k, w := range want {
		g, ok := got[k]
		if !ok {
			t.Errorf("missing derivation key %s", k)
			continue
		}
		if g.refused != w.refused || g.reason != w.reason {
			t.Errorf("%s: refused=%v reason=%q, want refused=%v reason=%q", k, g.refused, g.reason, w.refused, w.reason)
			continue
		}
		if !w.refused && (math.Abs(g.value-w.value) > 1e-9*math.Max(1, math.Abs(w.value)) || g.status == string(fhirmap.StatusEnteredInError)) {
			t.Errorf("%s: value %v status %s, want %v (valid)", k, g.value, g.status, w.value)
		}
	}
	for k, g := range got {
		if _, ok := want[k]; !ok && !(g.status == string(fhirmap.StatusEnteredInError) || g.refused) {
			t.Errorf("unexpected valid derivation %s", k)
		}
	}
}

// reconcile checks, after settling, that nothing was lost or duplicated:
// every good input is in the inbox once, every poison input is a dead
// letter once, every derivation version was published exactly once, and
// the final state equals the offline derivation.
func (h *harness) reconcile(msgs []testMsg) {
	h.t.Helper()
	ctx := context.Background()
	good, poison := map[string]bool{}, map[string]bool{}
	for _, m := range msgs {
		k := inboxKey(m.payload)
		if m.poison != "" {
			poison[k] = true
		} else {
			good[k] = true
		}
	}
	var inbox, dead, versions, refusalsWithoutHead int
	q := func(sql string, dst *int) {
		if err := h.pool.QueryRow(ctx, sql).Scan(dst); err != nil {
			h.t.Fatalf("%s: %v", sql, err)
		}
	}
	q(`SELECT count(*) FROM inbox`, &inbox)
	q(`SELECT count(*) FROM dead_letter`, &dead)
	q(`SELECT count(*) FROM derivation`, &versions)
	q(`SELECT count(*) FROM refusal r WHERE NOT EXISTS (SELECT 1 FROM head h WHERE h.key = r.key)`, &refusalsWithoutHead)
	if inbox != len(good) {
		h.t.Errorf("inbox holds %d messages, sent %d distinct good ones", inbox, len(good))
	}
	if dead != len(poison) {
		h.t.Errorf("dead letters: %d, sent %d distinct poison ones", dead, len(poison))
	}
	if refusalsWithoutHead != 0 {
		h.t.Errorf("%d refusals have no head", refusalsWithoutHead)
	}

	out := h.readOutput()
	ids := map[string]int{}
	var observations, provenance, deadLetters int
	for _, m := range out {
		ids[m.msgID]++
		switch m.subject {
		case h.cfg.ObservationSub:
			observations++
		case h.cfg.ProvenanceSub:
			provenance++
		case h.cfg.DeadLetterSub:
			deadLetters++
		}
	}
	for id, n := range ids {
		if n > 1 {
			h.t.Errorf("output message %s published %d times", id, n)
		}
	}
	if observations != versions || provenance != versions {
		h.t.Errorf("published %d observations and %d provenance for %d derivation versions", observations, provenance, versions)
	}
	if deadLetters != len(poison) {
		h.t.Errorf("dead-letter subject got %d, want %d", deadLetters, len(poison))
	}
	heads := h.heads()
	var valid, refused, retracted int
	for _, s := range heads {
		switch {
		case s.refused:
			refused++
		case s.status == string(fhirmap.StatusEnteredInError):
			retracted++
		default:
			valid++
		}
	}
	h.t.Logf("reconciled: %d inputs, %d dead letters, %d derivation versions, heads: %d valid, %d refused, %d retracted; %d output messages",
		inbox, dead, versions, valid, refused, retracted, len(out))
	compareHeads(h.t, heads, expectedHeadsWith(h.t, h.site, h.codes, msgs))
	if versions == 0 && len(good) > 0 {
		h.t.Error("nothing was derived")
	}
}

// syncBuffer collects logs from several goroutines.
type syncBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *syncBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *syncBuffer) String() string {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}

var _ io.Writer = (*syncBuffer)(nil)

// mustJSON marshals test fixtures.
func mustJSON(v any) []byte {
	b, err := json.Marshal(v)
	if err != nil {
		panic(err)
	}
	return b
}
