package consumer_test

import (
	"context"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/prometheus/client_golang/prometheus"

	"github.com/ventderive/ventderive/consumer"
)

// A backlog already in the stream when the replica starts is drained by the
// main consumer in stream order; a blood gas published during the drain,
// with its patient's admission and ventilator readings, goes through the
// fresh lane and is derived while most of the backlog is still unrecorded.
// The assertion is on order (how much of the backlog was recorded when the
// fresh derivations appeared), not on a time: the main lane is slowed by a
// hook so that the drain is long enough to be overtaken on any machine.
// Afterwards the main consumer meets the fresh inputs again as duplicates,
// and reconcile checks that nothing was lost, recorded twice or published
// twice and that the final state is the offline derivation's (the store's
// state is a function of the set of inputs, so the order between the lanes
// does not matter).
func TestFreshInputOvertakesBacklog(t *testing.T) {
	h := newHarness(t)
	h.cfg.FreshLag = 100
	backlog := generate(genOpts{patients: 30, gases: 2})
	h.publish(backlog)
	ctx := context.Background()
	s, err := h.js.Stream(ctx, consumer.DefaultInputStream)
	if err != nil {
		t.Fatal(err)
	}
	info, err := s.Info(ctx)
	if err != nil {
		t.Fatal(err)
	}
	lastBacklog := info.State.LastSeq

	// Patient 500 is admitted during the drain: admission, the readings
	// around its first gas, the gas.
	const freshPatient = 500
	fresh := append(patientMsgs(freshPatient), ventMsgs(freshPatient, 0, 10*time.Minute)...)
	fresh = append(fresh, gasMsg(freshPatient, 0, gasValue(freshPatient, 0), 1, "final"))
	want := expectedHeads(t, h.site, fresh)
	valid := 0
	for _, w := range want {
		if !w.refused {
			valid++
		}
	}
	if valid == 0 {
		t.Fatal("the fresh patient's inputs derive nothing: the test would prove nothing")
	}

	// 5 ms per message in the main lane only (the fresh lane does not call
	// BeforeIngest).
	m := consumer.NewMetrics(prometheus.NewRegistry())
	h.metrics = m
	r := h.startReplica(&consumer.Hooks{BeforeIngest: func(uint64) { time.Sleep(5 * time.Millisecond) }})
	recordedBacklog := func() int {
		var n int
		if err := h.pool.QueryRow(ctx, `SELECT count(*) FROM inbox WHERE stream_seq <= $1`, int64(lastBacklog)).Scan(&n); err != nil {
			t.Fatal(err)
		}
		return n
	}
	// The drain is under way.
	for deadline := time.Now().Add(time.Minute); recordedBacklog() == 0; time.Sleep(10 * time.Millisecond) {
		if time.Now().After(deadline) {
			t.Fatal("the backlog drain did not start")
		}
	}
	h.publish(fresh)

	derived := func() bool {
		got := h.heads()
		for k, w := range want {
			g, ok := got[k]
			if !ok || g.refused != w.refused || (!w.refused && g.value != w.value) {
				return false
			}
		}
		return true
	}
	var atFresh int
	for deadline := time.Now().Add(2 * time.Minute); ; time.Sleep(10 * time.Millisecond) {
		if derived() {
			atFresh = recordedBacklog()
			break
		}
		if time.Now().After(deadline) {
			t.Fatal("the fresh blood gas was never derived")
		}
	}
	t.Logf("fresh derivations complete with %d of %d backlog inputs recorded", atFresh, len(backlog))
	if atFresh >= len(backlog)/2 {
		t.Errorf("the fresh gas was derived only after %d of %d backlog inputs: it did not overtake the backlog", atFresh, len(backlog))
	}

	h.waitSettled(2 * time.Minute)
	all := append(backlog, fresh...)
	h.reconcile(all)
	if got := metricValue(t, m.Fresh.WithLabelValues("recorded")); got < float64(len(fresh)) {
		t.Errorf("fresh lane recorded %v inputs, want at least the %d fresh ones", got, len(fresh))
	}
	if got := metricValue(t, m.Inputs.WithLabelValues("duplicate")); got < float64(len(fresh)) {
		t.Errorf("main consumer met %v duplicates, want at least the %d inputs the fresh lane recorded", got, len(fresh))
	}
	if ready := r.p.Ready(ctx); len(ready) != 0 {
		t.Errorf("readiness: %v", ready)
	}
	if strings.Contains(h.logs.String(), "fresh lane: fetch failed") {
		t.Error("the fresh lane's pulls failed")
	}
}

// A fresh-lane consumer deleted by hand is recreated by the replica, and
// readiness names the lane while it is missing at the start.
func TestFreshConsumerRecreated(t *testing.T) {
	h := newHarness(t)
	r := h.startReplica(nil)
	h.waitReady(r)
	ctx := context.Background()
	if _, err := h.js.Consumer(ctx, consumer.DefaultInputStream, consumer.DefaultFreshDurable); err != nil {
		t.Fatalf("the replica did not create the fresh lane's consumer: %v", err)
	}
	if err := h.js.DeleteConsumer(ctx, consumer.DefaultInputStream, consumer.DefaultFreshDurable); err != nil {
		t.Fatal(err)
	}
	for deadline := time.Now().Add(time.Minute); ; time.Sleep(100 * time.Millisecond) {
		if _, err := h.js.Consumer(ctx, consumer.DefaultInputStream, consumer.DefaultFreshDurable); err == nil {
			break
		}
		if time.Now().After(deadline) {
			t.Fatal("the fresh lane's consumer was not recreated")
		}
	}
	h.waitReady(r)
	msgs := generate(genOpts{patients: 1, gases: 1})
	h.publish(msgs)
	h.waitSettled(time.Minute)
	h.reconcile(msgs)
}

// With the fresh lane's consumer denied by the NATS permissions, input is
// still recorded by the main consumer and readiness names the lane.
func TestFreshLaneDeniedIsNamedInReadiness(t *testing.T) {
	h := newHarness(t, withNATSUsers(func(o *server.Options) {
		o.Users = []*server.User{
			{Username: "admin", Password: "admin-test-only"},
			{Username: "svc", Password: "svc-test-only", Permissions: &server.Permissions{
				Publish: &server.SubjectPermission{Deny: []string{
					"$JS.API.CONSUMER.CREATE." + consumer.DefaultInputStream + "." + consumer.DefaultFreshDurable,
					"$JS.API.CONSUMER.CREATE." + consumer.DefaultInputStream + "." + consumer.DefaultFreshDurable + ".>",
				}},
			}},
		}
	}, "admin:admin-test-only@", "svc:svc-test-only@"))
	r := h.startReplica(nil)
	msgs := generate(genOpts{patients: 1, gases: 1})
	h.publish(msgs)
	h.waitSettled(time.Minute)
	h.reconcile(msgs)
	if got := r.p.Ready(context.Background()); !strings.Contains(got["fresh"], "inactive") || len(got) != 1 {
		t.Errorf("readiness %v: want only fresh named", got)
	}
}
