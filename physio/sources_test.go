package physio

import (
	"slices"
	"strings"
	"testing"
)

// TestApparatusDeadSpaceSource: the predicted PaCO2 records the apparatus
// dead space it used as a constant, in mL, naming where it came from, so the
// stored basis says whether the patient's circuit or the site's setting was
// used. Reference vector (physiology.md s11 [derived]): VCO2 200 mL/min, VT
// 500 mL, RR 20 /min, PBW 70.566 kg.
func TestApparatusDeadSpaceSource(t *testing.T) {
	for _, c := range []struct {
		name        string
		fromPatient bool
		source      string
	}{
		{"site_setting", false, "the site's setting"},
		{"patient_circuit", true, "recorded for the patient's circuit"},
	} {
		t.Run(c.name, func(t *testing.T) {
			r, err := PredictedPaCO2(PredictedInput{VCO2: 200, VT: 500, RR: 20, PBW: 70.566,
				ApparatusVD: 80, ApparatusVDKnown: true, ApparatusVDFromPatient: c.fromPatient})
			if err != nil {
				t.Fatal(err)
			}
			i := slices.IndexFunc(r.Constants(), func(k Constant) bool { return k.Name == "apparatus dead space" })
			if i < 0 {
				t.Fatalf("no apparatus dead space constant: %+v", r.Constants())
			}
			k := r.Constants()[i]
			if k.Value != 80 || k.Unit != UnitML || !strings.Contains(k.Source, c.source) {
				t.Errorf("constant %+v, want 80 mL from %q", k, c.source)
			}
		})
	}
}

// TestFlagWithinGoalRange: the flag goes only on values for a target
// (RateForTarget, TidalVolumeForTarget), once. RR 20 /min, PaCO2 45 mm[Hg],
// target 50 mm[Hg]: 18 /min (physiology.md s9 [derived]).
func TestFlagWithinGoalRange(t *testing.T) {
	r, err := RateForTarget(20, 45, 50, 500, 70.566)
	if err != nil {
		t.Fatal(err)
	}
	r.FlagWithinGoalRange()
	r.FlagWithinGoalRange()
	if n := strings.Count(strings.Join(r.Flags(), "|"), FlagWithinGoalRange); n != 1 || r.Value != 18 {
		t.Errorf("flag %d times, value %v; want once, 18 /min", n, r.Value)
	}
	other, err := DeadSpaceEnghoff(45, 20)
	if err != nil {
		t.Fatal(err)
	}
	other.FlagWithinGoalRange()
	if slices.Contains(other.Flags(), FlagWithinGoalRange) {
		t.Error("a value not for a target was flagged")
	}
}
