package scenario

import (
	"math"
	"testing"
)

// Every story is generated from a model in which the physiologic dead space
// is the anatomic plus the apparatus dead space plus a non-negative alveolar
// part (Enghoff [published]; reference physiology.md s2 and s7), so that the
// measured PaCO2 is never materially below the predicted one, and the
// noiseless values of the model lie inside the ranges the story states.
func TestStoriesPhysiologicallyConsistent(t *testing.T) {
	for _, st := range stories() {
		for i := 0; i <= 200; i++ {
			f := float64(i) / 200
			s := st.at(f)
			serial := st.serialDeadSpaceML()
			if alveolar := s.vdvt*s.vt - serial; alveolar < minAlveolarFraction*s.vt {
				t.Fatalf("bed %d at %.2f: physiologic dead space %.0f mL, anatomic plus apparatus %.0f mL: alveolar %.0f mL below %.0f %% of VT",
					st.bed, f, s.vdvt*s.vt, serial, alveolar, 100*minAlveolarFraction)
			}
			// The model's values, computed as the service would from
			// noiseless inputs: PaCO2 corrected to body temperature for the
			// gas-phase formulas, predicted PaCO2 given back at 37 °C.
			pT := s.paCO2AtBody()
			predT := kAlveolar(s.tempC) * s.vco2 / ((s.vt - serial) * s.rr / 1000)
			model := map[string]float64{
				KindDeadSpaceVCO2:    1 - kAlveolar(s.tempC)*s.vco2/(s.ve()*pT),
				KindVentilatoryRatio: s.ve() * 1000 * pT / (st.pbwKg() * 100 * 37.5), // Sinha 2009 [published]
				KindGradient:         s.gap,
				KindDiscrepancy:      s.paCO2() - pco2To37(predT, s.tempC),
			}
			if math.Abs(model[KindDeadSpaceVCO2]-s.vdvt) > 1e-9 {
				t.Fatalf("bed %d: Enghoff VD/VT %.4f, model %.4f", st.bed, model[KindDeadSpaceVCO2], s.vdvt)
			}
			for _, r := range st.ranges {
				if v := model[r.Kind]; v < r.Min || v > r.Max {
					t.Errorf("bed %d at %.2f: %s %.3f outside the stated %g..%g", st.bed, f, r.Kind, v, r.Min, r.Max)
				}
			}
		}
		for _, r := range st.ranges {
			if r.Kind == KindDiscrepancy && r.Min < DiscrepancyFloor {
				t.Errorf("bed %d: measured minus predicted may reach %g mmHg, below %d (implausible)", st.bed, r.Min, DiscrepancyFloor)
			}
			if r.Min >= r.Max {
				t.Errorf("bed %d: empty range %+v", st.bed, r)
			}
		}
		if !st.venous && len(st.ranges) == 0 {
			t.Errorf("bed %d states no ranges", st.bed)
		}
	}
}

// The cooled patient's model, by hand: 33.5 °C, VCO2 140 mL/min, VT 520 mL,
// RR 10 /min, VD/VT 0.36: PaCO2 at body temperature = 0.760 x 306.5 / 273 x
// 140 / (5.2 x 0.64) = 35.89 mmHg [derived, reference s1]; as the analyser
// reports it at 37 °C, x 10^(0.019 x 3.5) = 41.83 mmHg (in vitro coefficient
// 0.019 [published]).
func TestCooledPatientByHand(t *testing.T) {
	var bed6 story
	for _, st := range stories() {
		if st.bed == 6 {
			bed6 = st
		}
	}
	s := bed6.at(0)
	k := 0.760 * (273 + 33.5) / 273
	pT := k * 140 / (0.520 * 10 * (1 - 0.36))
	if math.Abs(s.paCO2AtBody()-pT) > 1e-9 || math.Abs(pT-35.89) > 0.005 {
		t.Errorf("PaCO2 at 33.5 °C %.3f, want %.3f", s.paCO2AtBody(), pT)
	}
	if want := pT * math.Pow(10, 0.019*3.5); math.Abs(s.paCO2()-want) > 1e-9 || math.Abs(want-41.83) > 0.005 {
		t.Errorf("PaCO2 at 37 °C %.3f, want %.3f (in vitro coefficient 0.019 [published])", s.paCO2(), want)
	}
}
