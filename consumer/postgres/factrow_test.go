package postgres_test

import (
	"encoding/binary"
	"math"
	"reflect"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgtype"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// storedFact is a fact as the view fact returns it, with its floats as
// their IEEE 754 bits (so that -0 and 0 differ), and how fact_row holds
// it (migration 0016).
type storedFact struct {
	fact                  fhirmap.Fact
	valueBits, sourceBits uint64
	inbox                 string
	recorded              time.Time
	// In fact_row: inbox_id is the message's inbox row, and which of
	// source_value, recorded_at and inbox_key are stored.
	inboxIDMatches, hasSource, hasRecorded, hasInboxKey bool
}

func readStoredFacts(t *testing.T, f *fixture) map[string]storedFact {
	t.Helper()
	rows, err := f.pool.Query(f.ctx, `
SELECT v.key, v.digest, v.resource_ref, v.version_id, v.last_updated, v.patient_ref, v.encounter, v.quantity, v.origin,
       v.detail, v.specimen, v.temp_corrected, v.value, v.unit, v.text, v.source_value, v.source_unit, v.code_system,
       v.code, v.code_display, v.status, v.effective, v.issued, v.inbox_key, v.recorded_at,
       float8send(v.value), float8send(v.source_value),
       r.inbox_id IS NOT NULL AND r.inbox_id = i.id AND encode(i.inbox_key, 'hex') = v.inbox_key, r.source_value IS NOT NULL,
       r.recorded_at IS NOT NULL, r.inbox_key IS NOT NULL
FROM fact v JOIN fact_row r ON r.id = v.id LEFT JOIN inbox i ON i.id = r.inbox_id
ORDER BY v.id`)
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]storedFact{}
	_, err = pgx.CollectRows(rows, func(row pgx.CollectableRow) (struct{}, error) {
		var s storedFact
		var lastUpd, issued pgtype.Timestamptz
		var qty, org, spc, st string
		var vb, sb []byte
		err := row.Scan(&s.fact.Key, &s.fact.Digest, &s.fact.Resource, &s.fact.VersionID, &lastUpd, &s.fact.Patient,
			&s.fact.Encounter, &qty, &org, &s.fact.Detail, &spc, &s.fact.TempCorrected, &s.fact.Value, &s.fact.Unit,
			&s.fact.Text, &s.fact.SourceValue, &s.fact.SourceUnit, &s.fact.Code.System, &s.fact.Code.Code,
			&s.fact.Code.Display, &st, &s.fact.Effective, &issued, &s.inbox, &s.recorded, &vb, &sb,
			&s.inboxIDMatches, &s.hasSource, &s.hasRecorded, &s.hasInboxKey)
		if err != nil {
			return struct{}{}, err
		}
		s.fact.Quantity, s.fact.Origin, s.fact.Specimen, s.fact.Status = fhirmap.Quantity(qty), fhirmap.Origin(org), fhirmap.Specimen(spc), fhirmap.Status(st)
		s.fact.Effective, s.recorded = s.fact.Effective.UTC(), s.recorded.UTC()
		if lastUpd.Valid {
			s.fact.LastUpdated = lastUpd.Time.UTC()
		}
		if issued.Valid {
			s.fact.Issued = issued.Time.UTC()
		}
		s.valueBits, s.sourceBits = binary.BigEndian.Uint64(vb), binary.BigEndian.Uint64(sb)
		out[s.fact.Key] = s
		return struct{}{}, nil
	})
	if err != nil {
		t.Fatal(err)
	}
	return out
}

// TestFactRowNarrowRoundTrip stores facts through Ingest (one message) and
// IngestBatch (a group of ventilator messages, stored by the cold path's
// single insert) and reads them back through the view fact: every field as
// written, the source value's sign included (-0 beside a value of 0), the
// message's inbox key and its inbox row's recording time; fact_row holds
// the inbox by id and stores no recording time, no inbox key and no source
// value equal to the value (migration 0016).
func TestFactRowNarrowRoundTrip(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	negZero := math.Copysign(0, -1)

	gas := abg(p1, "abg-nr", t0, 44.25).fact()
	gas.SourceValue, gas.SourceUnit = 5.9, "kPa"
	gas.Issued = t0.Add(20 * time.Minute)
	gas.LastUpdated = t0.Add(21 * time.Minute)
	gas.Encounter = "Encounter/lg-enc-12"
	zero := vent(p1, "peep-nr", fhirmap.QPEEP, t0.Add(-5*time.Minute), 0, "cm[H2O]").fact()
	zero.SourceValue = negZero
	one := message("fhir.input.lab", 1, abg(p1, "abg-nr", t0, 44.25), vent(p1, "peep-nr", fhirmap.QPEEP, t0.Add(-5*time.Minute), 0, "cm[H2O]"))
	one.Facts = []fhirmap.Fact{gas, zero}
	var p testPlan
	if _, err := f.store.Ingest(f.ctx, one, p.plan); err != nil {
		t.Fatalf("Ingest: %v", err)
	}

	// Two messages of ventilator readings of another patient, without a
	// blood gas: cold, stored by the group's one insert.
	m2 := message("fhir.input.vent", 2, vent(p2, "vt-nr1", fhirmap.QTidalVol, t0, 450, "mL"),
		vent(p2, "rr-nr1", fhirmap.QRespRate, t0, 18, "/min"))
	m3 := message("fhir.input.vent", 3, vent(p2, "vt-nr2", fhirmap.QTidalVol, t0.Add(time.Minute), 455, "mL"))
	m3.Facts[0].SourceValue, m3.Facts[0].SourceUnit = 0.455, "L"
	var gp testPlan
	for i, r := range f.store.IngestBatch(f.ctx, []consumer.Message{m2, m3}, gp.plan) {
		if r.Err != nil {
			t.Fatalf("IngestBatch message %d: %v", i, r.Err)
		}
	}
	if len(gp.snaps) != 0 {
		t.Errorf("the group planned %d snapshots, want none (every message cold)", len(gp.snaps))
	}

	recorded := map[string]time.Time{}
	rows, err := f.pool.Query(f.ctx, `SELECT encode(inbox_key, 'hex'), recorded_at FROM inbox`)
	if err != nil {
		t.Fatal(err)
	}
	var k string
	var at time.Time
	if _, err := pgx.ForEachRow(rows, []any{&k, &at}, func() error { recorded[k] = at.UTC(); return nil }); err != nil {
		t.Fatal(err)
	}

	got := readStoredFacts(t, f)
	n := 0
	for _, m := range []consumer.Message{one, m2, m3} {
		for _, want := range m.Facts {
			n++
			s, ok := got[want.Key]
			if !ok {
				t.Errorf("%s: not stored", want.Key)
				continue
			}
			if !reflect.DeepEqual(s.fact, want) {
				t.Errorf("%s read back differs:\n got %#v\nwant %#v", want.Key, s.fact, want)
			}
			if s.valueBits != math.Float64bits(want.Value) || s.sourceBits != math.Float64bits(want.SourceValue) {
				t.Errorf("%s: value bits %x source bits %x, want %x %x", want.Key, s.valueBits, s.sourceBits,
					math.Float64bits(want.Value), math.Float64bits(want.SourceValue))
			}
			if s.inbox != m.InboxKey || !s.recorded.Equal(recorded[m.InboxKey]) || recorded[m.InboxKey].IsZero() {
				t.Errorf("%s: inbox %s recorded %v, want %s %v", want.Key, s.inbox, s.recorded, m.InboxKey, recorded[m.InboxKey])
			}
			wantSource := math.Float64bits(want.SourceValue) != math.Float64bits(want.Value)
			if !s.inboxIDMatches || s.hasRecorded || s.hasInboxKey || s.hasSource != wantSource {
				t.Errorf("%s in fact_row: inbox id of its message %v, recorded_at stored %v, inbox_key stored %v, "+
					"source_value stored %v (want true, false, false, %v)", want.Key, s.inboxIDMatches, s.hasRecorded,
					s.hasInboxKey, s.hasSource, wantSource)
			}
		}
	}
	if len(got) != n {
		t.Errorf("%d facts stored, want %d", len(got), n)
	}
	if s := got[zero.Key]; !s.hasSource {
		t.Errorf("a source value of -0 beside a value of 0 was not stored")
	}
}
