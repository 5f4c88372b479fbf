package postgres_test

import (
	"bytes"
	"errors"
	"fmt"
	"log/slog"
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

// lockedBuffer is a bytes.Buffer that concurrent loggers may write to.
type lockedBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *lockedBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *lockedBuffer) String() string {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}

// TestInboxSubjects: since migration 0019 an inbox row names its subject by
// an inbox_subject id. Input subjects are open (any subject under the input
// filter), so a subject the store has not seen must be recorded, not
// refused: by Ingest and by IngestBatch, twice in one group, and by
// concurrent groups that bring the same new subject at once. Every inbox
// row reads back its message's subject, each subject is one lookup row,
// and a redelivered group is a duplicate that adds nothing. No group falls
// back to recording its messages one by one (the store's warning): the
// group's own claim stores its new subjects.
//
// With the lookup cache a new subject is committed before the group's
// transaction (seedLookups); without it (WithoutLookupCache) the claim
// statements insert it themselves: both ways are checked.
func TestInboxSubjects(t *testing.T) {
	t.Parallel()
	for _, seeded := range []bool{true, false} {
		t.Run(fmt.Sprintf("seeded=%v", seeded), func(t *testing.T) {
			t.Parallel()
			testInboxSubjects(t, seeded)
		})
	}
}

func testInboxSubjects(t *testing.T, seeded bool) {
	f := newFixture(t)
	var logged lockedBuffer
	f.store = postgres.New(f.pool, postgres.Options{PatientKey: testKey, Now: clock(),
		Logger: slog.New(slog.NewTextHandler(&logged, nil))})
	if !seeded {
		f.store.WithoutLookupCache()
	}
	var p testPlan
	at := func(i int) time.Time { return t0.Add(time.Duration(i) * time.Minute) }
	want := map[string]string{} // inbox key -> subject

	single := message("fhir.input.lab", 1, vent(p1, "ve-s1", fhirmap.QMinuteVol, at(1), 10, "L/min"))
	newSingle := message("fhir.input.bedside-7", 2, vent(p1, "ve-s2", fhirmap.QMinuteVol, at(2), 11, "L/min"))
	for _, m := range []consumer.Message{single, newSingle} {
		if _, err := f.store.Ingest(f.ctx, m, p.plan); err != nil {
			t.Fatalf("Ingest %s: %v", m.Subject, err)
		}
		want[m.InboxKey] = m.Subject
	}
	group := []consumer.Message{
		message("fhir.input.device.novel", 3, vent(p1, "ve-g1", fhirmap.QMinuteVol, at(3), 12, "L/min")),
		message("fhir.input.lab", 4, vent(p1, "ve-g2", fhirmap.QMinuteVol, at(4), 13, "L/min")),
		message("fhir.input.device.novel", 5, vent(p1, "ve-g3", fhirmap.QMinuteVol, at(5), 14, "L/min")),
		message("site.test.fhir.input.adt", 6, vent(p1, "ve-g4", fhirmap.QMinuteVol, at(6), 15, "L/min")),
	}
	for i, r := range f.store.IngestBatch(f.ctx, group, p.plan) {
		if r.Err != nil {
			t.Fatalf("IngestBatch message %d (%s): %v", i, group[i].Subject, r.Err)
		}
		want[group[i].InboxKey] = group[i].Subject
	}
	for i, r := range f.store.IngestBatch(f.ctx, group, p.plan) {
		if !errors.Is(r.Err, consumer.ErrDuplicate) {
			t.Errorf("redelivered message %d: %v, want ErrDuplicate", i, r.Err)
		}
	}

	// Concurrent transactions, each with the same subject none has stored:
	// two groups of two messages (claimInboxesSQL) and two single
	// messages (a group of one is recorded as Ingest records it:
	// claimInboxSQL).
	const racers = 4
	var wg sync.WaitGroup
	errs := make([]error, racers)
	raced := make([][]consumer.Message, racers)
	for i := range racers {
		for j := range 2 - i/2 {
			patient := fmt.Sprintf("Patient/lg-race-%d-%d", i, j) // invented
			m := message("fhir.input.race", uint64(10+2*i+j), vent(patient, fmt.Sprintf("ve-r%d-%d", i, j), fhirmap.QMinuteVol, at(10+i), 9, "L/min"))
			raced[i] = append(raced[i], m)
			want[m.InboxKey] = m.Subject
		}
	}
	// Another transaction inserts the subject first and commits only when
	// every group waits on it, so each group's insert of the subject
	// conflicts with a row committed after its statement began.
	// (Connections of their own: the groups take the pool's.)
	holdConn, err := pgx.Connect(f.ctx, f.url)
	if err != nil {
		t.Fatal(err)
	}
	defer holdConn.Close(f.ctx)
	watch, err := pgx.Connect(f.ctx, f.url)
	if err != nil {
		t.Fatal(err)
	}
	defer watch.Close(f.ctx)
	hold, err := holdConn.Begin(f.ctx)
	if err != nil {
		t.Fatal(err)
	}
	defer hold.Rollback(f.ctx)
	if _, err := hold.Exec(f.ctx, `INSERT INTO inbox_subject (subject) VALUES ('fhir.input.race')`); err != nil {
		t.Fatal(err)
	}
	for i := range racers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			var p testPlan
			for _, r := range f.store.IngestBatch(f.ctx, raced[i], p.plan) {
				errs[i] = errors.Join(errs[i], r.Err)
			}
		}()
	}
	for deadline := time.Now().Add(30 * time.Second); ; {
		var waiting int
		if err := watch.QueryRow(f.ctx, `SELECT count(*) FROM pg_stat_activity
		    WHERE datname = current_database() AND wait_event_type = 'Lock'`).Scan(&waiting); err != nil {
			t.Fatal(err)
		}
		if waiting == racers {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("%d of %d groups wait on the uncommitted subject", waiting, racers)
		}
		time.Sleep(10 * time.Millisecond)
	}
	if err := hold.Commit(f.ctx); err != nil {
		t.Fatal(err)
	}
	wg.Wait()
	for i, err := range errs {
		if err != nil {
			t.Errorf("concurrent group %d with a new subject: %v", i, err)
		}
	}

	if strings.Contains(logged.String(), "one by one") {
		t.Errorf("a group was recorded message by message:\n%s", logged.String())
	}

	got := map[string]string{}
	rows, err := f.pool.Query(f.ctx, `SELECT encode(i.inbox_key, 'hex'), s.subject FROM inbox i JOIN inbox_subject s ON s.id = i.subject_id`)
	if err != nil {
		t.Fatal(err)
	}
	for rows.Next() {
		var k, s string
		if err := rows.Scan(&k, &s); err != nil {
			t.Fatal(err)
		}
		got[k] = s
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	if len(got) != len(want) || f.count(t, "inbox") != len(want) {
		t.Errorf("%d inbox rows with a subject (%d in all), want %d", len(got), f.count(t, "inbox"), len(want))
	}
	for k, s := range want {
		if got[k] != s {
			t.Errorf("inbox %s: subject %q, want %q", k[:12], got[k], s)
		}
	}
	// fhir.input.lab, fhir.input.bedside-7, fhir.input.device.novel,
	// site.test.fhir.input.adt, fhir.input.race: one row each.
	var n, distinct int
	if err := f.pool.QueryRow(f.ctx, `SELECT count(*), count(DISTINCT subject) FROM inbox_subject`).Scan(&n, &distinct); err != nil {
		t.Fatal(err)
	}
	if n != 5 || distinct != 5 {
		t.Errorf("inbox_subject: %d rows, %d distinct subjects, want 5 and 5", n, distinct)
	}
}

// TestSeededSubjectDoesNotWaitForAnotherGroup: as
// TestSeededTermDoesNotWaitForAnotherGroup for terms, a group's new input
// subject is committed before the group's transaction, so a second group
// (another replica) bringing the same new subject does not wait on
// inbox_subject's unique index for the first group to commit.
func TestSeededSubjectDoesNotWaitForAnotherGroup(t *testing.T) {
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
	const subject = "fhir.input.bedside-12"
	readingA := message(subject, 1, vent(p1, "subj-a", fhirmap.QMinuteVol, t0.Add(-time.Minute), 10, "L/min"))
	gasA := message(subject, 2, abg(p1, "subj-gas", t0, 44))
	doneA := make(chan []consumer.BatchResult, 1)
	go func() { doneA <- f.store.IngestBatch(f.ctx, []consumer.Message{readingA, gasA}, held) }()
	select {
	case <-entered:
	case <-time.After(30 * time.Second):
		close(release)
		t.Fatal("group A never planned its blood gas")
	}
	pool2, err := pgxpool.New(f.ctx, f.url)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(pool2.Close)
	other := postgres.New(pool2, postgres.Options{PatientKey: testKey, Now: clock()})
	doneB := make(chan []consumer.BatchResult, 1)
	go func() {
		doneB <- other.IngestBatch(f.ctx, []consumer.Message{
			message(subject, 3, vent(p2, "subj-b", fhirmap.QMinuteVol, t0, 11, "L/min")),
			message(subject, 4, vent(p2, "subj-c", fhirmap.QMinuteVol, t0.Add(time.Minute), 12, "L/min")),
		}, p.plan)
	}()
	select {
	case res := <-doneB:
		for _, r := range res {
			if r.Err != nil {
				t.Errorf("group B: %v", r.Err)
			}
		}
	case <-time.After(5 * time.Second):
		t.Error("group B waited for group A's transaction: the new subject was not committed before it")
	}
	close(release)
	for _, r := range <-doneA {
		if r.Err != nil {
			t.Errorf("group A: %v", r.Err)
		}
	}
	var rows, subjects int
	if err := f.pool.QueryRow(f.ctx, `SELECT count(*), count(DISTINCT subject_id) FROM inbox`).Scan(&rows, &subjects); err != nil {
		t.Fatal(err)
	}
	if rows != 4 || subjects != 1 || f.count(t, "inbox_subject") != 1 {
		t.Errorf("%d inbox rows naming %d subjects (%d lookup rows), want 4, 1, 1", rows, subjects, f.count(t, "inbox_subject"))
	}
}

// TestSeedSubjectFailureWarns: when committing a new subject before the
// group's transaction fails, the store logs it at Warn (a lasting failure,
// such as a missing grant, would otherwise silently bring back the wait
// across groups that seeding avoids), once per subject: a second group
// with the same subject logs it at Debug only. The failure is made here by
// a CHECK that refuses the subject (so the group's own claim refuses it
// too; what is checked is the log).
func TestSeedSubjectFailureWarns(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	if _, err := f.pool.Exec(f.ctx, `ALTER TABLE inbox_subject
	    ADD CONSTRAINT test_refused_subject CHECK (subject <> 'fhir.input.unseedable')`); err != nil {
		t.Fatal(err)
	}
	var logged lockedBuffer
	store := postgres.New(f.pool, postgres.Options{PatientKey: testKey, Now: clock(),
		Logger: slog.New(slog.NewTextHandler(&logged, nil))})
	var p testPlan
	for round := range 2 {
		group := []consumer.Message{
			message("fhir.input.unseedable", uint64(1+2*round), vent(p1, fmt.Sprintf("ve-u%d-1", round), fhirmap.QMinuteVol, t0.Add(time.Duration(round)*time.Hour), 10, "L/min")),
			message("fhir.input.unseedable", uint64(2+2*round), vent(p1, fmt.Sprintf("ve-u%d-2", round), fhirmap.QMinuteVol, t0.Add(time.Duration(round)*time.Hour+time.Minute), 11, "L/min")),
		}
		for i, r := range store.IngestBatch(f.ctx, group, p.plan) {
			if r.Err == nil {
				t.Errorf("round %d message %d: recorded, want the CHECK's refusal", round, i)
			}
		}
	}
	l := logged.String()
	warned := 0
	for _, line := range strings.Split(l, "\n") {
		if strings.Contains(line, "level=WARN") && strings.Contains(line, "seed inbox subjects") {
			warned++
			if !strings.Contains(line, "fhir.input.unseedable") {
				t.Errorf("the warning does not name the subject: %s", line)
			}
		}
	}
	if warned != 1 {
		t.Errorf("%d warnings of the seed's failure over two groups, want 1:\n%s", warned, l)
	}
}
