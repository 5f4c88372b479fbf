package postgres_test

import (
	"errors"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/fhirmap"
)

// dropFactSQL makes the test store skip, silently, the insert of every
// fact_row whose key is $1: what ON CONFLICT DO NOTHING does to a fact
// whose key shares the 64-bit hash of fact_row's unique index (migration
// 0017) with another key's row of the same digest and effective time. A
// real 64-bit collision cannot be found in a test, so a BEFORE INSERT
// trigger that returns NULL stands in for the conflict: the insert reports
// one row fewer and no row has the fact's key.
const dropFactSQL = `
CREATE FUNCTION test_drop_fact() RETURNS trigger LANGUAGE plpgsql AS $$
BEGIN
    IF NEW.key = current_setting('test.drop_key', true) THEN
        RETURN NULL;
    END IF;
    RETURN NEW;
END;
$$;
CREATE TRIGGER test_drop_fact BEFORE INSERT ON fact_row FOR EACH ROW EXECUTE FUNCTION test_drop_fact()`

func dropFact(t *testing.T, f *fixture, key string) {
	t.Helper()
	if _, err := f.pool.Exec(f.ctx, dropFactSQL); err != nil {
		t.Fatal(err)
	}
	// A database default, so that every pooled connection sees it.
	var db string
	if err := f.pool.QueryRow(f.ctx, `SELECT current_database()`).Scan(&db); err != nil {
		t.Fatal(err)
	}
	if _, err := f.pool.Exec(f.ctx, `ALTER DATABASE "`+db+`" SET test.drop_key = '`+key+`'`); err != nil {
		t.Fatal(err)
	}
	f.pool.Reset() // new connections read the database's setting
}

// TestFactKeyCollisionRefusesMessage: a fact the insert skipped although no
// row holds its key (a key-hash collision, see dropFactSQL) makes the
// message fail loudly with ErrFactKeyCollision, permanently (a dead letter,
// not a retry), and nothing of it is stored: not its inbox row, not its
// other facts. Without the writer's guard (guardSkipped) the message was
// acknowledged with one fact fewer. Each path that inserts facts is
// covered: one message alone (Ingest), a group's cold messages (one insert
// for the group), a group's hot message stored alone, and a wave of hot
// messages.
func TestFactKeyCollisionRefusesMessage(t *testing.T) {
	t.Parallel()
	const p3 = "Patient/lg-icu-0003" // invented
	cases := []struct {
		name string
		msgs func() []consumer.Message
		bad  int
	}{
		{"one message", func() []consumer.Message {
			return []consumer.Message{message("fhir.input.vent", 1,
				vent(p1, "ve-1", fhirmap.QMinuteVol, t0, 10, "L/min"), vent(p1, "lost-1", fhirmap.QTidalVol, t0, 450, "mL"))}
		}, 0},
		{"group, cold", func() []consumer.Message {
			return []consumer.Message{
				message("fhir.input.vent", 1, vent(p1, "ve-1", fhirmap.QMinuteVol, t0, 10, "L/min")),
				message("fhir.input.vent", 2, vent(p2, "ve-2", fhirmap.QMinuteVol, t0, 9, "L/min"), vent(p2, "lost-1", fhirmap.QTidalVol, t0, 450, "mL")),
				message("fhir.input.vent", 3, vent(p3, "ve-3", fhirmap.QMinuteVol, t0, 11, "L/min")),
			}
		}, 1},
		{"group, hot alone", func() []consumer.Message {
			return []consumer.Message{
				message("fhir.input.vent", 1, vent(p1, "ve-1", fhirmap.QMinuteVol, t0, 10, "L/min")),
				message("fhir.input.lab", 2, abg(p2, "abg-2", t0, 50), vent(p2, "lost-1", fhirmap.QMinuteVol, t0, 9, "L/min")),
			}
		}, 1},
		{"group, hot wave", func() []consumer.Message {
			return []consumer.Message{
				message("fhir.input.lab", 1, abg(p1, "abg-1", t0, 45), vent(p1, "ve-1", fhirmap.QMinuteVol, t0, 10, "L/min")),
				message("fhir.input.lab", 2, abg(p2, "abg-2", t0, 50), vent(p2, "lost-1", fhirmap.QMinuteVol, t0, 9, "L/min")),
				message("fhir.input.lab", 3, abg(p3, "abg-3", t0, 41), vent(p3, "ve-3", fhirmap.QMinuteVol, t0, 11, "L/min")),
			}
		}, 1},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			t.Parallel()
			f := newFixture(t)
			dropFact(t, f, "Observation/lost-1")
			msgs := c.msgs()
			var p testPlan
			res := f.store.IngestBatch(f.ctx, msgs, p.plan)
			for i, r := range res {
				if i == c.bad {
					if !errors.Is(r.Err, postgres.ErrFactKeyCollision) || errors.Is(r.Err, consumer.ErrTransient) {
						t.Errorf("message %d: %+v, %v; want a permanent ErrFactKeyCollision", i, r.IngestResult, r.Err)
					}
					continue
				}
				if r.Err != nil {
					t.Errorf("message %d: %v, want stored", i, r.Err)
				}
			}
			var stored int
			if err := f.pool.QueryRow(f.ctx, `SELECT count(*) FROM inbox WHERE inbox_key = decode($1, 'hex')`, msgs[c.bad].InboxKey).Scan(&stored); err != nil {
				t.Fatal(err)
			}
			if stored != 0 {
				t.Errorf("the refused message's inbox row was stored")
			}
			var facts int
			if err := f.pool.QueryRow(f.ctx, `SELECT count(*) FROM fact WHERE patient_ref = $1`, msgs[c.bad].Facts[0].Patient).Scan(&facts); err != nil {
				t.Fatal(err)
			}
			if facts != 0 {
				t.Errorf("%d facts of the refused message were stored, want 0", facts)
			}
			if want := len(msgs) - 1; f.count(t, "inbox") != want {
				t.Errorf("inbox has %d rows, want the %d other messages", f.count(t, "inbox"), want)
			}
		})
	}
}

// TestFactDedupAndLatestVersionByKeyHash: with the unique index on the
// key's hash (migration 0017), a fact version re-sent in another message
// (other bytes, so another inbox key) stores nothing new and is not taken
// for a collision, a new version of the key is stored, and the snapshot of
// a later blood gas finds the key through its hash and holds its latest
// version.
func TestFactDedupAndLatestVersionByKeyHash(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	var p testPlan
	v1 := vent(p1, "ve-1", fhirmap.QMinuteVol, t0, 10, "L/min")
	v2 := v1
	v2.version, v2.value, v2.status = "2", 8, fhirmap.StatusAmended
	steps := []struct {
		msg   consumer.Message
		facts int
	}{
		{message("fhir.input.vent", 1, v1), 1},
		{message("fhir.input.vent", 2, v2), 1},
		// v1 again beside a new reading: only the new reading is stored.
		{message("fhir.input.vent", 3, v1, vent(p1, "vt-1", fhirmap.QTidalVol, t0, 450, "mL")), 1},
		// The blood gas, with v1 re-sent once more.
		{message("fhir.input.lab", 4, abg(p1, "abg-1", t0.Add(time.Minute), 45), v1), 1},
	}
	for i, s := range steps {
		res, err := f.store.Ingest(f.ctx, s.msg, p.plan)
		if err != nil {
			t.Fatalf("message %d: %v", i+1, err)
		}
		if res.Facts != s.facts {
			t.Errorf("message %d stored %d facts, want %d", i+1, res.Facts, s.facts)
		}
	}
	var rows, versions int
	if err := f.pool.QueryRow(f.ctx, `SELECT count(*), count(*) FILTER (WHERE key = 'Observation/ve-1') FROM fact_row`).Scan(&rows, &versions); err != nil {
		t.Fatal(err)
	}
	if rows != 4 || versions != 2 {
		t.Errorf("fact_row holds %d rows, %d of ve-1; want 4 and 2", rows, versions)
	}
	if len(p.snaps) == 0 {
		t.Fatal("the blood gas was planned with no snapshot")
	}
	snap := p.snaps[len(p.snaps)-1]
	got := latest(snap.Facts, "Observation/ve-1")
	if got.Digest != v2.resource().Digest || got.Value != 8 {
		t.Errorf("latest ve-1 in the blood gas's snapshot: value %v digest %s, want version 2 (8, %s)", got.Value, got.Digest, v2.resource().Digest)
	}
}
