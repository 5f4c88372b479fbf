package fhirmap

import (
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/physio"
)

// recordSite is a site under which every kind of the reference vector is
// derived: apparatus dead space and target configured.
func recordSite() Site {
	s := DefaultSite()
	s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 50, true
	s.TargetPaCO2mmHg = DefaultTargetPaCO2mmHg
	return s
}

// TestRecordOfIsWhatTheNotesPublish checks, for every derivation of the
// reference vector (with a PECO2 too, so that a measured and an estimated
// fraction coexist), that the Record's lines are the notes' lines: the
// "Formula", "Intermediate steps", "Constants", "Assumptions" and "Flags"
// notes rendered from the Record equal those BasisNotes writes.
func TestRecordOfIsWhatTheNotesPublish(t *testing.T) {
	facts := append(vectorFacts(), newFact("peco2-1", QPECO2, 28, -5*time.Minute))
	ds, _ := DeriveAll(facts, recordSite())
	if len(ds) < len(Catalogue)-1 {
		t.Fatalf("derived %d kinds of %d", len(ds), len(Catalogue))
	}
	steps := 0
	for _, d := range ds {
		rec := RecordOf(d)
		steps += len(rec.Steps)
		want := map[string]string{}
		for _, n := range BasisNotes(d) {
			if label, _, ok := strings.Cut(n, ":"); ok {
				want[label] = n
			}
		}
		got := map[string]string{"Formula": "Formula: " + rec.Formula + ". Worked: " + rec.Worked + "."}
		var parts []string
		for _, st := range rec.Steps {
			parts = append(parts, st.Method+": "+st.Basis)
		}
		if len(parts) > 0 {
			got["Intermediate steps"] = "Intermediate steps: " + strings.Join(parts, "; ") + "."
		}
		parts = nil
		for _, c := range rec.Constants {
			p := c.Name + " = " + physio.DisplayNumber(c.Value)
			if u := physio.DisplayUnit(c.Unit); u != "" {
				p += " " + u
			}
			parts = append(parts, p+" ("+c.Source+")")
		}
		if len(parts) > 0 {
			got["Constants"] = "Constants: " + strings.Join(parts, "; ") + "."
		}
		if len(rec.Assumptions) > 0 {
			got["Assumptions"] = "Assumptions: " + strings.Join(rec.Assumptions, "; ") + "."
		}
		if len(rec.Flags) > 0 {
			got["Flags"] = "Flags: " + strings.Join(rec.Flags, "; ") + "."
		}
		for _, label := range []string{"Formula", "Intermediate steps", "Constants", "Assumptions", "Flags"} {
			if got[label] != want[label] {
				t.Errorf("%s %s:\n record %q\n notes  %q", d.Kind, label, got[label], want[label])
			}
		}
	}
	if steps == 0 {
		t.Error("no derivation of the vector has an intermediate step; predicted PaCO2 rests on the predicted body weight")
	}
}

// TestDeriveFromReproducesDerive re-derives every derivation of the
// reference vector from its own inputs alone (and, for the estimated
// fraction, the measured fraction's inputs) and checks value, digest and
// interpretation are those of the derivation made from all facts.
func TestDeriveFromReproducesDerive(t *testing.T) {
	site := recordSite()
	for _, withPECO2 := range []bool{false, true} {
		facts := vectorFacts()
		if withPECO2 {
			facts = append(facts, newFact("peco2-1", QPECO2, 28, -5*time.Minute))
		}
		ds, _ := DeriveAll(facts, site)
		byKind := map[string]Derivation{}
		for _, d := range ds {
			byKind[d.Kind] = d
		}
		for _, d := range ds {
			var others []Input
			if d.Kind == KindDeadSpaceEstimated {
				for _, k := range []string{KindDeadSpaceEnghoff, KindDeadSpaceVCO2} {
					others = append(others, byKind[k].Inputs...)
				}
			}
			got, r, ok := DeriveFrom(d.Kind, d.Inputs, others, site)
			if !ok {
				t.Errorf("%s: re-derived a refusal %s: %s", d.Kind, r.Reason, r.Detail)
				continue
			}
			if got.Digest != d.Digest || got.Result.Value != d.Result.Value || got.Result.Interpretation != d.Result.Interpretation ||
				strings.Join(got.Result.Flags(), "|") != strings.Join(d.Result.Flags(), "|") {
				t.Errorf("%s (PECO2 %v): re-derived %v %s %+v, derived %v %s %+v", d.Kind, withPECO2,
					got.Result.Value, got.Digest, got.Result.Interpretation, d.Result.Value, d.Digest, d.Result.Interpretation)
			}
		}
		// Without the measured fraction's inputs the estimated one loses
		// its flag: the siblings matter, and DeriveFrom does not invent them.
		if e, ok := byKind[KindDeadSpaceEstimated]; ok && withPECO2 {
			got, _, _ := DeriveFrom(e.Kind, e.Inputs, nil, site)
			if strings.Join(got.Result.Flags(), "|") == strings.Join(e.Result.Flags(), "|") {
				t.Errorf("estimated fraction re-derived without the measured one keeps flags %q", got.Result.Flags())
			}
		}
	}
}
