package postgres_test

import (
	"math"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// The reviewer's SQL view of a derivation's intermediate steps,
// review_derivation_step (migration 0006, documented in the README), expands
// derivation.record -> 'steps' with jsonb functions. It must return the
// steps of every derivation the current code writes, by both writers (one
// message at a time and a batch): a record stored in a form SQL cannot read
// (a zstd frame, as once proposed for 0018) would leave the view empty for
// every new derivation. An invented blood gas at a measured body
// temperature of 39 °C gives each PaCO2-based value the temperature
// correction as a step; the view's steps are compared with what
// fhirmap.DeriveAll gives over the same facts, and the correction's value
// with the published formula.
func TestStepsViewExpandsNewRecords(t *testing.T) {
	t.Parallel()
	site := fhirmap.DefaultSite()
	site.Window = window
	site.TargetPaCO2mmHg = 40
	pl := consumer.Planner{Site: site, ObservationSub: "ventderive.out.observation", ProvenanceSub: "ventderive.out.provenance"}
	plan := func(s consumer.Snapshot) (consumer.Changes, error) { return pl.Plan(s, t0.Add(2*time.Hour)) }

	ve := vent(p1, "ve-1", fhirmap.QMinuteVol, t0.Add(-2*time.Minute), 8, "L/min")
	et := vent(p1, "et-1", fhirmap.QPETCO2, t0.Add(-2*time.Minute), 38, "mm[Hg]")
	temp := vent(p1, "temp-1", fhirmap.QBodyTemp, t0.Add(-5*time.Minute), 39, "Cel")
	bg := abg(p1, "abg-1", t0, 45)
	msgs := []consumer.Message{message("fhir.input.device", 1, ve, et, temp), message("fhir.input.lab", 2, bg)}

	ds, _ := fhirmap.DeriveAll([]fhirmap.Fact{ve.fact(), et.fact(), temp.fact(), bg.fact()}, site)
	want := map[string][]fhirmap.RecordStep{}
	withSteps := 0
	for _, d := range ds {
		want[d.Kind] = fhirmap.RecordOf(d).Steps
		if len(want[d.Kind]) > 0 {
			withSteps++
		}
	}
	if withSteps == 0 {
		t.Fatal("no derived value of the invented facts has a step; the test would check nothing")
	}
	// PaCO2(T) = PaCO2(37 °C) x 10^(0.019 x (T - 37)): the blood-gas
	// temperature correction of PCO2, coefficient 0.019 per °C (common
	// practice; value recalled from memory). 45 mmHg at 39 °C: 49.11 mmHg.
	wantCorrected := 45 * math.Pow(10, 0.019*(39-37))

	for _, c := range []struct {
		name   string
		ingest func(f *fixture) error
	}{
		{"Ingest", func(f *fixture) error {
			for _, m := range msgs {
				if _, err := f.store.Ingest(f.ctx, m, plan); err != nil {
					return err
				}
			}
			return nil
		}},
		{"IngestBatch", func(f *fixture) error {
			for _, r := range f.store.IngestBatch(f.ctx, msgs, plan) {
				if r.Err != nil {
					return r.Err
				}
			}
			return nil
		}},
	} {
		t.Run(c.name, func(t *testing.T) {
			f := newFixture(t)
			if err := c.ingest(f); err != nil {
				t.Fatal(err)
			}
			// The record is jsonb, as the view reads it, for every version.
			var versions, plain int
			if err := f.pool.QueryRow(f.ctx, `SELECT count(*), count(*) FILTER (WHERE jsonb_typeof(record -> 'steps') = 'array')
				FROM derivation`).Scan(&versions, &plain); err != nil {
				t.Fatal(err)
			}
			if versions != len(ds) || plain != versions {
				t.Fatalf("%d derivation versions stored, %d with a jsonb record of steps; want %d and all", versions, plain, len(ds))
			}

			rows, err := f.pool.Query(f.ctx, `SELECT d.kind, s.ordinal, s.method, s.value, s.unit, s.basis
				FROM review_derivation_step s JOIN review_derivation d ON d.id = s.derivation_id
				ORDER BY d.id, s.ordinal`)
			if err != nil {
				t.Fatal(err)
			}
			got := map[string][]fhirmap.RecordStep{}
			for rows.Next() {
				var kind, method, unit, basis string
				var ordinal int
				var value float64
				if err := rows.Scan(&kind, &ordinal, &method, &value, &unit, &basis); err != nil {
					t.Fatal(err)
				}
				if ordinal != len(got[kind])+1 {
					t.Errorf("%s: step ordinal %d after %d steps", kind, ordinal, len(got[kind]))
				}
				got[kind] = append(got[kind], fhirmap.RecordStep{Method: method, Value: value, Unit: unit, Basis: basis})
			}
			if err := rows.Err(); err != nil {
				t.Fatal(err)
			}
			corrected := 0
			for kind, ws := range want {
				gs := got[kind]
				if len(gs) != len(ws) {
					t.Errorf("%s: review_derivation_step gives %d steps, DeriveAll %d", kind, len(gs), len(ws))
					continue
				}
				for i, w := range ws {
					g := gs[i]
					if g.Method != w.Method || g.Value != w.Value || g.Unit != w.Unit || g.Basis != w.Basis {
						t.Errorf("%s step %d: view %+v, DeriveAll %+v", kind, i+1, g, w)
					}
					if g.Unit == "mm[Hg]" && math.Abs(g.Value-wantCorrected) < 0.005 {
						corrected++
					}
				}
			}
			if corrected == 0 {
				t.Errorf("no step in the view is PaCO2 at 39 °C (%.2f mmHg): %+v", wantCorrected, got)
			}
		})
	}
}
