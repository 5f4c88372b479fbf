package postgres_test

import (
	"os"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
)

// refuseAll refuses every affected blood gas for want of ventilator data,
// so that the nearest reading the reviewer is shown can be tested alone.
func refuseAll(s consumer.Snapshot) (consumer.Changes, error) {
	var ch consumer.Changes
	for _, key := range s.Affected {
		bg := latest(s.Facts, key)
		r := fhirmap.Refusal{Key: s.Patient + "|" + key + "|" + kindVDVT, Kind: kindVDVT, Patient: s.Patient, BloodGas: key,
			Effective: bg.Effective, Reason: fhirmap.ReasonNoVentilatorData, Detail: "no usable ventilator reading",
			Considered: []fhirmap.Input{{Role: fhirmap.RoleBloodGas, Fact: bg}}}
		r.Digest = sha([]byte(r.Key + bg.Digest))
		ch.Refusals = append(ch.Refusals, r)
	}
	return ch, nil
}

// TestRefusedNearestReading checks review_refusal_nearest through the
// reviewer role: every quantity fhirmap counts as a ventilator reading is
// found, and what fhirmap's pairing would not count is not.
func TestRefusedNearestReading(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	rolesSQL, err := os.ReadFile("../../deploy/postgres/roles.sql")
	if err != nil {
		t.Fatal(err)
	}
	pgtest.ApplyRoles(t, f.url, string(rolesSQL))
	reviewerPool := poolAs(t, f.ctx, f.url, "ventderive_reviewer")
	reviewer := postgres.NewReviewer(reviewerPool)
	// 0004's views are the reviewer's alone, and reach no table for it.
	writer := poolAs(t, f.ctx, f.url, "ventderive_writer")
	for _, view := range []string{"review_published", "review_refusal_nearest"} {
		if _, err := reviewerPool.Exec(f.ctx, "SELECT * FROM "+view); err != nil {
			t.Errorf("reviewer reads %s: %v", view, err)
		}
		_, err := writer.Exec(f.ctx, "SELECT * FROM "+view)
		wantDenied(t, "writer reads "+view, err)
	}

	ingest := func(os ...obs) {
		t.Helper()
		for i, o := range os {
			if _, err := f.store.Ingest(f.ctx, message("fhir.input.test", uint64(i), o), refuseAll); err != nil {
				t.Fatalf("ingest %s: %v", o.id, err)
			}
		}
	}
	// The ventilator quantities of fhirmap's pairing (select.go: the
	// ventilator rules), each 2 h before a blood gas of its own patient.
	ventilator := []fhirmap.Quantity{fhirmap.QMinuteVol, fhirmap.QTidalVol, fhirmap.QRespRate, fhirmap.QPETCO2,
		fhirmap.QVCO2, fhirmap.QPECO2, fhirmap.QPEEP, fhirmap.QPlateau, fhirmap.QMeanAirway, fhirmap.QFETCO2}
	type want struct {
		patient string
		nearest string // fact key, "" for none
		offset  time.Duration
	}
	var cases []want
	for _, q := range ventilator {
		p := "Patient/near-" + string(q)
		ingest(vent(p, "r-"+string(q), q, t0.Add(-2*time.Hour), 1, "1"), abg(p, "g-"+string(q), t0, 45))
		cases = append(cases, want{p, "Observation/r-" + string(q), -2 * time.Hour})
	}
	// Not ventilator readings, or not usable: none.
	ingest(vent("Patient/near-temp", "r-temp", fhirmap.QBodyTemp, t0.Add(-time.Hour), 37, "Cel"), abg("Patient/near-temp", "g-temp", t0, 45))
	cases = append(cases, want{"Patient/near-temp", "", 0})
	eie := vent("Patient/near-eie", "r-eie", fhirmap.QMinuteVol, t0.Add(-time.Hour), 8, "L/min")
	eie.status = fhirmap.StatusEnteredInError
	ingest(eie, abg("Patient/near-eie", "g-eie", t0, 45))
	cases = append(cases, want{"Patient/near-eie", "", 0})
	// Recorded after the refusal: not what was known then.
	ingest(abg("Patient/near-late", "g-late", t0, 45), vent("Patient/near-late", "r-late", fhirmap.QMinuteVol, t0.Add(-time.Hour), 8, "L/min"))
	cases = append(cases, want{"Patient/near-late", "", 0})
	// Equally near before and after: the earlier wins (fhirmap's rule).
	ingest(vent("Patient/near-tie", "r-after", fhirmap.QMinuteVol, t0.Add(time.Hour), 8, "L/min"),
		vent("Patient/near-tie", "r-before", fhirmap.QMinuteVol, t0.Add(-time.Hour), 8, "L/min"),
		vent("Patient/near-tie", "r-far", fhirmap.QMinuteVol, t0.Add(-3*time.Hour), 8, "L/min"),
		abg("Patient/near-tie", "g-tie", t0, 45))
	cases = append(cases, want{"Patient/near-tie", "Observation/r-before", -time.Hour})

	for _, c := range cases {
		t.Run(c.patient, func(t *testing.T) {
			p, err := reviewer.Refused(f.ctx, postgres.Filter{Patient: c.patient})
			if err != nil {
				t.Fatal(err)
			}
			if len(p.Rows) != 1 {
				t.Fatalf("%d refusals, want 1", len(p.Rows))
			}
			n := p.Rows[0].Nearest
			switch {
			case c.nearest == "" && n != nil:
				t.Errorf("nearest %s, want none", n.FactKey)
			case c.nearest != "" && (n == nil || n.FactKey != c.nearest || n.Offset != c.offset):
				t.Errorf("nearest %+v, want %s at %s", n, c.nearest, c.offset)
			}
			if len(p.Rows[0].Considered) != 1 || p.Rows[0].Considered[0].Role != string(fhirmap.RoleBloodGas) {
				t.Errorf("considered %+v", p.Rows[0].Considered)
			}
		})
	}
}
