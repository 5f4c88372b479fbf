package postgres_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"reflect"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgconn"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/consumer/rawcodec"
	"github.com/ventderive/ventderive/fhirmap"
)

const p1 = "Patient/lg-icu-0001" // invented

func TestIngestDuplicate(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	msg := message("fhir.input.lab", 7, abg(p1, "abg-1", t0, 45), vent(p1, "ve-1", fhirmap.QMinuteVol, t0.Add(-5*time.Minute), 10, "L/min"))
	var p testPlan
	res, err := f.store.Ingest(f.ctx, msg, p.plan)
	if err != nil {
		t.Fatalf("first Ingest: %v", err)
	}
	if res.Facts != 2 || res.Derivations != 1 || res.Outbox != 1 || res.DerivedKinds[kindVDVT] != 1 {
		t.Fatalf("first Ingest = %+v, want 2 facts, 1 derivation, 1 outbox row", res)
	}
	res, err = f.store.Ingest(f.ctx, msg, p.plan)
	if !errors.Is(err, consumer.ErrDuplicate) {
		t.Fatalf("second Ingest: err = %v (result %+v), want ErrDuplicate", err, res)
	}
	if len(p.snaps) != 1 {
		t.Errorf("plan called %d times, want once", len(p.snaps))
	}
	// Migration 0011: the resources are kept inside the message's bytes in
	// its inbox row, not one row each.
	for table, want := range map[string]int{"inbox": 1, "input_resource": 0, "fact": 2, "derivation": 1, "derivation_input": 2, "outbox": 1, "head": 1} {
		if got := f.count(t, table); got != want {
			t.Errorf("%s rows = %d, want %d", table, got, want)
		}
	}
	var raw []byte
	if err := f.pool.QueryRow(f.ctx, `SELECT raw FROM inbox WHERE inbox_key = decode($1, 'hex')`, msg.InboxKey).Scan(&raw); err != nil {
		t.Fatalf("inbox raw: %v", err)
	}
	// Migration 0015: stored as a zstd frame, read back through the one
	// decoder with the dictionaries the database holds.
	if !rawcodec.IsCompressed(raw) {
		t.Errorf("inbox raw is not a zstd frame: %q", raw)
	}
	c, err := postgres.PayloadCodec(f.ctx, f.pool)
	if err != nil {
		t.Fatal(err)
	}
	if got, err := postgres.DecodePayload(c, msg.InboxKey, raw); err != nil || !bytes.Equal(got, msg.Raw) {
		t.Errorf("inbox raw decodes to %q (%v), want the payload %q", got, err, msg.Raw)
	}
}

// TestFactRoundTrip checks that every field of a Fact comes back as written.
func TestFactRoundTrip(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	full := abg(p1, "abg-rt", t0, 44.25).fact()
	full.Key = "Observation/abg-rt#http://loinc.org|2019-8"
	full.VersionID = "3"
	full.LastUpdated = time.Date(2026, 3, 1, 8, 20, 1, 123456000, time.UTC)
	full.Encounter = "Encounter/lg-enc-77"
	full.Detail = "total"
	full.TempCorrected = true
	full.Text = "free text"
	full.SourceValue, full.SourceUnit = 5.9, "kPa"
	full.Code = fhirmap.Coding{System: "http://loinc.org", Code: "2019-8", Display: "Carbon dioxide [Partial pressure] in Arterial blood"}
	full.Status = fhirmap.StatusCorrected
	full.Issued = time.Date(2026, 3, 1, 8, 31, 0, 999000, time.UTC)
	sex := fhirmap.Fact{Key: p1 + "#sex", Resource: p1, Digest: sha([]byte("patient")), Patient: p1,
		Quantity: fhirmap.QSex, Text: "female", Status: fhirmap.StatusFinal, Effective: t0.Add(-48 * time.Hour)}
	msg := message("fhir.input.lab", 1, abg(p1, "abg-rt", t0, 44.25))
	msg.Facts = []fhirmap.Fact{full, sex}
	msg.Resources = append(msg.Resources, fhirmap.Resource{Type: "Patient", Reference: p1, Patient: p1, Digest: sha([]byte("patient")), Raw: []byte("patient")})

	var p testPlan
	if _, err := f.store.Ingest(f.ctx, msg, p.plan); err != nil {
		t.Fatalf("Ingest: %v", err)
	}
	if len(p.snaps) != 1 {
		t.Fatalf("plan called %d times, want 1", len(p.snaps))
	}
	got := p.snaps[0].Facts
	if len(got) != 2 {
		t.Fatalf("snapshot has %d facts, want 2", len(got))
	}
	for i, want := range []fhirmap.Fact{full, sex} {
		if !reflect.DeepEqual(got[i], want) {
			t.Errorf("fact %d read back differs:\n got %#v\nwant %#v", i, got[i], want)
		}
	}
	if !slices.Equal(p.snaps[0].Affected, []string{full.Key}) || p.snaps[0].Patient != p1 {
		t.Errorf("snapshot patient %q affected %v, want %q [%s]", p.snaps[0].Patient, p.snaps[0].Affected, p1, full.Key)
	}
}

func TestIngestAllOrNothing(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	msg := message("fhir.input.lab", 1, abg(p1, "abg-1", t0, 45), vent(p1, "ve-1", fhirmap.QMinuteVol, t0, 10, "L/min"))
	boom := errors.New("plan failed")
	_, err := f.store.Ingest(f.ctx, msg, func(consumer.Snapshot) (consumer.Changes, error) { return consumer.Changes{}, boom })
	if !errors.Is(err, boom) || errors.Is(err, consumer.ErrTransient) {
		t.Fatalf("Ingest with failing plan: err = %v, want the plan's error, not transient", err)
	}
	for _, table := range []string{"inbox", "input_resource", "fact", "derivation", "outbox", "head"} {
		if n := f.count(t, table); n != 0 {
			t.Errorf("%s has %d rows after a failed plan, want 0", table, n)
		}
	}

	// A plan whose derivation breaks a CHECK (a fraction above 1) fails at
	// write time: still nothing written, and the error names the constraint
	// without echoing values.
	var p testPlan
	_, err = f.store.Ingest(f.ctx, msg, func(s consumer.Snapshot) (consumer.Changes, error) {
		ch, err := p.plan(s)
		ch.Derivations[0].Result.Value = 1.5
		return ch, err
	})
	var dbErr *postgres.DBError
	if !errors.As(err, &dbErr) || dbErr.Constraint != "derivation_fraction_in_range" {
		t.Fatalf("Ingest of VD/VT 1.5: err = %v, want DBError of derivation_fraction_in_range", err)
	}
	if strings.Contains(err.Error(), p1) {
		t.Errorf("error %q names the patient", err)
	}
	if n := f.count(t, "inbox"); n != 0 {
		t.Errorf("inbox has %d rows after a failed write, want 0", n)
	}

	// The inbox was not claimed: the same message goes through now.
	res, err := f.store.Ingest(f.ctx, msg, new(testPlan).plan)
	if err != nil || res.Derivations != 1 {
		t.Fatalf("Ingest after failures = %+v, %v; want 1 derivation", res, err)
	}
}

// TestAffected checks which stored blood gases a new fact reopens. The blood
// gas is at t0; the window is 30 min before to 10 min after it.
func TestAffected(t *testing.T) {
	t.Parallel()
	tests := []struct {
		name     string
		late     obs
		affected bool
	}{
		{"minute volume 5 min after", vent(p1, "ve-late", fhirmap.QMinuteVol, t0.Add(5*time.Minute), 9, "L/min"), true},
		{"minute volume 10 min after (edge)", vent(p1, "ve-late", fhirmap.QMinuteVol, t0.Add(10*time.Minute), 9, "L/min"), true},
		{"minute volume 11 min after", vent(p1, "ve-late", fhirmap.QMinuteVol, t0.Add(11*time.Minute), 9, "L/min"), false},
		{"minute volume 30 min before (edge)", vent(p1, "ve-late", fhirmap.QMinuteVol, t0.Add(-30*time.Minute), 9, "L/min"), true},
		{"minute volume 31 min before", vent(p1, "ve-late", fhirmap.QMinuteVol, t0.Add(-31*time.Minute), 9, "L/min"), false},
		{"height 10 days before", vent(p1, "height", fhirmap.QHeight, t0.Add(-240*time.Hour), 170, "cm"), true},
		{"weight 1 day after", vent(p1, "weight", fhirmap.QWeight, t0.Add(24*time.Hour), 70, "kg"), true},
		{"other patient's minute volume", vent("Patient/lg-icu-0002", "ve-other", fhirmap.QMinuteVol, t0, 9, "L/min"), false},
		// Body temperature has its own window, 2 h before to 30 min after
		// (fhirmap.Site.TemperatureWindow: charted hourly [common practice]).
		{"temperature 90 min before", vent(p1, "temp-late", fhirmap.QBodyTemp, t0.Add(-90*time.Minute), 36.2, "Cel"), true},
		{"temperature 2 h before (edge)", vent(p1, "temp-late", fhirmap.QBodyTemp, t0.Add(-2*time.Hour), 36.2, "Cel"), true},
		{"temperature 2 h 1 min before", vent(p1, "temp-late", fhirmap.QBodyTemp, t0.Add(-121*time.Minute), 36.2, "Cel"), false},
		{"temperature 30 min after (edge)", vent(p1, "temp-late", fhirmap.QBodyTemp, t0.Add(30*time.Minute), 36.2, "Cel"), true},
		{"temperature 31 min after", vent(p1, "temp-late", fhirmap.QBodyTemp, t0.Add(31*time.Minute), 36.2, "Cel"), false},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			t.Parallel()
			f := newFixture(t)
			early := vent(p1, "ve-early", fhirmap.QMinuteVol, t0.Add(-50*time.Minute), 8, "L/min") // outside the window
			// Eight more readings further out, then one beyond them, and a
			// body temperature inside the temperature window only.
			temp := vent(p1, "temp-early", fhirmap.QBodyTemp, t0.Add(-100*time.Minute), 36.4, "Cel")
			older := []obs{abg(p1, "abg-1", t0, 45), early, temp}
			for i := range 8 {
				older = append(older, vent(p1, fmt.Sprintf("rr-%d", i), fhirmap.QRespRate, t0.Add(-time.Duration(60+i)*time.Minute), 14, "/min"))
			}
			older = append(older, vent(p1, "ve-far", fhirmap.QMinuteVol, t0.Add(-3*time.Hour), 8, "L/min"))
			var p testPlan
			if _, err := f.store.Ingest(f.ctx, message("fhir.input.lab", 1, older...), p.plan); err != nil {
				t.Fatal(err)
			}
			p.snaps = nil
			res, err := f.store.Ingest(f.ctx, message("fhir.input.device", 2, tc.late), p.plan)
			if err != nil {
				t.Fatal(err)
			}
			if res.Facts != 1 {
				t.Errorf("Facts = %d, want 1", res.Facts)
			}
			if !tc.affected {
				if len(p.snaps) != 0 {
					t.Fatalf("plan called with %+v, want no call", p.snaps)
				}
				return
			}
			if len(p.snaps) != 1 || !slices.Equal(p.snaps[0].Affected, []string{"Observation/abg-1"}) {
				t.Fatalf("snapshots %+v, want one with Affected [Observation/abg-1]", p.snaps)
			}
			keys := factKeys(p.snaps[0].Facts)
			if !slices.Contains(keys, "Observation/abg-1") || !slices.Contains(keys, tc.late.fact().Key) {
				t.Errorf("snapshot facts %v lack the blood gas or the new fact", keys)
			}
			// The reading 50 min before is outside the window: it is loaded
			// only as the nearest reading outside it (for the detail of a
			// "no-ventilator-data-in-window" refusal), and the far one
			// beyond the nearestOutside nearest is not loaded at all.
			if !slices.Contains(keys, "Observation/ve-early") {
				t.Errorf("snapshot facts %v lack the nearest reading outside the window", keys)
			}
			if slices.Contains(keys, "Observation/ve-far") {
				t.Errorf("snapshot facts %v hold a reading beyond the nearest ones outside the window", keys)
			}
			if !slices.Contains(keys, "Observation/temp-early") {
				t.Errorf("snapshot facts %v lack the body temperature 100 min before the blood gas", keys)
			}
		})
	}
}

func factKeys(fs []fhirmap.Fact) []string {
	var ks []string
	for _, f := range fs {
		ks = append(ks, f.Key)
	}
	return ks
}

// TestVersionsAndHead follows one derivation key through a first value, an
// amendment of its blood gas, a refusal and a new value.
func TestVersionsAndHead(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	var p testPlan
	ingest := func(seq uint64, os ...obs) consumer.IngestResult {
		t.Helper()
		res, err := f.store.Ingest(f.ctx, message("fhir.input.lab", seq, os...), p.plan)
		if err != nil {
			t.Fatalf("Ingest %d: %v", seq, err)
		}
		return res
	}
	dkey := p1 + "|Observation/abg-1|" + kindVDVT
	head := func() (version int, refused bool, status string) {
		t.Helper()
		if err := f.pool.QueryRow(f.ctx, `SELECT version, refused, status FROM head WHERE key = $1`, dkey).Scan(&version, &refused, &status); err != nil {
			t.Fatal(err)
		}
		return
	}

	ingest(1, abg(p1, "abg-1", t0, 45)) // no minute volume yet: refused
	if v, r, _ := head(); v != 0 || !r {
		t.Fatalf("after a refusal head = version %d refused %v, want 0 true", v, r)
	}
	ingest(2, vent(p1, "ve-1", fhirmap.QMinuteVol, t0.Add(-2*time.Minute), 10, "L/min"))
	if v, r, s := head(); v != 1 || r || s != "final" {
		t.Fatalf("after the first value head = %d %v %s, want 1 false final", v, r, s)
	}
	amended := abg(p1, "abg-1", t0, 50)
	amended.version, amended.status = "2", fhirmap.StatusAmended
	res := ingest(3, amended)
	if res.Derivations != 1 {
		t.Fatalf("amendment gave %+v, want a new version", res)
	}
	last := p.snaps[len(p.snaps)-1]
	if len(last.Current) != 1 || last.Current[0].Version != 1 || last.Current[0].Refused || last.Current[0].Kind != kindVDVT {
		t.Errorf("Current given to plan = %+v, want version 1 of %s", last.Current, kindVDVT)
	}
	if n := len(factsOf(last.Facts, "Observation/abg-1")); n != 2 {
		t.Errorf("snapshot holds %d versions of the blood gas, want 2", n)
	}
	if v, _, s := head(); v != 2 || s != "amended" {
		t.Fatalf("after amendment head = %d %s, want 2 amended", v, s)
	}
	retracted := abg(p1, "abg-1", t0, 50)
	retracted.version, retracted.status = "3", fhirmap.StatusEnteredInError
	ingest(4, retracted)
	if v, r, s := head(); v != 2 || !r || s != "amended" {
		t.Fatalf("after refusal head = %d %v %s, want 2 true amended (the last value's)", v, r, s)
	}

	var supersedes []int
	rows, err := f.pool.Query(f.ctx, `SELECT coalesce(p.version, 0) FROM derivation d LEFT JOIN derivation p ON p.id = d.supersedes_id WHERE d.key = $1 ORDER BY d.version`, dkey)
	if err != nil {
		t.Fatal(err)
	}
	for rows.Next() {
		var v int
		rows.Scan(&v)
		supersedes = append(supersedes, v)
	}
	if !slices.Equal(supersedes, []int{0, 1}) {
		t.Errorf("versions supersede %v, want [0 1]", supersedes)
	}
	if n := f.count(t, "refusal"); n != 2 {
		t.Errorf("refusals = %d, want 2", n)
	}
}

func factsOf(fs []fhirmap.Fact, key string) []fhirmap.Fact {
	var out []fhirmap.Fact
	for _, f := range fs {
		if f.Key == key {
			out = append(out, f)
		}
	}
	return out
}

func TestDeadLetter(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	msg := consumer.Message{Subject: "fhir.input.lab", StreamSeq: 9, Raw: []byte("{not json")}
	msg.InboxKey = sha(msg.Raw)
	for range 2 {
		if err := f.store.DeadLetter(f.ctx, msg, "invalid-json", "offset 1"); err != nil {
			t.Fatal(err)
		}
	}
	if n := f.count(t, "dead_letter"); n != 1 {
		t.Errorf("dead letters = %d, want 1", n)
	}
	var dbErr *postgres.DBError
	if err := f.store.DeadLetter(f.ctx, consumer.Message{InboxKey: sha([]byte("x")), Subject: "s"}, "Not A Code", ""); !errors.As(err, &dbErr) || dbErr.Constraint != "dead_letter_reason_check" {
		t.Errorf("dead letter with a malformed reason: err = %v, want dead_letter_reason_check", err)
	}
}

func TestTranslateHidesDetail(t *testing.T) {
	t.Parallel()
	tests := []struct {
		name      string
		err       *pgconn.PgError
		transient bool
	}{
		{"unique violation", &pgconn.PgError{Code: "23505", Message: `duplicate key value violates unique constraint "fact_key_digest_key"`, Detail: "Key (key)=(Patient/lg-icu-0001#sex) already exists.", ConstraintName: "fact_key_digest_key"}, false},
		{"serialization failure", &pgconn.PgError{Code: "40001", Detail: "Patient/lg-icu-0001"}, true},
		{"deadlock", &pgconn.PgError{Code: "40P01", Detail: "Patient/lg-icu-0001"}, true},
		{"admin shutdown", &pgconn.PgError{Code: "57P01", Detail: "Patient/lg-icu-0001"}, true},
		{"connection failure class 08", &pgconn.PgError{Code: "08006", Detail: "Patient/lg-icu-0001"}, true},
		{"check violation", &pgconn.PgError{Code: "23514", Message: "Patient/lg-icu-0001", Detail: "Failing row contains (Patient/lg-icu-0001)", ConstraintName: "fact_status_check"}, false},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			err := postgres.TranslateForTest("op", tc.err)
			if strings.Contains(err.Error(), "lg-icu-0001") {
				t.Errorf("error %q echoes a patient reference", err)
			}
			var pgErr *pgconn.PgError
			if errors.As(err, &pgErr) {
				t.Errorf("the PgError (with its Detail) is still reachable through %q", err)
			}
			if errors.Is(err, consumer.ErrTransient) != tc.transient {
				t.Errorf("transient = %v, want %v (%v)", !tc.transient, tc.transient, err)
			}
		})
	}
}

// TestIngestDatabaseDown stops a PostgreSQL of the test's own (never the
// shared one) and checks that Ingest reports a transient error, then works
// again after a restart on the same port and data.
func TestIngestDatabaseDown(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	c, err := pgtest.StartCluster(ctx, t.TempDir())
	if err != nil {
		pgtest.NoServer(t, err)
	}
	defer c.Close()
	u, err := pgtest.WithDatabase(c.URL(), "postgres")
	if err != nil {
		t.Fatal(err)
	}
	f := fixtureAt(t, u)
	conn, err := f.pool.Acquire(ctx)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := migrationsApply(ctx, conn); err != nil {
		t.Fatal(err)
	}
	conn.Release()

	if _, err := f.store.Ingest(ctx, message("fhir.input.lab", 1, abg(p1, "abg-1", t0, 45)), new(testPlan).plan); err != nil {
		t.Fatal(err)
	}
	if err := c.Stop(ctx, "immediate"); err != nil {
		t.Fatal(err)
	}
	msg := message("fhir.input.lab", 2, vent(p1, "ve-1", fhirmap.QMinuteVol, t0, 10, "L/min"))
	if _, err := f.store.Ingest(ctx, msg, new(testPlan).plan); !errors.Is(err, consumer.ErrTransient) {
		t.Fatalf("Ingest with the database down: err = %v, want ErrTransient", err)
	}
	if err := f.store.Ping(ctx); !errors.Is(err, consumer.ErrTransient) {
		t.Errorf("Ping with the database down: err = %v, want ErrTransient", err)
	}
	if err := c.Start(ctx); err != nil {
		t.Fatal(err)
	}
	var res consumer.IngestResult
	for range 50 { // the pool drops its dead connections as it meets them
		res, err = f.store.Ingest(ctx, msg, new(testPlan).plan)
		if !errors.Is(err, consumer.ErrTransient) {
			break
		}
		time.Sleep(100 * time.Millisecond)
	}
	if err != nil || res.Derivations != 1 {
		t.Fatalf("Ingest after restart = %+v, %v; want 1 derivation", res, err)
	}
}
