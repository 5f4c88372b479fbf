package postgres_test

import (
	"errors"
	"fmt"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/fhirmap"
)

const inventedCodes = "urn:example:invented-codes"

// coded is a message of one tidal-volume reading Observation/<id> of
// patient, coded race-<round> in an invented code system (a new fact_term
// row per round) in encounter Encounter/lg-race-<round>.
func coded(patient, id string, round int, seq uint64) consumer.Message {
	m := message("fhir.input.vent", seq, vent(patient, id, fhirmap.QTidalVol, t0.Add(time.Duration(seq)*time.Second), 450, "mL"))
	m.Facts[0].Code = fhirmap.Coding{System: inventedCodes, Code: fmt.Sprintf("race-%d", round)}
	m.Facts[0].Encounter = fmt.Sprintf("Encounter/lg-race-%d", round)
	return m
}

// checkFactsResolve fails when a fact_row names a term or encounter that
// does not exist (the view fact would not show it), or when a reading
// Observation/<phase>-<round>-<replica> reads back with another round's
// code or encounter.
func checkFactsResolve(t *testing.T, f *fixture, want int) {
	t.Helper()
	var rows, visible, dangling, wrong, coded int
	if err := f.pool.QueryRow(f.ctx, `SELECT (SELECT count(*) FROM fact_row), (SELECT count(*) FROM fact),
	    (SELECT count(*) FROM fact_row r WHERE NOT EXISTS (SELECT 1 FROM fact_term t WHERE t.id = r.term_id)
	        OR NOT EXISTS (SELECT 1 FROM fact_encounter e WHERE e.id = r.encounter_id)),
	    (SELECT count(*) FROM fact WHERE code_system = $1 AND (code <> 'race-' || split_part(key, '-', 2)
	        OR encounter <> 'Encounter/lg-race-' || split_part(key, '-', 2))),
	    (SELECT count(*) FROM fact WHERE code_system = $1)`, inventedCodes).Scan(&rows, &visible, &dangling, &wrong, &coded); err != nil {
		t.Fatal(err)
	}
	if rows != visible || dangling != 0 {
		t.Errorf("%d fact rows, %d in the view fact, %d naming a missing term or encounter", rows, visible, dangling)
	}
	if wrong != 0 || coded != want {
		t.Errorf("%d of %d coded readings read back with another round's code or encounter (want 0 of %d)", wrong, coded, want)
	}
}

// TestLookupCacheReplicasRace has two Stores on pools of their own (two
// replicas) store, released at the same moment, a reading each with the
// same new term and the same new encounter, for several rounds. Every
// insert must succeed (the loser of a race takes the winner's row through
// ON CONFLICT), one row per term and per encounter is stored, and every
// reading reads back with its own term and encounter. Afterwards both
// Stores have cached the committed ids, and readings stored with the
// cached ids read back the same way.
func TestLookupCacheReplicasRace(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	pool2, err := pgxpool.New(f.ctx, f.url)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(pool2.Close)
	stores := []*postgres.Store{f.store, postgres.New(pool2, postgres.Options{PatientKey: testKey, Now: clock()})}
	const rounds = 12
	var p testPlan
	var seq atomic.Uint64
	phase := func(name string) {
		t.Helper()
		for r := range rounds {
			var wg sync.WaitGroup
			start := make(chan struct{})
			errs := make([]error, len(stores))
			for i, s := range stores {
				m := coded(fmt.Sprintf("Patient/lg-icu-07%02d", i), fmt.Sprintf("%s-%d-%d", name, r, i), r, seq.Add(1))
				wg.Add(1)
				go func() {
					defer wg.Done()
					<-start
					_, errs[i] = s.Ingest(f.ctx, m, p.plan)
				}()
			}
			close(start)
			wg.Wait()
			if err := errors.Join(errs...); err != nil {
				t.Fatalf("%s round %d: %v", name, r, err)
			}
		}
	}
	phase("new")
	checkFactsResolve(t, f, rounds*len(stores))
	var terms, encounters int
	if err := f.pool.QueryRow(f.ctx, `SELECT (SELECT count(*) FROM fact_term WHERE code_system = $1),
	    (SELECT count(*) FROM fact_encounter WHERE encounter LIKE 'Encounter/lg-race-%')`, inventedCodes).Scan(&terms, &encounters); err != nil {
		t.Fatal(err)
	}
	if terms != rounds || encounters != rounds {
		t.Errorf("%d term rows and %d encounter rows for %d of each", terms, encounters, rounds)
	}
	for i, s := range stores {
		// Every round's term and encounter, plus the encounter "" of
		// nothing else: at least rounds of each.
		if nt, ne := s.CachedLookups(); nt < rounds || ne < rounds {
			t.Errorf("replica %d caches %d terms and %d encounters after storing %d of each", i, nt, ne, rounds)
		}
	}
	phase("cached")
	checkFactsResolve(t, f, 2*rounds*len(stores))
}

// TestLookupCacheSurvivesRollback stores a blood gas with a new term whose
// plan fails, so the transaction that inserted the term is rolled back:
// no id may be cached from it (the id it was given belongs to no row).
// The next message with that term inserts the term again and commits; its
// id is then cached, and a reading stored with the cached id reads back
// with its term.
func TestLookupCacheSurvivesRollback(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	gas := func(id string, seq uint64) consumer.Message {
		m := message("fhir.input.lab", seq, abg(p1, id, t0.Add(time.Duration(seq)*time.Hour), 44))
		m.Facts[0].Code = fhirmap.Coding{System: inventedCodes, Code: "race-7"}
		m.Facts[0].Key = "Observation/gas-7-" + id
		m.Facts[0].Encounter = "Encounter/lg-race-7"
		return m
	}
	failing := func(consumer.Snapshot) (consumer.Changes, error) {
		return consumer.Changes{}, errors.New("invented plan failure")
	}
	terms0, encs0 := f.store.CachedLookups()
	if _, err := f.store.Ingest(f.ctx, gas("a", 1), failing); err == nil {
		t.Fatal("Ingest with a failing plan succeeded")
	}
	if n := f.count(t, "fact_term WHERE code_system = '"+inventedCodes+"'"); n != 0 {
		t.Fatalf("%d term rows after the rollback", n)
	}
	if nt, ne := f.store.CachedLookups(); nt != terms0 || ne != encs0 {
		t.Errorf("cache grew from %d/%d to %d/%d after a rolled-back transaction", terms0, encs0, nt, ne)
	}
	var p testPlan
	if _, err := f.store.Ingest(f.ctx, gas("b", 2), p.plan); err != nil {
		t.Fatal(err)
	}
	nt, _ := f.store.CachedLookups()
	if nt != terms0+1 {
		t.Errorf("after a committed message with the term, %d terms cached, want %d", nt, terms0+1)
	}
	if _, err := f.store.Ingest(f.ctx, gas("c", 3), p.plan); err != nil {
		t.Fatal(err)
	}
	checkFactsResolve(t, f, 2)
}

// TestLookupTermRaceWithOpenTransaction makes the race certain: another
// transaction (a replica in the middle of its insert) has inserted the
// same new term and not committed when the Store stores a reading with
// it. The Store's insert must wait for it, then take that row's id when it
// commits, or insert a row of its own when it rolls back (the other id
// then names no row and must not be used or cached). Either way one term
// row is left, a second reading stored with the cached id names the same
// term, and every reading reads back with its term.
func TestLookupTermRaceWithOpenTransaction(t *testing.T) {
	t.Parallel()
	for _, commit := range []bool{true, false} {
		t.Run(fmt.Sprintf("other commits=%v", commit), func(t *testing.T) {
			t.Parallel()
			f := newFixture(t)
			tx, err := f.pool.Begin(f.ctx)
			if err != nil {
				t.Fatal(err)
			}
			defer tx.Rollback(f.ctx)
			var otherID int32
			if err := tx.QueryRow(f.ctx, `INSERT INTO fact_term (quantity, origin, detail, specimen, temp_corrected, unit,
			    text, source_unit, code_system, code, code_display, status)
			  VALUES ($1, $2, '', '', false, 'mL', '', 'mL', $3, 'race-1', '', $4) RETURNING id`,
				string(fhirmap.QTidalVol), string(fhirmap.OriginMeasured), inventedCodes, string(fhirmap.StatusFinal)).Scan(&otherID); err != nil {
				t.Fatal(err)
			}
			var p testPlan
			done := make(chan error, 1)
			go func() {
				_, err := f.store.Ingest(f.ctx, coded("Patient/lg-icu-0790", "open-1-0", 1, 1), p.plan)
				done <- err
			}()
			select {
			case err := <-done:
				t.Fatalf("Ingest returned (%v) while another transaction held the same new term", err)
			case <-time.After(300 * time.Millisecond):
			}
			if commit {
				err = tx.Commit(f.ctx)
			} else {
				err = tx.Rollback(f.ctx)
			}
			if err != nil {
				t.Fatal(err)
			}
			if err := <-done; err != nil {
				t.Fatalf("Ingest after the other transaction ended: %v", err)
			}
			termOf := func(key string) int32 {
				var id int32
				if err := f.pool.QueryRow(f.ctx, `SELECT term_id FROM fact_row WHERE key = $1`, key).Scan(&id); err != nil {
					t.Fatal(err)
				}
				return id
			}
			first := termOf("Observation/open-1-0")
			if commit != (first == otherID) {
				t.Errorf("other transaction committed %v: the reading names term %d, the other's was %d", commit, first, otherID)
			}
			if nt, _ := f.store.CachedLookups(); nt != 1 {
				t.Errorf("%d terms cached after the commit, want 1", nt)
			}
			if _, err := f.store.Ingest(f.ctx, coded("Patient/lg-icu-0790", "open-1-1", 1, 2), p.plan); err != nil {
				t.Fatal(err)
			}
			if second := termOf("Observation/open-1-1"); second != first {
				t.Errorf("the reading stored with the cached id names term %d, the first %d", second, first)
			}
			if n := f.count(t, "fact_term WHERE code_system = '"+inventedCodes+"'"); n != 1 {
				t.Errorf("%d term rows, want 1", n)
			}
			checkFactsResolve(t, f, 2)
		})
	}
}

// TestSeededTermDoesNotWaitForAnotherGroup: the new terms and encounters of
// a group are committed before the group's transaction (seedLookups), so a
// second group naming the same new term does not wait on the unique index
// for the first group to commit. Group A (a reading with a new term, then
// a blood gas near it) is held inside its transaction by the gas's plan,
// after the reading's facts are inserted; group B (readings
// of another patient with the same term and encounter) must be stored
// meanwhile, and both read back with their term once A is released.
// Without the seeding, B's fact insert waits for A's COMMIT.
func TestSeededTermDoesNotWaitForAnotherGroup(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	entered, release := make(chan struct{}), make(chan struct{})
	var p testPlan
	var once sync.Once
	held := func(s consumer.Snapshot) (consumer.Changes, error) {
		once.Do(func() {
			close(entered)
			<-release
		})
		return p.plan(s)
	}
	readingA := coded(p1, "seed-3-a", 3, 2)
	gasA := message("fhir.input.lab", 1, abg(p1, "seed-gas", readingA.Facts[0].Effective.Add(time.Minute), 44))
	doneA := make(chan []consumer.BatchResult, 1)
	go func() { doneA <- f.store.IngestBatch(f.ctx, []consumer.Message{readingA, gasA}, held) }()
	select {
	case <-entered:
	case <-time.After(30 * time.Second):
		close(release)
		t.Fatal("group A never planned its blood gas")
	}
	// Another replica, so that B cannot take the id from A's cache.
	pool2, err := pgxpool.New(f.ctx, f.url)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(pool2.Close)
	other := postgres.New(pool2, postgres.Options{PatientKey: testKey, Now: clock()})
	doneB := make(chan []consumer.BatchResult, 1)
	go func() {
		doneB <- other.IngestBatch(f.ctx, []consumer.Message{coded(p2, "seed-3-b", 3, 3), coded(p2, "seed-3-c", 3, 4)}, p.plan)
	}()
	select {
	case res := <-doneB:
		for _, r := range res {
			if r.Err != nil {
				t.Errorf("group B: %v", r.Err)
			}
		}
	case <-time.After(5 * time.Second):
		t.Error("group B waited for group A's transaction: the new term was not committed before it")
	}
	close(release)
	for _, r := range <-doneA {
		if r.Err != nil {
			t.Errorf("group A: %v", r.Err)
		}
	}
	checkFactsResolve(t, f, 3)
}
