package postgres_test

import (
	"context"
	"fmt"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/migrations"
)

// genericPlans reads pg_prepared_statements of the pool's one connection:
// how many times each prepared statement ran its generic plan.
func genericPlans(t testing.TB, f *fixture, pool *pgxpool.Pool) map[string]int64 {
	t.Helper()
	rows, err := pool.Query(f.ctx, `SELECT statement, generic_plans FROM pg_prepared_statements`)
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]int64{}
	var s string
	var n int64
	if _, err := pgx.ForEachRow(rows, []any{&s, &n}, func() error { out[s] = n; return nil }); err != nil {
		t.Fatal(err)
	}
	return out
}

func onePool(t testing.TB, f *fixture, warm bool) *pgxpool.Pool {
	t.Helper()
	cfg, err := pgxpool.ParseConfig(f.url)
	if err != nil {
		t.Fatal(err)
	}
	cfg.MaxConns = 1
	if warm {
		postgres.WarmPool(cfg)
	}
	pool, err := pgxpool.NewWithConfig(f.ctx, cfg)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(pool.Close)
	return pool
}

// A connection of a WarmPool pool has prepared every ingest statement of
// WarmConn and made its generic plan before it records a message (a plain
// pool's new connection has none), and a hot group recorded on it then
// runs the snapshot statement that was planned there (a reading in a
// stored gas's window: loadSnapshots): the same prepared
// statement, its generic plan used once more, so no message pays for the
// planning (10-24 ms a statement on the bench's stores).
func TestWarmPoolPlansIngestStatements(t *testing.T) {
	f := newFixture(t)
	var p testPlan
	gas := message("fhir.input.lab", 1, abg(p1, "warm-abg", t0, 45))
	if _, err := f.store.Ingest(f.ctx, gas, p.plan); err != nil {
		t.Fatal(err)
	}

	plain := genericPlans(t, f, onePool(t, f, false))
	for _, sql := range postgres.WarmStatements {
		if plain[sql] != 0 {
			t.Fatalf("a plain pool's new connection already planned %.60q", sql)
		}
	}

	pool := onePool(t, f, true)
	before := genericPlans(t, f, pool)
	for _, sql := range postgres.WarmStatements {
		if before[sql] < 1 {
			t.Errorf("a warmed connection holds no generic plan of %.80q", strings.TrimSpace(sql))
		}
	}
	store := postgres.New(pool, postgres.Options{PatientKey: testKey, Now: clock()})
	msgs := []consumer.Message{
		message("fhir.input.device", 2, vent(p1, "warm-ve", fhirmap.QMinuteVol, t0.Add(-time.Minute), 9, "L/min")),
		message("fhir.input.device", 3, vent(p2, "warm-ve2", fhirmap.QMinuteVol, t0, 9, "L/min")),
	}
	for _, r := range store.IngestBatch(f.ctx, msgs, p.plan) {
		if r.Err != nil {
			t.Fatal(r.Err)
		}
	}
	if len(p.snaps) != 2 {
		t.Fatalf("%d snapshots planned, want the gas's and the reading's", len(p.snaps))
	}
	after := genericPlans(t, f, pool)
	if sql := postgres.SnapshotFactsKnownSQL; after[sql] <= before[sql] {
		t.Errorf("the hot group did not run the warmed snapshot statement: generic plans %d before, %d after", before[sql], after[sql])
	}
}

// BenchmarkIngestFirstGroup records one group of 16 hot readings (each in
// a stored blood gas's window, as gas=stored of
// BenchmarkIngestGroupReadings) on a connection just opened: the first
// group a connection records after the pool opens it (a start, a restart,
// the pool's hourly renewal). conn=plain plans every ingest statement on
// the way; conn=warm has made the plans when the connection opened
// (WarmPool: not timed). ns/op and pg-cpu-us/msg are the group's alone.
func BenchmarkIngestFirstGroup(b *testing.B) {
	for _, warm := range []bool{false, true} {
		name := "conn=plain"
		if warm {
			name = "conn=warm"
		}
		b.Run(name, func(b *testing.B) {
			f := newFixture(b)
			var p testPlan
			const patients = 16
			pat := func(i int) string { return fmt.Sprintf("Patient/lg-first-%02d", i%patients) }
			var gases []consumer.Message
			for i := range patients * 50 {
				at := t0.Add(time.Duration(i/patients) * 30 * time.Minute)
				gases = append(gases, message("fhir.input.lab", uint64(i+1), abg(pat(i), fmt.Sprintf("g-%d", i), at, 45)))
			}
			for i := 0; i < len(gases); i += 64 {
				for _, r := range f.store.IngestBatch(f.ctx, gases[i:min(i+64, len(gases))], p.plan) {
					if r.Err != nil {
						b.Fatal(r.Err)
					}
				}
			}
			var pgTicks int64
			n := 0
			for b.Loop() {
				b.StopTimer()
				pool := onePool(b, f, warm)
				if err := pool.Ping(f.ctx); err != nil {
					b.Fatal(err)
				}
				store := postgres.New(pool, postgres.Options{PatientKey: testKey, Now: clock()})
				msgs := make([]consumer.Message, patients)
				for j := range msgs {
					at := t0.Add(time.Duration(n%50)*30*time.Minute + time.Minute)
					msgs[j] = message("fhir.input.device", uint64(1_000_000+n*patients+j),
						vent(pat(j), fmt.Sprintf("first-%d-%d", n, j), fhirmap.QMinuteVol, at, 9, "L/min"))
				}
				n++
				p.snaps = nil
				from := backendTicks(f)
				b.StartTimer()
				for _, r := range store.IngestBatch(f.ctx, msgs, p.plan) {
					if r.Err != nil {
						b.Fatal(r.Err)
					}
				}
				b.StopTimer()
				pgTicks += backendTicks(f) - from
				if len(p.snaps) == 0 {
					b.Fatal("readings in stored gases' windows planned nothing")
				}
				pool.Close()
				b.StartTimer()
			}
			b.ReportMetric(float64(pgTicks)*1e4/float64(n*patients), "pg-cpu-us/msg")
		})
	}
}

// A WarmPool pool opened on a database without the schema (serve --migrate
// on a new database) has warmed nothing; after the migrations, Rewarm
// gives it connections that hold the generic plan of every ingest
// statement.
func TestRewarmAfterMigrations(t *testing.T) {
	u := pgtest.NewEmptyDatabase(t)
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	cfg, err := pgxpool.ParseConfig(u)
	if err != nil {
		t.Fatal(err)
	}
	cfg.MaxConns = 1
	postgres.WarmPool(cfg)
	pool, err := pgxpool.NewWithConfig(ctx, cfg)
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	f := &fixture{ctx: ctx, url: u, pool: pool}
	before := genericPlans(t, f, pool)
	for _, sql := range postgres.WarmStatements {
		if before[sql] != 0 {
			t.Fatalf("a connection opened before the schema planned %.60q", sql)
		}
	}
	if _, err := migrations.Apply(ctx, pool, nil); err != nil {
		t.Fatal(err)
	}
	if err := postgres.Rewarm(ctx, pool); err != nil {
		t.Fatal(err)
	}
	plans := genericPlans(t, f, pool)
	for _, sql := range postgres.WarmStatements {
		if plans[sql] < 1 {
			t.Errorf("after Rewarm no generic plan of %.80q", strings.TrimSpace(sql))
		}
	}
}

// The collision guard (factsMissingSQL) is warmed too: it runs only when a
// message carries a fact already stored (a resource sent again), which on
// a new connection would otherwise plan it in that message's transaction.
// A warmed connection holds its generic plan before any message, and a
// message that repeats a stored blood gas beside a new reading then runs
// that same plan once more.
func TestWarmPoolPlansCollisionGuard(t *testing.T) {
	f := newFixture(t)
	var p testPlan
	gas := abg(p1, "warm-guard-abg", t0, 45)
	if _, err := f.store.Ingest(f.ctx, message("fhir.input.lab", 1, gas), p.plan); err != nil {
		t.Fatal(err)
	}
	if !slices.Contains(postgres.WarmStatements, postgres.FactsMissingSQL) {
		t.Fatal("factsMissingSQL is not among the warmed statements")
	}
	pool := onePool(t, f, true)
	before := genericPlans(t, f, pool)
	if before[postgres.FactsMissingSQL] < 1 {
		t.Fatalf("a warmed connection holds no generic plan of the collision guard")
	}
	store := postgres.New(pool, postgres.Options{PatientKey: testKey, Now: clock()})
	again := message("fhir.input.lab", 2, gas, vent(p1, "warm-guard-ve", fhirmap.QMinuteVol, t0.Add(-time.Minute), 9, "L/min"))
	for _, r := range store.IngestBatch(f.ctx, []consumer.Message{again}, p.plan) {
		if r.Err != nil {
			t.Fatal(r.Err)
		}
	}
	after := genericPlans(t, f, pool)
	if sql := postgres.FactsMissingSQL; after[sql] <= before[sql] {
		t.Errorf("the repeated fact did not run the warmed collision guard: generic plans %d before, %d after", before[sql], after[sql])
	}
}
