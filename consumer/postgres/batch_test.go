package postgres_test

import (
	"errors"
	"fmt"
	"reflect"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/fhirmap"
)

const p2 = "Patient/lg-icu-0002" // invented

// groupMessages is a small story over two patients whose outcome depends on
// order: a refusal that a later ventilator reading turns into a value, a
// nearer reading that amends it, a repeat of a message inside the group, a
// second blood gas without data.
func groupMessages() []consumer.Message {
	m0 := message("fhir.input.lab", 1, abg(p1, "abg-1", t0, 45))
	m1 := message("fhir.input.device", 2, vent(p1, "ve-1", fhirmap.QMinuteVol, t0.Add(-5*time.Minute), 10, "L/min"))
	m2 := message("fhir.input.lab", 3, abg(p2, "abg-2", t0, 50), vent(p2, "ve-2", fhirmap.QMinuteVol, t0.Add(-2*time.Minute), 8, "L/min"))
	m3 := message("fhir.input.device", 4, vent(p1, "ve-3", fhirmap.QMinuteVol, t0.Add(-time.Minute), 12, "L/min"))
	m4 := m1
	m4.StreamSeq = 5 // the same payload again: a republish inside the group
	m5 := message("fhir.input.lab", 6, abg(p1, "abg-3", t0.Add(2*time.Hour), 40))
	return []consumer.Message{m0, m1, m2, m3, m4, m5}
}

// storeDump is what a store holds, without the times it recorded.
type storeDump struct {
	Inbox, Facts []string
	Derivations  []string
	Refusals     []string
	Heads        []string
	Outbox       []string
	Lineage      []string
}

func dump(t *testing.T, f *fixture) storeDump {
	t.Helper()
	q := func(sql string) []string {
		t.Helper()
		rows, err := f.pool.Query(f.ctx, sql)
		if err != nil {
			t.Fatalf("%s: %v", sql, err)
		}
		defer rows.Close()
		var out []string
		for rows.Next() {
			vals, err := rows.Values()
			if err != nil {
				t.Fatal(err)
			}
			out = append(out, fmt.Sprint(vals...))
		}
		if err := rows.Err(); err != nil {
			t.Fatal(err)
		}
		return out
	}
	return storeDump{
		Inbox:       q(`SELECT inbox_key, stream_seq, resources, facts FROM inbox ORDER BY inbox_key`),
		Facts:       q(`SELECT key, digest, inbox_key FROM fact ORDER BY id`),
		Derivations: q(`SELECT key, version, value, status, digest, inbox_key, supersedes_id IS NULL FROM derivation ORDER BY id`),
		Refusals:    q(`SELECT key, reason, digest, inbox_key FROM refusal ORDER BY id`),
		Heads:       q(`SELECT key, version, refused, digest, status, value FROM head ORDER BY key`),
		Outbox:      q(`SELECT subject, msg_id, headers::text, stored_payload, payload_sha256, payload_size, inbox_key FROM outbox ORDER BY seq`),
		Lineage:     q(`SELECT d.key, d.version, i.ordinal, i.role, i.fact_key, i.time_offset FROM derivation_input i JOIN derivation d ON d.id = i.derivation_id ORDER BY d.id, i.ordinal`),
	}
}

// errClass reduces an ingest error to what the pipeline branches on.
func errClass(err error) string {
	switch {
	case err == nil:
		return "ok"
	case errors.Is(err, consumer.ErrDuplicate):
		return "duplicate"
	case errors.Is(err, consumer.ErrTransient):
		return "transient"
	default:
		return "refused"
	}
}

// A group commit must record exactly what Ingest records for the same
// messages one after the other (the contract of consumer.BatchStore), down
// to version numbers, the message each row is attributed to, and the
// duplicate inside the group.
func TestIngestBatchEqualsSequentialIngest(t *testing.T) {
	t.Parallel()
	msgs := groupMessages()

	seq := newFixture(t)
	var sp testPlan
	var wantRes []consumer.BatchResult
	for _, m := range msgs {
		r, err := seq.store.Ingest(seq.ctx, m, sp.plan)
		wantRes = append(wantRes, consumer.BatchResult{IngestResult: r, Err: err})
	}

	grp := newFixture(t)
	var gp testPlan
	got := grp.store.IngestBatch(grp.ctx, msgs, gp.plan)
	if len(got) != len(msgs) {
		t.Fatalf("IngestBatch returned %d results for %d messages", len(got), len(msgs))
	}
	for i := range msgs {
		if errClass(got[i].Err) != errClass(wantRes[i].Err) {
			t.Errorf("message %d: %s (%v), sequential Ingest: %s (%v)", i, errClass(got[i].Err), got[i].Err, errClass(wantRes[i].Err), wantRes[i].Err)
		}
		if !reflect.DeepEqual(got[i].IngestResult, wantRes[i].IngestResult) {
			t.Errorf("message %d: result %+v, sequential Ingest %+v", i, got[i].IngestResult, wantRes[i].IngestResult)
		}
	}
	if errClass(got[4].Err) != "duplicate" {
		t.Errorf("repeat inside the group: %v, want ErrDuplicate", got[4].Err)
	}
	if !reflect.DeepEqual(gp.snaps, sp.snaps) {
		t.Errorf("plan saw different snapshots:\n group %+v\n  seq  %+v", gp.snaps, sp.snaps)
	}
	g, w := dump(t, grp), dump(t, seq)
	if !reflect.DeepEqual(g, w) {
		t.Errorf("stores differ:\n group %+v\n  seq  %+v", g, w)
	}
	if len(w.Derivations) < 3 || len(w.Refusals) < 2 {
		t.Fatalf("the story should produce versions and refusals: %+v", w)
	}

	// The same group again, as after a crash before the acks: every message
	// is a duplicate and nothing changes.
	again := grp.store.IngestBatch(grp.ctx, msgs, gp.plan)
	for i, r := range again {
		if errClass(r.Err) != "duplicate" {
			t.Errorf("redelivered message %d: %v, want ErrDuplicate", i, r.Err)
		}
	}
	if g2 := dump(t, grp); !reflect.DeepEqual(g2, g) {
		t.Errorf("a redelivered group changed the store")
	}
}

// A message the database refuses for its content (a CHECK constraint) and a
// message whose plan fails must not take down the others of their group.
func TestIngestBatchIsolatesFailures(t *testing.T) {
	t.Parallel()
	boom := errors.New("plan failed")
	cases := []struct {
		name   string
		bad    func(consumer.Message) consumer.Message
		plan   func(*testPlan) consumer.PlanFunc
		check  func(t *testing.T, err error)
		badIdx int
	}{
		{
			name: "check violation",
			bad: func(m consumer.Message) consumer.Message {
				m.Facts[0].Quantity = "Not A Quantity" // fact.quantity CHECK
				return m
			},
			plan: func(p *testPlan) consumer.PlanFunc { return p.plan },
			check: func(t *testing.T, err error) {
				var dbErr *postgres.DBError
				if !errors.As(err, &dbErr) || dbErr.Code != "23514" || errors.Is(err, consumer.ErrTransient) {
					t.Errorf("bad message: %v, want a permanent DBError 23514", err)
				}
			},
			badIdx: 1,
		},
		{
			name: "plan error",
			bad:  func(m consumer.Message) consumer.Message { return m },
			plan: func(p *testPlan) consumer.PlanFunc {
				return func(s consumer.Snapshot) (consumer.Changes, error) {
					if s.Patient == p2 {
						return consumer.Changes{}, boom
					}
					return p.plan(s)
				}
			},
			check: func(t *testing.T, err error) {
				if !errors.Is(err, boom) || errors.Is(err, consumer.ErrTransient) {
					t.Errorf("message with failing plan: %v, want the plan's error, not transient", err)
				}
			},
			badIdx: 1,
		},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			t.Parallel()
			f := newFixture(t)
			msgs := []consumer.Message{
				message("fhir.input.lab", 1, abg(p1, "abg-1", t0, 45), vent(p1, "ve-1", fhirmap.QMinuteVol, t0, 10, "L/min")),
				c.bad(message("fhir.input.lab", 2, abg(p2, "abg-2", t0, 50), vent(p2, "ve-2", fhirmap.QMinuteVol, t0, 9, "L/min"))),
				message("fhir.input.lab", 3, abg("Patient/lg-icu-0003", "abg-3", t0, 41), vent("Patient/lg-icu-0003", "ve-3", fhirmap.QMinuteVol, t0, 11, "L/min")),
			}
			var p testPlan
			res := f.store.IngestBatch(f.ctx, msgs, c.plan(&p))
			for i, r := range res {
				if i == c.badIdx {
					c.check(t, r.Err)
					continue
				}
				if r.Err != nil || r.Derivations != 1 || r.Outbox != 1 {
					t.Errorf("good message %d: %+v, %v; want recorded with 1 derivation", i, r.IngestResult, r.Err)
				}
			}
			if n := f.count(t, "inbox"); n != 2 {
				t.Errorf("inbox has %d rows, want the 2 good messages", n)
			}
			if n := f.count(t, "derivation"); n != 2 {
				t.Errorf("derivation has %d rows, want 2", n)
			}
		})
	}
}

// IngestBatch of one message is Ingest; of none, nothing.
func TestIngestBatchSmall(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	var p testPlan
	if got := f.store.IngestBatch(f.ctx, nil, p.plan); len(got) != 0 {
		t.Errorf("empty group: %d results", len(got))
	}
	m := message("fhir.input.lab", 1, abg(p1, "abg-1", t0, 45), vent(p1, "ve-1", fhirmap.QMinuteVol, t0, 10, "L/min"))
	got := f.store.IngestBatch(f.ctx, []consumer.Message{m}, p.plan)
	if len(got) != 1 || got[0].Err != nil || got[0].Derivations != 1 {
		t.Fatalf("group of one: %+v", got)
	}
	got = f.store.IngestBatch(f.ctx, []consumer.Message{m}, p.plan)
	if !errors.Is(got[0].Err, consumer.ErrDuplicate) {
		t.Errorf("group of one repeated: %v, want ErrDuplicate", got[0].Err)
	}
	if strings.Contains(fmt.Sprint(got[0].Err), p1) {
		t.Errorf("error names the patient: %v", got[0].Err)
	}
}

// BenchmarkIngestBatch records groups of blood-gas panels (benchMessage:
// one resource, three facts, three derivations with lineage, heads and
// outbox rows each) in one transaction per group, synchronous_commit on,
// from one connection. A group of 1 is the transaction-per-message cost
// that BenchmarkIngest measures; the ratio is what group commit buys. It
// reports messages per second; ns/op is per group.
func BenchmarkIngestBatch(b *testing.B) {
	for _, size := range []int{1, 16, 64} {
		b.Run(fmt.Sprintf("messages=%d", size), func(b *testing.B) {
			f := newFixture(b)
			var sc string
			if err := f.pool.QueryRow(f.ctx, "SHOW synchronous_commit").Scan(&sc); err != nil || sc != "on" {
				b.Fatalf("synchronous_commit = %q, %v; want on", sc, err)
			}
			next, msgs := 0, 0
			b.ReportAllocs()
			start := time.Now()
			for b.Loop() {
				group := make([]consumer.Message, size)
				for i := range group {
					next++
					group[i] = benchMessage(next, 50)
				}
				for i, r := range f.store.IngestBatch(f.ctx, group, benchPlan) {
					if r.Err != nil || r.Derivations != 3 {
						b.Fatalf("message %d of the group: %+v, %v", i, r.IngestResult, r.Err)
					}
				}
				msgs += size
			}
			b.ReportMetric(float64(msgs)/time.Since(start).Seconds(), "messages/s")
		})
	}
}

// Messages of patients without a blood gas in reach (cold) are stored in
// one insert for the group, ahead of the others, and the store ends as
// sequential Ingest leaves it: same results per message, same rows (fact
// ids aside), the same snapshots planned. A reading of a patient with a
// stored blood gas in its window, and a reading of a patient whose blood
// gas arrives later in the group, stay on the per-message path.
func TestIngestBatchColdMessagesEqualSequentialIngest(t *testing.T) {
	t.Parallel()
	p3, p4 := "Patient/lg-icu-0003", "Patient/lg-icu-0004" // invented
	stored := message("fhir.input.lab", 1, abg(p3, "abg-p3", t0, 44))
	msgs := append(groupMessages(),
		message("fhir.input.device", 10, vent(p4, "ve-p4a", fhirmap.QMinuteVol, t0, 9, "L/min")),                  // cold
		message("fhir.input.device", 11, vent(p3, "ve-p3", fhirmap.QMinuteVol, t0.Add(-time.Minute), 7, "L/min")), // hot: stored gas
		message("fhir.input.device", 12, vent(p4, "ve-p4b", fhirmap.QTidalVol, t0, 450, "mL")),                    // cold
	)
	// Move the first cold message to the front, before every hot one.
	msgs = append([]consumer.Message{msgs[6]}, append(msgs[:6:6], msgs[7:]...)...)

	seq, grp := newFixture(t), newFixture(t)
	var sp, gp testPlan
	for _, f := range []*fixture{seq, grp} {
		if _, err := f.store.Ingest(f.ctx, stored, (&testPlan{}).plan); err != nil {
			t.Fatal(err)
		}
	}
	var want []consumer.BatchResult
	for _, m := range msgs {
		r, err := seq.store.Ingest(seq.ctx, m, sp.plan)
		want = append(want, consumer.BatchResult{IngestResult: r, Err: err})
	}
	got := grp.store.IngestBatch(grp.ctx, msgs, gp.plan)
	for i := range msgs {
		if errClass(got[i].Err) != errClass(want[i].Err) || !reflect.DeepEqual(got[i].IngestResult, want[i].IngestResult) {
			t.Errorf("message %d: %+v %v, sequential Ingest %+v %v", i, got[i].IngestResult, got[i].Err, want[i].IngestResult, want[i].Err)
		}
	}
	if !reflect.DeepEqual(gp.snaps, sp.snaps) {
		t.Errorf("plan saw different snapshots:\n group %+v\n  seq  %+v", gp.snaps, sp.snaps)
	}
	g, w := dump(t, grp), dump(t, seq)
	slices.Sort(g.Facts)
	slices.Sort(w.Facts)
	if !reflect.DeepEqual(g, w) {
		t.Errorf("stores differ:\n group %+v\n  seq  %+v", g, w)
	}
	// The cold path was taken: the last message's fact (cold, p4) was
	// stored before the facts of the hot messages ahead of it, and the
	// stored gas's reading (hot, p3) after them.
	id := func(key string) (n int64) {
		t.Helper()
		if err := grp.pool.QueryRow(grp.ctx, `SELECT id FROM fact WHERE key = $1`, key).Scan(&n); err != nil {
			t.Fatalf("fact %s: %v", key, err)
		}
		return n
	}
	cold, hot, hotLater := id(msgs[len(msgs)-1].Facts[0].Key), id(msgs[1].Facts[0].Key), id(msgs[len(msgs)-2].Facts[0].Key)
	if !(cold < hot && hot < hotLater) {
		t.Errorf("fact ids: cold %d, first hot %d, stored gas's reading %d; want the cold one first", cold, hot, hotLater)
	}
	if len(w.Derivations) == 0 || !slices.ContainsFunc(w.Derivations, func(d string) bool { return strings.HasPrefix(d, p3) }) {
		t.Errorf("the reading in the stored gas's window should derive a value: %v", w.Derivations)
	}
}

// concatArgs joins per-message arrays and keeps shared scalars once; it
// refuses scalars that differ (they cannot be one statement's parameter).
func TestConcatArgs(t *testing.T) {
	t.Parallel()
	got, err := postgres.ConcatArgs([][]any{{[]string{"a"}, []int64{1}, "now"}, {[]string{"b", "c"}, []int64{2, 3}, "now"}})
	want := []any{[]string{"a", "b", "c"}, []int64{1, 2, 3}, "now"}
	if err != nil || !reflect.DeepEqual(got, want) {
		t.Errorf("ConcatArgs = %v, %v; want %v", got, err, want)
	}
	if _, err := postgres.ConcatArgs([][]any{{"x"}, {"y"}}); err == nil {
		t.Error("differing scalars were joined")
	}
}
