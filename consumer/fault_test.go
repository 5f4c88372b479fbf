package consumer_test

// Fault tests: the plan of shared/reference/reliability.md, numbered as
// there. Each ends with harness.reconcile: every input accounted for once,
// every derivation version published once, the final state equal to the
// offline derivation of the same inputs.

import (
	"context"
	"errors"
	"math/rand/v2"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/migrations"
)

var errCrash = errors.New("simulated crash")

// crasher simulates a process death once at each sequence number it is
// told to: the first time a chosen sequence passes the hook.
type crasher struct {
	choose  func(seq int64) bool
	crashed sync.Map
	n       atomic.Int64
}

func newCrasher(choose func(seq int64) bool) *crasher { return &crasher{choose: choose} }

func (c *crasher) at(seq int64) error {
	if c.choose(seq) {
		if _, seen := c.crashed.LoadOrStore(seq, true); !seen {
			c.n.Add(1)
			return errCrash
		}
	}
	return nil
}

func (c *crasher) mustHaveCrashed(t testing.TB) {
	t.Helper()
	if c.n.Load() == 0 {
		t.Fatal("no crash was simulated")
	}
}

// 1. Baseline: many inputs, several patients, three replicas.
func TestFaultBaselineThreeReplicas(t *testing.T) {
	h := newHarness(t)
	msgs := generate(genOpts{patients: 12, gases: 3})
	for range 3 {
		h.startReplica(nil)
	}
	h.publish(msgs)
	h.waitSettled(90 * time.Second)
	h.reconcile(msgs)
}

// 2. Every input published twice inside the dedup window (same message id:
// the stream drops it) and again "after the window" (new message ids: the
// inbox drops it).
func TestFaultDuplicates(t *testing.T) {
	h := newHarness(t)
	msgs := generate(genOpts{patients: 4, gases: 2})
	h.startReplica(nil)
	h.publish(msgs)
	h.publish(msgs)
	again := make([]testMsg, len(msgs))
	for i, m := range msgs {
		m.msgID = "late-" + m.msgID
		again[i] = m
	}
	h.publish(again)
	h.waitSettled(60 * time.Second)
	h.reconcile(msgs)
	var redelivered int
	if err := h.pool.QueryRow(context.Background(), `SELECT count(*) FROM inbox`).Scan(&redelivered); err != nil {
		t.Fatal(err)
	}
	if redelivered != len(msgs) {
		t.Errorf("inbox %d rows, want one per distinct input (%d)", redelivered, len(msgs))
	}
}

// 3. A crash after COMMIT and before the ack: redelivery is absorbed.
func TestFaultCrashAfterCommitBeforeAck(t *testing.T) {
	h := newHarness(t)
	msgs := generate(genOpts{patients: 3, gases: 2})
	c := newCrasher(func(seq int64) bool { return seq%5 == 0 })
	h.startReplica(&consumer.Hooks{AfterCommit: func(seq uint64) error { return c.at(int64(seq)) }})
	h.publish(msgs)
	h.waitSettled(90 * time.Second)
	c.mustHaveCrashed(t)
	h.reconcile(msgs)
}

// 4. A crash after the output PubAck and before the outbox row is marked:
// the republish carries the same message id and the stream drops it.
func TestFaultCrashAfterPublishBeforeMark(t *testing.T) {
	h := newHarness(t)
	msgs := generate(genOpts{patients: 3, gases: 2})
	c := newCrasher(func(seq int64) bool { return seq%3 == 0 && seq < 40 })
	h.startReplica(&consumer.Hooks{AfterPublish: c.at})
	h.publish(msgs)
	h.waitSettled(90 * time.Second)
	c.mustHaveCrashed(t)
	h.reconcile(msgs)
}

// 5. NATS restarts mid-load on the same store: no loss, no duplicate, and
// the replicas resume without a process restart.
func TestFaultNATSRestart(t *testing.T) {
	h := newHarness(t)
	msgs := generate(genOpts{patients: 6, gases: 2})
	h.startReplica(nil)
	h.startReplica(nil)
	half := len(msgs) / 2
	h.publish(msgs[:half])
	time.Sleep(300 * time.Millisecond)
	h.nats.restart()
	h.publish(msgs[half:])
	h.waitSettled(120 * time.Second)
	h.reconcile(msgs)
}

// 7. PostgreSQL stopped (immediate) and restarted mid-load: transient
// naks, readiness false then true, nothing lost. It runs on a throwaway
// cluster of its own, never the shared server.
func TestFaultPostgresRestart(t *testing.T) {
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
	if _, err := migrations.Apply(ctx, pool, nil); err != nil {
		t.Fatal(err)
	}
	pool.Close()

	h := newHarness(t, withDatabaseURL(cluster.URL()))
	msgs := generate(genOpts{patients: 4, gases: 3})
	r := h.startReplica(nil)
	h.publish(msgs[:len(msgs)/3])
	time.Sleep(200 * time.Millisecond)
	if err := cluster.Stop(ctx, "immediate"); err != nil {
		t.Fatal(err)
	}
	h.publish(msgs[len(msgs)/3:])
	deadline := time.Now().Add(10 * time.Second)
	for len(r.p.Ready(ctx)) == 0 {
		if time.Now().After(deadline) {
			t.Fatal("still ready with PostgreSQL stopped")
		}
		time.Sleep(100 * time.Millisecond)
	}
	if got := r.p.Ready(ctx); got["postgres"] == "" {
		t.Errorf("readiness problems %v, want postgres named", got)
	}
	time.Sleep(2 * time.Second) // let naks and retries happen
	if err := cluster.Start(ctx); err != nil {
		t.Fatal(err)
	}
	h.waitSettled(120 * time.Second)
	if got := r.p.Ready(ctx); len(got) != 0 {
		t.Errorf("not ready after PostgreSQL came back: %v", got)
	}
	h.reconcile(msgs)
}

// 9. Many patients, random delays, three replicas, shuffled arrival: no two
// transactions of one patient overlap, and the result equals the offline run
// (reconcile compares with fhirmap.DeriveAll over the same inputs).
func TestFaultPatientSerialisationAndOrderIndependence(t *testing.T) {
	h := newHarness(t)
	msgs := shuffled(generate(genOpts{patients: 10, gases: 2}), 42)
	var inPlan sync.Map // patient -> *atomic.Int32
	var overlaps atomic.Int64
	hooks := &consumer.Hooks{DuringPlan: func(patient string) {
		c, _ := inPlan.LoadOrStore(patient, new(atomic.Int32))
		n := c.(*atomic.Int32)
		if n.Add(1) > 1 {
			overlaps.Add(1)
		}
		time.Sleep(time.Duration(rand.IntN(3)) * time.Millisecond)
		n.Add(-1)
	}}
	for range 3 {
		h.startReplica(hooks)
	}
	h.publish(msgs)
	h.waitSettled(120 * time.Second)
	if overlaps.Load() != 0 {
		t.Errorf("%d overlapping transactions of one patient", overlaps.Load())
	}
	h.reconcile(msgs)
}

// 10. A handler slower than AckWait keeps its message with InProgress: no
// redelivery.
func TestFaultSlowHandler(t *testing.T) {
	h := newHarness(t)
	msgs := generate(genOpts{patients: 1, gases: 1})
	var slowed atomic.Bool
	h.startReplica(&consumer.Hooks{BeforeIngest: func(seq uint64) {
		if seq == 2 && slowed.CompareAndSwap(false, true) {
			time.Sleep(2*h.cfg.AckWait + 500*time.Millisecond)
		}
	}})
	h.publish(msgs)
	h.waitSettled(60 * time.Second)
	if !slowed.Load() {
		t.Fatal("the slow handler never ran")
	}
	ci := h.consumerInfo()
	if ci.NumRedelivered != 0 {
		t.Errorf("%d redelivered messages, want 0 with InProgress", ci.NumRedelivered)
	}
	h.reconcile(msgs)
}

// 11. Bad input: terminated once, dead letter with its reason, flow
// continues, nothing identifying in the logs.
func TestFaultPoisonInput(t *testing.T) {
	h := newHarness(t)
	good := generate(genOpts{patients: 2, gases: 1})
	bad := poisonMsgs()
	var msgs []testMsg
	for i, m := range good {
		msgs = append(msgs, m)
		if i < len(bad) {
			msgs = append(msgs, bad[i])
		}
	}
	h.startReplica(nil)
	h.publish(msgs)
	h.waitSettled(60 * time.Second)
	h.reconcile(msgs)

	rows, err := h.pool.Query(context.Background(), `SELECT reason FROM dead_letter ORDER BY stream_seq`)
	if err != nil {
		t.Fatal(err)
	}
	var reasons []string
	for rows.Next() {
		var r string
		if err := rows.Scan(&r); err != nil {
			t.Fatal(err)
		}
		reasons = append(reasons, r)
	}
	rows.Close()
	for i, m := range bad {
		if i >= len(reasons) || reasons[i] != m.poison {
			t.Errorf("dead letters %v, want reason %q at %d", reasons, m.poison, i)
		}
	}
	ci := h.consumerInfo()
	if ci.NumAckPending != 0 || ci.NumRedelivered != 0 {
		t.Errorf("poison redelivered: ack pending %d, redelivered %d", ci.NumAckPending, ci.NumRedelivered)
	}
	assertNoPHI(t, h.logs.String())
}

// 13. Graceful shutdown under load: in-flight work finishes or is
// redelivered, and what the outbox holds is published by the next start.
func TestFaultGracefulShutdown(t *testing.T) {
	h := newHarness(t)
	msgs := generate(genOpts{patients: 6, gases: 2})
	a, b := h.startReplica(nil), h.startReplica(nil)
	go h.publish(msgs)
	time.Sleep(500 * time.Millisecond)
	a.stop(t)
	b.stop(t)
	h.startReplica(nil)
	h.waitSettled(120 * time.Second)
	h.reconcile(msgs)
}

// 14. The consumer is deleted at runtime: it is recreated and nothing is
// lost (the new consumer starts from the beginning of the stream; the inbox
// absorbs what was already done).
func TestFaultConsumerDeleted(t *testing.T) {
	h := newHarness(t)
	msgs := generate(genOpts{patients: 4, gases: 2})
	h.startReplica(nil)
	h.publish(msgs[:len(msgs)/2])
	time.Sleep(500 * time.Millisecond)
	if err := h.js.DeleteConsumer(context.Background(), consumer.DefaultInputStream, h.cfg.Durable); err != nil {
		t.Fatal(err)
	}
	h.publish(msgs[len(msgs)/2:])
	h.waitSettled(120 * time.Second)
	h.reconcile(msgs)
}

func (h *harness) consumerInfo() *jetstream.ConsumerInfo {
	h.t.Helper()
	ctx := context.Background()
	c, err := h.js.Consumer(ctx, consumer.DefaultInputStream, h.cfg.Durable)
	if err != nil {
		h.t.Fatal(err)
	}
	ci, err := c.Info(ctx)
	if err != nil {
		h.t.Fatal(err)
	}
	return ci
}

// assertNoPHI checks captured logs for patient identifiers and payload
// values: the test patients' references and every test resource id.
func assertNoPHI(t testing.TB, logs string) {
	t.Helper()
	if logs == "" {
		t.Fatal("no logs captured: the canary proves nothing")
	}
	for _, canary := range []string{"t-0000", "t-0001", "Patient/", "t-bad-", "1986-01-15"} {
		if strings.Contains(logs, canary) {
			t.Errorf("logs contain %q", canary)
		}
	}
}
