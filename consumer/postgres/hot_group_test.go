package postgres_test

import (
	"context"
	"fmt"
	"reflect"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/fhirmap"
)

// statementCounter counts the statements sent through a pool whose text
// contains each of its markers.
type statementCounter struct {
	mu      sync.Mutex
	markers []string
	n       map[string]int
}

func (c *statementCounter) count(sql string) {
	c.mu.Lock()
	defer c.mu.Unlock()
	for _, m := range c.markers {
		if strings.Contains(sql, m) {
			c.n[m]++
		}
	}
}

func (c *statementCounter) TraceQueryStart(ctx context.Context, _ *pgx.Conn, d pgx.TraceQueryStartData) context.Context {
	c.count(d.SQL)
	return ctx
}
func (c *statementCounter) TraceQueryEnd(context.Context, *pgx.Conn, pgx.TraceQueryEndData) {}
func (c *statementCounter) TraceBatchStart(ctx context.Context, _ *pgx.Conn, _ pgx.TraceBatchStartData) context.Context {
	return ctx
}
func (c *statementCounter) TraceBatchQuery(_ context.Context, _ *pgx.Conn, d pgx.TraceBatchQueryData) {
	c.count(d.SQL)
}
func (c *statementCounter) TraceBatchEnd(context.Context, *pgx.Conn, pgx.TraceBatchEndData) {}

// provenanceDump is what storeDump leaves out: how the rows link to each
// other (heads to their derivation and refusal, versions to the version
// they supersede), the refusals' lineage and the settings snapshots, by
// content rather than by id.
func provenanceDump(t *testing.T, f *fixture) []string {
	t.Helper()
	var out []string
	for _, sql := range []string{
		`SELECT h.key, h.kind, h.patient_ref, h.blood_gas_key, h.version, h.refused, h.digest, h.status, h.value,
		        d.key, d.version, r.key, r.digest, r.inbox_key
		 FROM head h LEFT JOIN derivation d ON d.id = h.derivation_id LEFT JOIN refusal r ON r.id = h.refusal_id ORDER BY h.key`,
		`SELECT d.key, d.version, d.observation_id, d.kind, d.patient_ref, d.patient_hash, d.blood_gas_key, d.effective, d.unit,
		        d.method, d.constants::text, d.assumptions::text, d.basis, d.flags::text, d.retracted, d.algorithm,
		        d.record::text, d.settings_digest, p.key, p.version
		 FROM derivation d LEFT JOIN derivation p ON p.id = d.supersedes_id ORDER BY d.id`,
		`SELECT r.key, r.kind, r.patient_ref, r.patient_hash, r.blood_gas_key, r.effective, r.detail, r.settings_digest
		 FROM refusal r ORDER BY r.id`,
		`SELECT r.key, r.digest, i.ordinal, i.role, i.fact_key, i.fact_digest, i.resource_ref, i.time_offset, i.fallback
		 FROM refusal_input i JOIN refusal r ON r.id = i.refusal_id ORDER BY r.id, i.ordinal`,
		`SELECT d.key, d.version, i.fact_digest, i.resource_ref, i.fallback
		 FROM derivation_input i JOIN derivation d ON d.id = i.derivation_id ORDER BY d.id, i.ordinal`,
		`SELECT digest, algorithm, inbox_key FROM site_settings ORDER BY digest`,
	} {
		rows, err := f.pool.Query(f.ctx, sql)
		if err != nil {
			t.Fatalf("%s: %v", sql, err)
		}
		for rows.Next() {
			vals, err := rows.Values()
			if err != nil {
				t.Fatal(err)
			}
			out = append(out, fmt.Sprint(vals...))
		}
		rows.Close()
		if err := rows.Err(); err != nil {
			t.Fatal(err)
		}
		out = append(out, "--")
	}
	return out
}

// A group of hot messages is planned message by message but written in a
// few multi-row statements at its end (groupWrites), with the group's
// pending heads laid over the stored ones for the later messages'
// snapshots. The store must end exactly as sequential Ingest leaves it
// (fact ids of the cold message aside), with the same snapshots planned and
// the same results, for a story that exercises every part: a reading in a
// stored gas's window (version 1), a blood gas without data (refused), its
// reading in the same group (the refused head derived), a nearer reading
// (version 2, superseding a version of the same group), a corrected
// subject that moves the second patient's reading away (amended: the test
// plan reads every version), the second patient's gas entered in error (its
// value refused after being derived in the group), a second gas in the window of the
// first patient's readings, a cold patient and a repeat inside the group.
// And the group must have taken the set-based path: fewer derivation
// statements than derivations, one head statement, and fewer fact inserts
// than messages (a wave of two: a second patient's reading in its stored
// gas's window beside the first).
func TestIngestBatchHotMessagesEqualSequentialIngest(t *testing.T) {
	t.Parallel()
	p3, p4, p5 := "Patient/lg-icu-0003", "Patient/lg-icu-0004", "Patient/lg-icu-0005" // invented
	stored := message("fhir.input.lab", 1, abg(p1, "abg-h1", t0, 45), abg(p5, "abg-h5", t0, 47))
	moved := obs{id: "ve-b", version: "2", patient: p3, q: fhirmap.QMinuteVol, at: t0.Add(-2 * time.Minute), value: 8,
		unit: "L/min", status: fhirmap.StatusFinal} // a corrected subject: ve-b now names p3
	withdrawn := abg(p2, "abg-h2", t0, 50)
	withdrawn.version, withdrawn.status = "2", fhirmap.StatusEnteredInError
	m0 := message("fhir.input.device", 2, vent(p1, "ve-a", fhirmap.QMinuteVol, t0.Add(-5*time.Minute), 10, "L/min"))
	msgs := []consumer.Message{
		m0,
		message("fhir.input.device", 10, vent(p5, "ve-e", fhirmap.QMinuteVol, t0.Add(-4*time.Minute), 11, "L/min")), // a wave with m0
		message("fhir.input.lab", 3, abg(p2, "abg-h2", t0, 50)),
		message("fhir.input.device", 4, vent(p2, "ve-b", fhirmap.QMinuteVol, t0.Add(-2*time.Minute), 8, "L/min")),
		message("fhir.input.device", 5, vent(p1, "ve-c", fhirmap.QMinuteVol, t0.Add(-time.Minute), 12, "L/min")),
		message("fhir.input.device", 6, moved),
		message("fhir.input.lab", 9, withdrawn), // p2's gas entered in error: refused over its version
		message("fhir.input.lab", 7, abg(p1, "abg-h3", t0.Add(20*time.Minute), 41)),
		message("fhir.input.device", 8, vent(p4, "ve-d", fhirmap.QMinuteVol, t0, 9, "L/min")), // cold
		m0, // a repeat inside the group
	}

	seq, grp := newFixture(t), newFixture(t)
	for _, f := range []*fixture{seq, grp} {
		if _, err := f.store.Ingest(f.ctx, stored, (&testPlan{}).plan); err != nil {
			t.Fatal(err)
		}
	}
	var sp, gp testPlan
	var want []consumer.BatchResult
	for _, m := range msgs {
		r, err := seq.store.Ingest(seq.ctx, m, sp.plan)
		want = append(want, consumer.BatchResult{IngestResult: r, Err: err})
	}

	counter := &statementCounter{markers: []string{"INSERT INTO derivation (", "INSERT INTO head (", "INSERT INTO outbox (", "INSERT INTO fact_row ("}, n: map[string]int{}}
	cfg, err := pgxpool.ParseConfig(grp.url)
	if err != nil {
		t.Fatal(err)
	}
	cfg.ConnConfig.Tracer = counter
	pool, err := pgxpool.NewWithConfig(grp.ctx, cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	got := postgres.New(pool, postgres.Options{PatientKey: testKey, Now: clock()}).IngestBatch(grp.ctx, msgs, gp.plan)

	derivations, withFacts := 0, 0
	for i := range msgs {
		if want[i].Facts > 0 {
			withFacts++
		}
		if errClass(got[i].Err) != errClass(want[i].Err) || !reflect.DeepEqual(got[i].IngestResult, want[i].IngestResult) {
			t.Errorf("message %d: %+v %v, sequential Ingest %+v %v", i, got[i].IngestResult, got[i].Err, want[i].IngestResult, want[i].Err)
		}
		derivations += want[i].Derivations
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
	if gl, wl := provenanceDump(t, grp), provenanceDump(t, seq); !reflect.DeepEqual(gl, wl) {
		t.Errorf("links differ:\n group %q\n  seq  %q", gl, wl)
	}

	// The story happened as told (sequential Ingest: its own contract;
	// fmt.Sprint puts no space between a string and its neighbour).
	key1, key2 := p1+"|Observation/abg-h1|"+kindVDVT, p2+"|Observation/abg-h2|"+kindVDVT
	has := func(rows []string, prefix string) bool {
		return slices.ContainsFunc(rows, func(r string) bool { return strings.HasPrefix(r, prefix) })
	}
	if !has(w.Derivations, key1+"2 ") || !has(w.Derivations, key2+"1 ") || !has(w.Derivations, p1+"|Observation/abg-h3|") {
		t.Errorf("want version 2 of %s, version 1 of %s and a value for the second gas: %v", key1, key2, w.Derivations)
	}
	if n := len(slices.DeleteFunc(slices.Clone(w.Refusals), func(r string) bool { return !strings.HasPrefix(r, key2) })); n != 2 {
		t.Errorf("want %s refused before its reading and after its gas was withdrawn (2 refusals): %v", key2, w.Refusals)
	}
	if !has(w.Heads, key2+"2 true") {
		t.Errorf("want %s refused over its version 1: %v", key2, w.Heads)
	}
	if errClass(got[len(got)-1].Err) != "duplicate" {
		t.Errorf("repeat inside the group: %v", got[len(got)-1].Err)
	}

	// The set-based path: the group's derivations in fewer statements than
	// derivations (a key's second version starts a new one), one head
	// statement, one outbox statement.
	if d := counter.n["INSERT INTO derivation ("]; derivations < 3 || d >= derivations || d > 2 {
		t.Errorf("%d derivation statements for %d derivations: want at most 2", d, derivations)
	}
	if h, o := counter.n["INSERT INTO head ("], counter.n["INSERT INTO outbox ("]; h != 1 || o != 1 {
		t.Errorf("%d head and %d outbox statements: want one each", h, o)
	}
	// The first two messages (disjoint patients and keys) are one wave
	// (hotWaves): one fact insert for both.
	if n := counter.n["INSERT INTO fact_row ("]; n >= withFacts {
		t.Errorf("%d fact inserts for %d messages with facts: want fewer", n, withFacts)
	}
}
