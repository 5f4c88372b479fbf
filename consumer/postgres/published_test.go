package postgres_test

import (
	"encoding/json"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// TestStoredRefusalDetailAsDerivePrints ingests, through the service's
// planner, a blood gas whose only ventilator reading is 50 min before it
// (outside the 30 min window), and checks that the stored detail of every
// "no-ventilator-data-in-window" refusal is the detail fhirmap.DeriveAll
// (what "ventderive derive" prints) gives over the same facts, nearest
// reading included; that every refusal and derivation names the settings
// snapshot the planner derived under; and that the snapshot's bytes are the
// planner's.
func TestStoredRefusalDetailAsDerivePrints(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	site := fhirmap.DefaultSite()
	site.Window = window
	site.TargetPaCO2mmHg = 40
	pl := consumer.Planner{Site: site, ObservationSub: "ventderive.out.observation", ProvenanceSub: "ventderive.out.provenance"}
	plan := func(s consumer.Snapshot) (consumer.Changes, error) { return pl.Plan(s, t0.Add(2*time.Hour)) }

	ve := vent(p1, "ve-early", fhirmap.QMinuteVol, t0.Add(-50*time.Minute), 8, "L/min")
	bg := abg(p1, "abg-1", t0, 45)
	if _, err := f.store.Ingest(f.ctx, message("fhir.input.device", 1, ve), plan); err != nil {
		t.Fatal(err)
	}
	if _, err := f.store.Ingest(f.ctx, message("fhir.input.lab", 2, bg), plan); err != nil {
		t.Fatal(err)
	}
	_, want := fhirmap.DeriveAll([]fhirmap.Fact{ve.fact(), bg.fact()}, site)
	wantDetail := map[string]string{}
	for _, r := range want {
		wantDetail[r.Kind] = r.Detail
	}
	if len(want) == 0 || want[0].Reason != fhirmap.ReasonNoVentilatorData {
		t.Fatalf("DeriveAll refusals %+v, want no-ventilator-data-in-window", want)
	}
	snap, err := pl.Settings()
	if err != nil {
		t.Fatal(err)
	}
	rows, err := f.pool.Query(f.ctx, `SELECT kind, reason, detail, coalesce(settings_digest, '') FROM refusal ORDER BY kind`)
	if err != nil {
		t.Fatal(err)
	}
	n := 0
	for rows.Next() {
		var kind, reason, detail, digest string
		if err := rows.Scan(&kind, &reason, &detail, &digest); err != nil {
			t.Fatal(err)
		}
		n++
		if detail != wantDetail[kind] {
			t.Errorf("%s: stored detail %q, derive prints %q", kind, detail, wantDetail[kind])
		}
		if reason != fhirmap.ReasonNoVentilatorData {
			t.Errorf("%s: reason %s, want %s", kind, reason, fhirmap.ReasonNoVentilatorData)
		}
		if digest != snap.Digest {
			t.Errorf("%s: refusal names settings %q, want the planner's %s", kind, digest, snap.Digest)
		}
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	if n != len(fhirmap.Catalogue) {
		t.Errorf("%d refusals stored, want one per kind (%d)", n, len(fhirmap.Catalogue))
	}

	var stored, algorithm string
	if err := f.pool.QueryRow(f.ctx, `SELECT snapshot, algorithm FROM site_settings WHERE digest = $1`, snap.Digest).Scan(&stored, &algorithm); err != nil {
		t.Fatalf("settings snapshot %s: %v", snap.Digest, err)
	}
	if stored != string(snap.JSON) || algorithm != fhirmap.Algorithm {
		t.Errorf("stored snapshot %s (%s), want %s (%s)", stored, algorithm, snap.JSON, fhirmap.Algorithm)
	}
	back, err := consumer.ParseSettings([]byte(stored))
	if err != nil {
		t.Fatal(err)
	}
	if back.Site != site {
		t.Errorf("snapshot parses to %+v, want the planner's site %+v", back.Site, site)
	}
	if f.count(t, "site_settings") != 1 {
		t.Errorf("%d settings snapshots, want 1 (one per distinct snapshot)", f.count(t, "site_settings"))
	}

	// A value now: an end-tidal reading in the window gives the gradient,
	// with its record and the same snapshot (still stored once).
	et := vent(p1, "etco2", fhirmap.QPETCO2, t0.Add(-2*time.Minute), 38, "mm[Hg]")
	if _, err := f.store.Ingest(f.ctx, message("fhir.input.device", 3, et), plan); err != nil {
		t.Fatal(err)
	}
	var record, digest string
	if err := f.pool.QueryRow(f.ctx, `SELECT record::text, settings_digest FROM derivation WHERE kind = 'paco2-petco2-gradient'`).Scan(&record, &digest); err != nil {
		t.Fatal(err)
	}
	var rec fhirmap.Record
	if err := json.Unmarshal([]byte(record), &rec); err != nil {
		t.Fatal(err)
	}
	ds, _ := fhirmap.DeriveAll([]fhirmap.Fact{ve.fact(), bg.fact(), et.fact()}, site)
	for _, d := range ds {
		if d.Kind == "paco2-petco2-gradient" {
			wantRec, _ := json.Marshal(fhirmap.RecordOf(d))
			gotRec, _ := json.Marshal(rec)
			if string(gotRec) != string(wantRec) {
				t.Errorf("stored record %s, want %s", gotRec, wantRec)
			}
		}
	}
	if rec.Worked == "" || rec.Formula == "" {
		t.Errorf("record %+v lacks the formula or the worked basis", rec)
	}
	if digest != snap.Digest || f.count(t, "site_settings") != 1 {
		t.Errorf("derivation names settings %s (want %s); %d snapshots", digest, snap.Digest, f.count(t, "site_settings"))
	}
}
