package consumer_test

import (
	"context"
	"fmt"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/nats-io/nats-server/v2/server"
	"github.com/prometheus/client_golang/prometheus"
	dto "github.com/prometheus/client_model/go"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/migrations"
)

// deepPoison is an Observation with an unknown field at the bottom of an
// extension nested levels deep (twice as many JSON levels): the decoder's
// field path of it was once longer than JetStream allows for a header.
func deepPoison(i, levels int) testMsg {
	ext := strings.Repeat(`{"url":"http://example.org/x","extension":[`, levels-1) +
		`{"url":"http://example.org/x","notAnElement":1}` + strings.Repeat(`]}`, levels-1)
	raw := fmt.Sprintf(`{"resourceType":"Observation","id":"t-bad-deep-%d","status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"subject":{"reference":"%s"},`+
		`"effectiveDateTime":"2026-11-20T08:00:00Z","extension":[%s]}`, i, patientRef(900), ext)
	return testMsg{subject: "fhir.input.lab", payload: []byte(raw), poison: "too-deep"}
}

// interleave puts one bad message before the good ones, the rest after.
func interleave(bad, good []testMsg) []testMsg {
	return append(append(append([]testMsg{}, bad[:1]...), good...), bad[1:]...)
}

// More deeply nested poison messages than the consumer's in-flight limit:
// each is dead-lettered once with a bounded detail and its copy, and the
// good input behind them is processed.
func TestPoisonDeepNestingDoesNotHaltIntake(t *testing.T) {
	h := newHarness(t)
	h.cfg.MaxAckPending = 8
	var bad []testMsg
	for i := range 12 {
		bad = append(bad, deepPoison(i, 4900))
	}
	msgs := interleave(bad, generate(genOpts{patients: 2, gases: 1}))
	r := h.startReplica(nil)
	h.publish(msgs)
	h.waitSettled(120 * time.Second)
	h.reconcile(msgs)
	h.assertDeadLetters(len(bad), "too-deep", "")
	h.waitReady(r)
	assertNoPHI(t, h.logs.String())
}

// A dead-letter copy that can never be published (here: no stream takes
// the subject) must not bring the message back forever: after a few
// deliveries it is recorded, saying the copy is missing, and terminated,
// and intake goes on although there are more such messages than the
// in-flight limit.
func TestDeadLetterCopyUnpublishable(t *testing.T) {
	h := newHarness(t)
	h.cfg.MaxAckPending = 4
	h.cfg.DeadLetterSub = "nostream.deadletter"
	bad := poisonMsgs()
	bad = append(bad, deepPoison(1, 3), deepPoison(2, 3))
	good := generate(genOpts{patients: 2, gases: 1})
	msgs := interleave(bad, good)
	r := h.startReplica(nil)
	h.publish(msgs)
	h.waitSettled(120 * time.Second)

	var inbox int
	if err := h.pool.QueryRow(context.Background(), `SELECT count(*) FROM inbox`).Scan(&inbox); err != nil {
		t.Fatal(err)
	}
	if inbox != len(good) {
		t.Errorf("inbox holds %d, want the %d good inputs", inbox, len(good))
	}
	h.assertDeadLetters(len(bad), "", "copy not published")
	compareHeads(t, h.heads(), expectedHeads(t, h.site, msgs))
	if ci := h.consumerInfo(); ci.NumAckPending != 0 || ci.NumPending != 0 {
		t.Errorf("consumer: %d pending, %d ack pending; want none", ci.NumPending, ci.NumAckPending)
	}
	h.waitReady(r)
	assertNoPHI(t, h.logs.String())
}

// assertDeadLetters checks the dead-letter table: n rows, each detail at
// most consumer.MaxDetailBytes, the reason (when given) and a part of the
// detail (when given).
func (h *harness) assertDeadLetters(n int, reason, inDetail string) {
	h.t.Helper()
	rows, err := h.pool.Query(context.Background(), `SELECT reason, detail FROM dead_letter`)
	if err != nil {
		h.t.Fatal(err)
	}
	defer rows.Close()
	got := 0
	for rows.Next() {
		var r, d string
		if err := rows.Scan(&r, &d); err != nil {
			h.t.Fatal(err)
		}
		got++
		if len(d) > consumer.MaxDetailBytes {
			h.t.Errorf("dead letter %s: detail of %d bytes, want at most %d", r, len(d), consumer.MaxDetailBytes)
		}
		if reason != "" && r != reason {
			h.t.Errorf("dead letter reason %q, want %q", r, reason)
		}
		if inDetail != "" && !strings.Contains(d, inDetail) {
			h.t.Errorf("dead letter %s: detail %q lacks %q", r, d, inDetail)
		}
	}
	if err := rows.Err(); err != nil {
		h.t.Fatal(err)
	}
	if got != n {
		h.t.Errorf("%d dead letters, want %d", got, n)
	}
}

// ownCluster starts a throwaway PostgreSQL cluster (never the shared
// server: the test reconfigures it), migrated, and returns its admin URL.
func ownCluster(t *testing.T) *pgtest.Cluster {
	t.Helper()
	ctx := context.Background()
	cluster, err := pgtest.StartCluster(ctx, t.TempDir())
	if err != nil {
		pgtest.NoServer(t, err)
	}
	t.Cleanup(func() { _ = cluster.Close() })
	pool, err := pgxpool.New(ctx, cluster.URL())
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	if _, err := migrations.Apply(ctx, pool, nil); err != nil {
		t.Fatal(err)
	}
	return cluster
}

// setReadOnly makes every new transaction of the cluster read-only, as a
// primary demoted in a failover (or default_transaction_read_only) does.
func (h *harness) setReadOnly(on bool) {
	h.t.Helper()
	ctx := context.Background()
	if _, err := h.pool.Exec(ctx, fmt.Sprintf(`ALTER SYSTEM SET default_transaction_read_only = %v`, on)); err != nil {
		h.t.Fatal(err)
	}
	if _, err := h.pool.Exec(ctx, `SELECT pg_reload_conf()`); err != nil {
		h.t.Fatal(err)
	}
}

// waitLog waits until the captured logs contain s.
func (h *harness) waitLog(s string, timeout time.Duration) {
	h.t.Helper()
	deadline := time.Now().Add(timeout)
	for !strings.Contains(h.logs.String(), s) {
		if time.Now().After(deadline) {
			h.t.Fatalf("no log line with %q within %s", s, timeout)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// A read-only PostgreSQL (SQLSTATE 25006) under load is transient: the
// inputs are retried with back-off, none becomes a dead letter, readiness
// reports the stalled intake and the dead letters that cannot be recorded,
// and everything reconciles once the server takes writes again.
func TestFaultPostgresReadOnly(t *testing.T) {
	cluster := ownCluster(t)
	h := newHarness(t, withDatabaseURL(cluster.URL()))
	h.cfg.StallAfter = 2 * time.Second
	h.cfg.FailingAfter = time.Second
	good := generate(genOpts{patients: 4, gases: 3})
	msgs := append(good[:len(good)/3:len(good)/3], poisonMsgs()...)
	msgs = append(msgs, good[len(good)/3:]...)
	r := h.startReplica(nil)
	h.publish(good[:len(good)/3])
	h.setReadOnly(true)
	h.publish(msgs[len(good)/3:])
	h.waitLog("postgres error 25006", 60*time.Second) // the read-only state was met
	ctx := context.Background()
	deadline := time.Now().Add(60 * time.Second)
	for {
		got := r.p.Ready(ctx)
		if got["intake"] != "" && got["dead-letter"] != "" {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("readiness %v with PostgreSQL read-only: want intake and dead-letter named", got)
		}
		time.Sleep(100 * time.Millisecond)
	}
	h.setReadOnly(false)
	h.waitSettled(120 * time.Second)
	h.reconcile(msgs) // only the poison inputs are dead letters
	if strings.Contains(h.logs.String(), "store refused message") {
		t.Error("a valid input was refused as if its content were at fault")
	}
	h.waitReady(r)
}

// waitReady waits until the replica reports ready (the relay and the
// watchdog notice recovery on their next round).
func (h *harness) waitReady(r *replica) {
	h.t.Helper()
	deadline := time.Now().Add(90 * time.Second)
	for got := r.p.Ready(context.Background()); len(got) != 0; got = r.p.Ready(context.Background()) {
		if time.Now().After(deadline) {
			h.t.Fatalf("not ready 30 s after recovery: %v", got)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

// deniedObservations is a server whose replica user may not publish to the
// default observation subject (everything else allowed); admin may do all.
func deniedObservations(o *server.Options) {
	o.Users = []*server.User{
		{Username: "admin", Password: "admin-test-only"},
		{Username: "svc", Password: "svc-test-only", Permissions: &server.Permissions{
			Publish: &server.SubjectPermission{Deny: []string{consumer.DefaultObservationSub}},
		}},
	}
}

// metricValue reads a counter's or gauge's value.
func metricValue(t *testing.T, c prometheus.Collector) float64 {
	t.Helper()
	ch := make(chan prometheus.Metric, 1)
	c.Collect(ch)
	var d dto.Metric
	if err := (<-ch).Write(&d); err != nil {
		t.Fatal(err)
	}
	if d.Gauge != nil {
		return d.Gauge.GetValue()
	}
	return d.Counter.GetValue()
}

// outputCounts counts the output stream's messages by subject.
func (h *harness) outputCounts() map[string]int {
	h.t.Helper()
	n := map[string]int{}
	for _, m := range h.readOutput() {
		n[m.subject]++
	}
	return n
}

// The NATS permissions deny the observation subject: a publish there gets
// no acknowledgement. The relay gives up on it after its deadline, says
// why, keeps the backlog gauge true and turns readiness to "relay", and
// still publishes the provenance rows behind the stuck ones (more stuck rows
// than one relay page). A replica started with a corrected observation
// subject publishes the rows written before the change to the new subject.
func TestRelayDeniedSubject(t *testing.T) {
	h := newHarness(t, withNATSUsers(deniedObservations, "admin:admin-test-only@", "svc:svc-test-only@"))
	h.cfg.FailingAfter = time.Second
	h.metrics = consumer.NewMetrics(prometheus.NewRegistry())
	msgs := generate(genOpts{patients: 12, gases: 4})
	r := h.startReplica(nil)
	h.publish(msgs)

	ctx := context.Background()
	var versions int
	deadline := time.Now().Add(120 * time.Second)
	for {
		if err := h.pool.QueryRow(ctx, `SELECT count(*) FROM derivation`).Scan(&versions); err != nil {
			t.Fatal(err)
		}
		var inbox int
		_ = h.pool.QueryRow(ctx, `SELECT count(*) FROM inbox`).Scan(&inbox)
		provenance := h.outputCounts()[consumer.DefaultProvenanceSub]
		if inbox == len(msgs) && provenance == versions && versions > 0 {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("after 120 s: %d of %d inputs recorded, %d provenance of %d versions published", inbox, len(msgs), provenance, versions)
		}
		time.Sleep(200 * time.Millisecond)
	}
	if versions <= 256 {
		t.Fatalf("only %d derivation versions: the stuck rows must fill more than one relay page", versions)
	}
	if got := h.outputCounts()[consumer.DefaultObservationSub]; got != 0 {
		t.Fatalf("%d observations published to a denied subject", got)
	}
	h.waitLog("no acknowledgement within", 60*time.Second)
	deadline = time.Now().Add(60 * time.Second)
	for r.p.Ready(ctx)["relay"] == "" {
		if time.Now().After(deadline) {
			t.Fatalf("readiness %v: want relay named", r.p.Ready(ctx))
		}
		time.Sleep(100 * time.Millisecond)
	}
	if got := r.p.Ready(ctx)["relay"]; !strings.Contains(got, "ermissions") {
		t.Errorf("relay reason %q does not name the permissions violation", got)
	}
	for b := metricValue(t, h.metrics.OutboxBacklog); int(b) != versions; b = metricValue(t, h.metrics.OutboxBacklog) {
		if time.Now().After(deadline) {
			t.Fatalf("backlog gauge %v while %d observations wait", b, versions)
		}
		time.Sleep(100 * time.Millisecond)
	}
	if metricValue(t, h.metrics.RelayFailing) != 1 {
		t.Error("relay failing gauge is not 1")
	}
	if metricValue(t, h.metrics.Published) != float64(versions) {
		t.Errorf("published_total %v, want the %d provenance rows", metricValue(t, h.metrics.Published), versions)
	}
	r.stop(t)

	// The operator corrects the subject (one the permissions allow).
	h.cfg.ObservationSub = "ventderive.observation-v2"
	h.metrics = nil
	r = h.startReplica(nil)
	h.waitSettled(120 * time.Second)
	h.reconcile(msgs)
	h.waitReady(r)
	assertNoPHI(t, h.logs.String())
}

// A replica frozen while it holds a patient's lock (here: a connection
// holding that advisory lock) holds back only that patient: the group
// commits that wait out lock_timeout are recorded message by message, the
// other patients' inputs are all recorded while the lock is held, and the
// frozen patient's once it is released.
func TestFrozenLockHoldsBackOnlyItsPatient(t *testing.T) {
	// lock_timeout as the writer role has it in deploy/postgres/roles.sql,
	// shorter for the test; the harness connects as the admin role.
	h := newHarness(t, withDatabaseURL(pgtest.NewDatabase(t)+"&lock_timeout=500"))
	msgs := generate(genOpts{patients: 8, gases: 2})
	frozen := patientRef(0)
	ctx := context.Background()
	holder, err := h.pool.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	defer holder.Rollback(ctx)
	if _, err := holder.Exec(ctx, `SELECT pg_advisory_xact_lock(hashtextextended('ventderive/patient/' || $1::text, 0))`, frozen); err != nil {
		t.Fatal(err)
	}
	var others []testMsg
	var otherSeqs []uint64 // stream sequences: the stream is new, so the publish order
	for i, m := range msgs {
		// Its Patient resource names it by id only.
		if !strings.Contains(string(m.payload), `"`+strings.TrimPrefix(frozen, "Patient/")) {
			others = append(others, m)
			otherSeqs = append(otherSeqs, uint64(i+1))
		}
	}
	var attempts sync.Map // stream seq -> *atomic.Int32: times handed to the store in a group
	r := h.startReplica(&consumer.Hooks{BeforeIngest: func(seq uint64) {
		c, _ := attempts.LoadOrStore(seq, new(atomic.Int32))
		c.(*atomic.Int32).Add(1)
	}})
	h.publish(msgs)
	deadline := time.Now().Add(90 * time.Second)
	for {
		var n int
		if err := h.pool.QueryRow(ctx, `SELECT count(*) FROM inbox WHERE encode(inbox_key, 'hex') = ANY($1)`, inboxKeys(others)).Scan(&n); err != nil {
			t.Fatal(err)
		}
		if n == len(others) {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("with one patient locked, %d of the other patients' %d inputs recorded after 90 s", n, len(others))
		}
		time.Sleep(200 * time.Millisecond)
	}
	// None of the other patients' inputs was retried: each went to the
	// store in one group, and if that group waited on the lock, it was
	// recorded on its own right after.
	for _, seq := range otherSeqs {
		if c, ok := attempts.Load(seq); ok && c.(*atomic.Int32).Load() > 1 {
			t.Errorf("input %d of an unlocked patient was handed to the store %d times", seq, c.(*atomic.Int32).Load())
		}
	}
	if err := holder.Rollback(ctx); err != nil {
		t.Fatal(err)
	}
	h.waitSettled(120 * time.Second)
	h.reconcile(msgs)
	h.waitReady(r)
}

func inboxKeys(msgs []testMsg) []string {
	out := make([]string, len(msgs))
	for i, m := range msgs {
		out[i] = inboxKey(m.payload)
	}
	return out
}

// A row the service did not write (a misused writer role, a bug) is never
// published: the relay sends only derived Observations and Provenance, to
// the subjects configured for them, whatever subject the row names. (A row
// naming a NATS system subject such as $JS.API... cannot even be written
// since migration 0005: TestRoles in consumer/postgres.)
func TestRelayNeverPublishesForeignRows(t *testing.T) {
	h := newHarness(t)
	msgs := generate(genOpts{patients: 1, gases: 1})
	h.startReplica(nil)
	h.publish(msgs)
	h.waitSettled(60 * time.Second)
	ctx := context.Background()
	if _, err := h.pool.Exec(ctx, `INSERT INTO outbox (subject, msg_id, headers, stored_payload, inbox_key, created_at)
		SELECT 'ventderive.elsewhere', 'Foreign/1', '{}', '', inbox_key, now() FROM inbox LIMIT 1`); err != nil {
		t.Fatal(err)
	}
	h.waitLog("neither a derived Observation nor a Provenance", 60*time.Second)
	if _, err := h.js.Stream(ctx, consumer.DefaultInputStream); err != nil {
		t.Fatalf("input stream after the foreign row: %v", err)
	}
	var published bool
	if err := h.pool.QueryRow(ctx, `SELECT published_at IS NOT NULL FROM outbox WHERE msg_id = 'Foreign/1'`).Scan(&published); err != nil || published {
		t.Fatalf("foreign row published=%v, %v", published, err)
	}
}

// Terminated poison input stays terminated on the server the service
// supports (consumer.MinServerVersion and later; the in-process server is
// the current nats-server/v2): the reported defect of nats-server 2.9.10 is
// that a message answered with TermWithReason came back after every
// AckWait, forever. After the dead letters are recorded the consumer must
// deliver nothing more across three AckWaits: its delivered sequence stays
// where it was, nothing is pending or awaiting an ack.
func TestTerminatedPoisonIsNotRedelivered(t *testing.T) {
	h := newHarness(t)
	bad := poisonMsgs()
	msgs := interleave(bad, generate(genOpts{patients: 2, gases: 1}))
	h.startReplica(nil)
	h.publish(msgs)
	h.waitSettled(120 * time.Second)
	before := h.consumerInfo()
	time.Sleep(3*h.cfg.AckWait + 500*time.Millisecond)
	after := h.consumerInfo()
	if after.Delivered.Consumer != before.Delivered.Consumer {
		t.Errorf("consumer delivered %d more message(s) after settling (sequence %d -> %d): terminated input came back",
			after.Delivered.Consumer-before.Delivered.Consumer, before.Delivered.Consumer, after.Delivered.Consumer)
	}
	if after.NumAckPending != 0 || after.NumPending != 0 || after.NumRedelivered != 0 {
		t.Errorf("consumer after %v: %d pending, %d awaiting ack, %d redelivered; want none",
			3*h.cfg.AckWait, after.NumPending, after.NumAckPending, after.NumRedelivered)
	}
	h.reconcile(msgs)
	h.assertDeadLetters(len(bad), "", "")
}
