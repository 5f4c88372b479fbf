package fhirmap

import (
	"math"
	"slices"
	"testing"
	"time"
)

// FuzzDerive feeds arbitrary values into the reference vector and checks the
// invariants of Derive: no panic; exactly one derivation or refusal per kind;
// every derived value finite and encodable; every refusal with a known
// reason; the same input twice gives the same digests.
func FuzzDerive(f *testing.F) {
	// Starting corpus: the reference vector (physiology.md s11) and the refusal cases.
	f.Add(45.0, 10.0, 200.0, 35.0, 500.0, 20.0, 175.0, 70.0, 17.26, int64(-5))
	f.Add(300.0, 250.0, 900.0, 50.0, 5000.0, 0.0, 90.0, 10.0, 60.0, int64(-45))
	f.Add(6.0, 0.1, 10.0, 2.0, 20.0, 200.0, 300.0, 500.0, -1.0, int64(11))
	f.Add(math.NaN(), math.Inf(1), 0.0, -3.0, 0.0, 1e300, -175.0, 0.0, 0.0, int64(0))
	codes := map[string]bool{ReasonNotBloodGas: true}
	for _, r := range Reasons {
		codes[r.Code] = true
	}
	f.Fuzz(func(t *testing.T, paco2, ve, vco2, petco2, vt, rr, height, weight, peco2 float64, offMin int64) {
		off := time.Duration(offMin%120) * time.Minute
		facts := []Fact{
			arterial("abg-1", paco2),
			newFact("ve-1", QMinuteVol, ve, off, detail("expired")),
			newFact("vco2-1", QVCO2, vco2, off),
			newFact("etco2-1", QPETCO2, petco2, off),
			newFact("vt-1", QTidalVol, vt, off, detail("expired")),
			newFact("rr-1", QRespRate, rr, off, detail("total")),
			newFact("pe-1", QPECO2, peco2, off),
			newFact("sex", QSex, 0, -72*time.Hour, fromPatient("sex"), text("female")),
			newFact("birth", QBirthDate, 0, -72*time.Hour, fromPatient("birthDate"), text("1960")),
			newFact("height-1", QHeight, height, -48*time.Hour),
			newFact("weight-1", QWeight, weight, -48*time.Hour),
		}
		site := goldenSite()
		ds, rs := DeriveAll(facts, site)
		if len(ds)+len(rs) != len(Catalogue) {
			t.Fatalf("%d derivations + %d refusals, want %d", len(ds), len(rs), len(Catalogue))
		}
		seen := map[string]bool{}
		for _, d := range ds {
			seen[d.Kind] = true
			if math.IsNaN(d.Result.Value) || math.IsInf(d.Result.Value, 0) {
				t.Fatalf("%s: value %v", d.Kind, d.Result.Value)
			}
			if _, err := EncodeObservation(d, 1, site); err != nil {
				t.Fatalf("%s: encode: %v", d.Kind, err)
			}
		}
		for _, r := range rs {
			if seen[r.Kind] {
				t.Fatalf("%s both derived and refused", r.Kind)
			}
			seen[r.Kind] = true
			if !codes[r.Reason] {
				t.Fatalf("%s: unknown reason %q", r.Kind, r.Reason)
			}
		}
		if _, err := EncodeOutcome(rs); err != nil {
			t.Fatal(err)
		}
		ds2, rs2 := DeriveAll(facts, site)
		if !slices.EqualFunc(ds, ds2, func(a, b Derivation) bool { return a.Digest == b.Digest }) ||
			!slices.EqualFunc(rs, rs2, func(a, b Refusal) bool { return a.Digest == b.Digest }) {
			t.Fatal("not deterministic")
		}
	})
}
