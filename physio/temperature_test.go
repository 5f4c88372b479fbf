package physio_test

import (
	"errors"
	"math"
	"strings"
	"testing"

	"github.com/ventderive/ventderive/physio"
)

// Temperature correction of blood PCO2 and the anatomic dead space model of
// an artificial airway (issue 10, items 3 and 4).

func TestPaCO2AtBodyTemp(t *testing.T) {
	cases := []struct {
		name   string
		source string
		paco2  physio.MmHg
		tempC  physio.Celsius
		want   float64
		tol    float64
	}{
		// PCO2(hot)/PCO2(cold) = 10^(0.019 x dT) in fresh human blood over
		// 18 °C ("Temperature coefficients for Pco2 and Po2 of blood in
		// vitro", J Appl Physiol, submitted 1964 [published]).
		{"45_mmHg_at_25_Cel_over_12_Cel", "10^(0.019 x -12) [published formula]", 45, 25, 45 / math.Pow(10, 0.019*12), 1e-9},
		{"45_mmHg_at_33.5_Cel", "10^(0.019 x -3.5) = 0.8580 [derived from the published formula]", 45, 33.5, 38.61, 0.005},
		{"40_mmHg_at_39_Cel", "10^(0.019 x 2) = 1.0914 [derived]", 40, 39, 43.66, 0.005},
		{"no_change_at_37_Cel", "factor 1 at the analyser's temperature [derived]", 45, 37, 45, 1e-12},
		// Siemens blood-gas table (Mikulcik, Rapid Analysis, 2012, reprinted
		// by clpmag.com [published]): PCO2 x 0.850 at 33 °C, x 1.080 at 39 °C;
		// the coefficient agrees within 1.3 %.
		{"33_Cel_within_1.3pct_of_the_Siemens_table", "x 0.850 [published table]", 100, 33, 85.0, 1.3},
		{"39_Cel_within_1.3pct_of_the_Siemens_table", "x 1.080 [published table]", 100, 39, 108.0, 1.3},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r, err := physio.PaCO2AtBodyTemp(c.paco2, c.tempC)
			if err != nil {
				t.Fatal(err)
			}
			if math.Abs(r.Value-c.want) > c.tol {
				t.Errorf("PaCO2 at %g °C = %.4f mmHg, want %.4f ± %g (%s)", float64(c.tempC), r.Value, c.want, c.tol, c.source)
			}
			if r.Unit != physio.UnitMmHg || !strings.Contains(r.Basis(), "10^(0.019") {
				t.Errorf("unit %q, basis %q", r.Unit, r.Basis())
			}
		})
	}
	t.Run("4.4_pct_per_Cel_Bradley_Severinghaus_Stupfel", func(t *testing.T) {
		// Bradley, Severinghaus & Stupfel, J Appl Physiol 1956;9:201-4
		// [published]: a 1 °C fall lowers PCO2 by 4.4 % (coefficient 0.0185).
		r, _ := physio.PaCO2AtBodyTemp(100, 36)
		if fall := 100 - r.Value; fall < 4.0 || fall > 4.6 {
			t.Errorf("fall per °C %.2f %%, want about 4.4 %%", fall)
		}
	})
	t.Run("not_measured_refused", func(t *testing.T) {
		if _, err := physio.PaCO2AtBodyTemp(45, 0); !errors.Is(err, physio.ErrNotGiven) {
			t.Errorf("err %v, want ErrNotGiven", err)
		}
		if _, err := physio.PaCO2AtBodyTemp(45, 50); !errors.Is(err, physio.ErrImplausible) {
			t.Errorf("err %v, want ErrImplausible", err)
		}
	})
}

func TestAnatomicModels(t *testing.T) {
	// Nunn, Campbell & Peckett, J Appl Physiol 1959;14:174-6 [published]:
	// intrathoracic anatomic dead space 0.43 mL per lb of body weight in
	// intubated subjects; 1 lb = 0.45359237 kg exactly (NIST SP 811).
	if got, want := physio.AnatomicArtificialAirway.PerKg(), 0.43/0.45359237; got != want {
		t.Errorf("artificial airway %g mL/kg, want %g", got, want)
	}
	// Radford, J Appl Physiol 1955 [published]: 2.2 mL/kg, the whole airway.
	if got := physio.AnatomicWholeAirway.PerKg(); got != 2.2 {
		t.Errorf("whole airway %g mL/kg, want 2.2", got)
	}
	// Extrathoracic 0.55 + intrathoracic 0.43 mL/lb is Radford's 1 mL/lb to
	// within 2 % (Nunn et al. 1959 [published]; Radford 1955 [published]).
	if sum := (0.55 + 0.43) / 0.45359237; math.Abs(sum-2.2)/2.2 > 0.02 {
		t.Errorf("extra + intrathoracic %g mL/kg, not about 2.2", sum)
	}
	for _, s := range []string{"whole-airway", "artificial-airway"} {
		if m, ok := physio.ParseAnatomicModel(s); !ok || m.String() != s {
			t.Errorf("ParseAnatomicModel(%q) = %v, %v", s, m, ok)
		}
	}
	if _, ok := physio.ParseAnatomicModel("nasal"); ok {
		t.Error("unknown model accepted")
	}

	// Reference §7 check vector with PBW 70.566 kg (man 175 cm), VT 420 mL,
	// RR 20 /min, apparatus 0 mL, VCO2 200 mL/min [derived]:
	// artificial airway VDanat = 0.948 x 70.566 = 66.9 mL, VA = (420 - 66.9)
	// x 20 / 1000 = 7.062 L/min, PaCO2 = 0.863 x 200 / 7.062 = 24.44 mmHg.
	in := physio.PredictedInput{VCO2: 200, VT: 420, RR: 20, PBW: 70.566, ApparatusVDKnown: true, Anatomic: physio.AnatomicArtificialAirway}
	r, err := physio.PredictedPaCO2(in)
	if err != nil {
		t.Fatal(err)
	}
	vd := 0.43 / 0.45359237 * 70.566
	want := 0.76 * 310 / 273 * 200 / ((420 - vd) * 20 / 1000)
	if math.Abs(r.Value-want) > 1e-9 || math.Abs(r.Value-24.44) > 0.005 {
		t.Errorf("predicted %.4f, want %.4f (24.44)", r.Value, want)
	}
	if !strings.Contains(r.Basis(), "tube or tracheostomy") || !strings.Contains(r.Basis(), "0.948 mL/kg") {
		t.Errorf("basis does not name the model and figure: %q", r.Basis())
	}
	found := false
	for _, c := range r.Constants() {
		if strings.Contains(c.Source, "Nunn, Campbell & Peckett") {
			found = true
		}
	}
	if !found {
		t.Errorf("constants %+v do not cite the figure's source", r.Constants())
	}
	in.Anatomic = physio.AnatomicModel(7)
	if _, err := physio.PredictedPaCO2(in); !errors.Is(err, physio.ErrNotGiven) {
		t.Errorf("unknown model: err %v", err)
	}
}

func TestPredictedPaCO2GivenBackAt37(t *testing.T) {
	// At 33.5 °C the alveolar equation gives the PCO2 at body temperature
	// (K(T), reference §1 [derived]); the prediction is published at 37 °C,
	// as the blood gas is reported, with the same coefficient (0.019
	// [published]): K(33.5) x VCO2 / VA x 10^(0.019 x 3.5).
	in := physio.PredictedInput{VCO2: 140, VT: 470, RR: 10, AnatomicVD: 73, ApparatusVD: 50, ApparatusVDKnown: true, BodyTemp: 33.5}
	r, err := physio.PredictedPaCO2(in)
	if err != nil {
		t.Fatal(err)
	}
	k := 0.76 * (273 + 33.5) / 273
	atT := k * 140 / ((470 - 73 - 50) * 10 / 1000.0)
	want := atT * math.Pow(10, 0.019*3.5)
	if math.Abs(r.Value-want) > 1e-9 {
		t.Errorf("predicted %.4f, want %.4f", r.Value, want)
	}
	if !strings.Contains(r.Basis(), "at 37 °C, as the blood gas is reported") {
		t.Errorf("basis %q", r.Basis())
	}
	// A measured 37 °C changes nothing.
	in.BodyTemp = 37
	r37, _ := physio.PredictedPaCO2(in)
	in.BodyTemp = 0
	r0, _ := physio.PredictedPaCO2(in)
	if r37.Value != r0.Value {
		t.Errorf("37 °C measured %.6f, not measured %.6f", r37.Value, r0.Value)
	}
}

// A physiologic dead space equal to the anatomic plus apparatus dead space
// makes the measured PaCO2 at body temperature equal the prediction: the
// two conventions meet (reference §1, §2 and §7 [derived]).
func TestTemperatureConventionConsistent(t *testing.T) {
	const tempC = 33.5
	vt, rr, vd := 470.0, 10.0, 123.0
	k := 0.76 * (273 + tempC) / 273
	ve := vt * rr / 1000
	paco2AtT := k * 140 / (ve * (1 - vd/vt))
	paco2At37 := paco2AtT * math.Pow(10, 0.019*(37-tempC)) // as the analyser reports it
	corr, err := physio.PaCO2AtBodyTemp(physio.MmHg(paco2At37), tempC)
	if err != nil {
		t.Fatal(err)
	}
	ds, err := physio.DeadSpaceFromVCO2(physio.MmHg(corr.Value), 140, physio.LPerMin(ve), tempC)
	if err != nil {
		t.Fatal(err)
	}
	if math.Abs(ds.Value-vd/vt) > 1e-9 {
		t.Errorf("VD/VT %.6f, want %.6f", ds.Value, vd/vt)
	}
	pred, err := physio.PredictedPaCO2(physio.PredictedInput{VCO2: 140, VT: physio.ML(vt), RR: physio.PerMin(rr), AnatomicVD: 73,
		ApparatusVD: 50, ApparatusVDKnown: true, BodyTemp: tempC})
	if err != nil {
		t.Fatal(err)
	}
	if math.Abs(pred.Value-paco2At37) > 1e-9 {
		t.Errorf("predicted %.4f mmHg at 37 °C, measured %.4f", pred.Value, paco2At37)
	}
}

func TestAnatomicModelFromPatient(t *testing.T) {
	// The same vector as TestAnatomicModels (reference §7 [derived]): man
	// 175 cm, PBW 70.566 kg, VT 420 mL, RR 20 /min, apparatus 0 mL, VCO2 200
	// mL/min. The value depends only on the model; where the model came from
	// (the patient's recorded airway or the site's setting) is named in the
	// constant, the assumption and the basis.
	for _, c := range []struct {
		name   string
		model  physio.AnatomicModel
		perKg  float64 // mL/kg
		source string
	}{
		// Nunn, Campbell & Peckett 1959 [published]: 0.43 mL/lb intrathoracic.
		{"artificial_airway_0.948mL_per_kg", physio.AnatomicArtificialAirway, 0.43 / 0.45359237, "Nunn, Campbell & Peckett"},
		// Radford 1955 [published]: 2.2 mL/kg whole airway.
		{"whole_airway_2.2mL_per_kg", physio.AnatomicWholeAirway, 2.2, "Radford"},
	} {
		t.Run(c.name, func(t *testing.T) {
			want := 0.76 * 310 / 273 * 200 / ((420 - c.perKg*70.566) * 20 / 1000)
			for _, fromPatient := range []bool{false, true} {
				in := physio.PredictedInput{VCO2: 200, VT: 420, RR: 20, PBW: 70.566, ApparatusVDKnown: true,
					Anatomic: c.model, AnatomicFromPatient: fromPatient}
				r, err := physio.PredictedPaCO2(in)
				if err != nil {
					t.Fatal(err)
				}
				if math.Abs(r.Value-want) > 1e-9 {
					t.Errorf("fromPatient %v: predicted %.4f, want %.4f", fromPatient, r.Value, want)
				}
				whence, other := "site setting", "patient's recorded airway"
				if fromPatient {
					whence, other = other, whence
				}
				if b := r.Basis(); !strings.Contains(b, whence) || strings.Contains(b, other) {
					t.Errorf("fromPatient %v: basis %q does not say %q alone", fromPatient, b, whence)
				}
				src, assumed := "", ""
				for _, k := range r.Constants() {
					if strings.Contains(k.Source, c.source) {
						src = k.Source
					}
				}
				for _, a := range r.Assumptions() {
					if strings.Contains(a, "model "+c.model.String()) {
						assumed = a
					}
				}
				wantWord := "the site's setting"
				if fromPatient {
					wantWord = "the patient's airway as recorded"
				}
				if !strings.Contains(src, "model "+c.model.String()+" from "+wantWord) {
					t.Errorf("fromPatient %v: constant source %q", fromPatient, src)
				}
				if !strings.Contains(assumed, "model "+c.model.String()+": "+wantWord) {
					t.Errorf("fromPatient %v: assumption %q", fromPatient, assumed)
				}
			}
		})
	}
	// A given anatomic dead space needs no model: nothing is said about one.
	r, err := physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 420, RR: 20, AnatomicVD: 150, ApparatusVDKnown: true, AnatomicFromPatient: true})
	if err != nil {
		t.Fatal(err)
	}
	if strings.Contains(r.Basis(), "airway") {
		t.Errorf("basis names a model for a given anatomic dead space: %q", r.Basis())
	}
}
