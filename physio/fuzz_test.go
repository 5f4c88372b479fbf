package physio_test

import (
	"errors"
	"math"
	"strings"
	"testing"

	"github.com/ventderive/ventderive/physio"
)

// fuzzInput is one set of inputs fed to every derivation.
type fuzzInput struct {
	paCO2, p2, vco2, ve, temp, vt, rr, vd, pbw, height, weight, age, rq float64
	sex, eq                                                             uint8
	known                                                               bool
}

// fuzzSeeds are the inputs of the reference tables (reference_test.go,
// reference §§1-11) plus the bad inputs of TestRefusals.
var fuzzSeeds = []fuzzInput{
	// §11 vector: man 175 cm 70 kg 40 y, VE 10, PaCO2 45, VCO2 200, PETCO2 35.
	{45, 35, 200, 10, 37, 500, 20, 180, 70.566, 175, 70, 40, 0, 1, 1, true},
	// §1 VCO2 200, VA 4.2; §2 PaCO2 40, PECO2 27, VT 500.
	{40, 27, 200, 4.2, 37, 500, 14, 162.5, 70.566, 175, 70, 40, 0.8, 1, 1, true},
	// §5 woman 163 cm; §7 VT 420, RR 20, VD 150, apparatus 120; §9 55 -> 40.
	{55, 40, 200, 8.4, 0, 420, 20, 150, 55.146, 163, 60, 50, 0.85, 2, 2, true},
	// §1 K(T) at 35 and 40 Cel.
	{45, 35, 200, 10, 35, 420, 14, 180, 70.566, 175, 70, 40, 0, 1, 2, false},
	{45, 35, 200, 10, 40, 420, 14, 180, 70.566, 175, 70, 40, 0, 2, 1, true},
	// Bad inputs: NaN, ±Inf, zero, negative, unit mix-ups, unknown enums.
	{math.NaN(), math.Inf(1), math.Inf(-1), 0, -1, 0.5, 0, 0, 0, 1.75, 0, 0, 2, 0, 0, false},
	{5.3, 4, 0.2, 10000, 50, 420, 300, 420, -1, 175, 70, 10, -0.8, 9, 7, true},
	{10, 9, 1000, 0.5, 25, 2000, 80, 1600, 150, 250, 400, 120, 1.3, 1, 1, true},
	{250, 250, 40, 60, 44, 50, 2, 20, 15, 120, 20, 18, 0.67, 2, 2, true},
}

// FuzzDerivations asserts the package's invariants on any input: no panic;
// a success has a finite value, a unit, a method and a well-formed basis;
// a failure is an *InputError of a known kind with a zero Result.
func FuzzDerivations(f *testing.F) {
	for _, s := range fuzzSeeds {
		f.Add(s.paCO2, s.p2, s.vco2, s.ve, s.temp, s.vt, s.rr, s.vd, s.pbw, s.height, s.weight, s.age, s.rq, s.sex, s.eq, s.known)
	}
	f.Fuzz(func(t *testing.T, paCO2, p2, vco2, ve, temp, vt, rr, vd, pbw, height, weight, age, rq float64, sex, eq uint8, known bool) {
		e := physio.EnergyInput{Sex: physio.Sex(sex), Age: physio.Years(age), Weight: physio.Kg(weight),
			Height: physio.Cm(height), Equation: physio.EnergyEquation(eq), RQ: rq}
		check := func(name string, r physio.Result, err error) {
			t.Helper()
			if err != nil {
				ie, ok := errors.AsType[*physio.InputError](err)
				if !ok || ie.Input == "" {
					t.Fatalf("%s: error %v is not an *InputError naming its input", name, err)
				}
				known := false
				for _, k := range []error{physio.ErrNotFinite, physio.ErrNotPositive, physio.ErrImplausible, physio.ErrOutOfMeaning, physio.ErrNotGiven, physio.ErrBeyondModel} {
					known = known || errors.Is(err, k)
				}
				if !known {
					t.Fatalf("%s: error %v has no known kind", name, err)
				}
				if r != (physio.Result{}) {
					t.Fatalf("%s: refusal with a non-zero Result", name)
				}
				return
			}
			if math.IsNaN(r.Value) || math.IsInf(r.Value, 0) {
				t.Fatalf("%s: value %v", name, r.Value)
			}
			if r.Unit == "" || r.Method == "" || r.MethodVersion == "" {
				t.Fatalf("%s: unit, method or version missing: %+v", name, r)
			}
			if r.Unit == "1" && strings.Contains(name, "fraction") && (r.Value < 0 || r.Value >= 1) {
				t.Fatalf("%s: fraction %v outside 0..1", name, r.Value)
			}
			b := r.Basis()
			if b == "" || strings.Contains(b, "%!") || strings.Contains(b, "NaN") || strings.Contains(b, "Inf") {
				t.Fatalf("%s: basis %q", name, b)
			}
			for _, c := range r.Constants() {
				if math.IsNaN(c.Value) || math.IsInf(c.Value, 0) || c.Name == "" || c.Source == "" {
					t.Fatalf("%s: constant %+v", name, c)
				}
			}
		}
		km, kk := physio.AlveolarConstant(physio.Celsius(temp))
		if math.IsNaN(km) || math.IsNaN(kk) || math.IsInf(km, 0) || math.IsInf(kk, 0) {
			t.Fatalf("AlveolarConstant(%v) = %v, %v", temp, km, kk)
		}

		r, err := physio.PaCO2FromAlveolarVentilation(physio.MLPerMin(vco2), physio.LPerMin(ve), physio.Celsius(temp))
		check("PaCO2FromAlveolarVentilation", r, err)
		r, err = physio.PaCO2FromAlveolarVentilationKPa(physio.MLPerMin(vco2), physio.LPerMin(ve), physio.Celsius(temp))
		check("PaCO2FromAlveolarVentilationKPa", r, err)
		r, err = physio.AlveolarVentilationFromPaCO2(physio.MLPerMin(vco2), physio.MmHg(paCO2), physio.Celsius(temp))
		check("AlveolarVentilationFromPaCO2", r, err)
		r, err = physio.AlveolarVentilationFromPaCO2KPa(physio.MLPerMin(vco2), physio.MmHg(paCO2).KPa(), physio.Celsius(temp))
		check("AlveolarVentilationFromPaCO2KPa", r, err)
		r, err = physio.DeadSpaceEnghoff(physio.MmHg(paCO2), physio.MmHg(p2))
		check("DeadSpaceEnghoff fraction", r, err)
		r, err = physio.MixedExpiredPCO2(physio.MLPerMin(vco2), physio.LPerMin(ve), physio.Celsius(temp))
		check("MixedExpiredPCO2", r, err)
		r, err = physio.DeadSpaceFromVCO2(physio.MmHg(paCO2), physio.MLPerMin(vco2), physio.LPerMin(ve), physio.Celsius(temp))
		check("DeadSpaceFromVCO2 fraction", r, err)
		r, err = physio.DeadSpaceEstimated(physio.MmHg(paCO2), physio.LPerMin(ve), e)
		check("DeadSpaceEstimated fraction", r, err)
		r, err = physio.RestingEnergy(e)
		check("RestingEnergy", r, err)
		r, err = physio.EstimateVCO2(e)
		check("EstimateVCO2", r, err)
		r, err = physio.DeadSpaceVolume(physio.Fraction(vd/vt), physio.ML(vt))
		check("DeadSpaceVolume", r, err)
		r, err = physio.AlveolarVentilationFromDeadSpace(physio.LPerMin(ve), physio.Fraction(vd/vt))
		check("AlveolarVentilationFromDeadSpace", r, err)
		r, err = physio.PredictedBodyWeight(physio.Sex(sex), physio.Cm(height))
		check("PredictedBodyWeight", r, err)
		r, err = physio.PredictedPaCO2(physio.PredictedInput{VCO2: physio.MLPerMin(vco2), VT: physio.ML(vt), RR: physio.PerMin(rr),
			AnatomicVD: physio.ML(vd), PBW: physio.Kg(pbw), ApparatusVD: physio.ML(p2), ApparatusVDKnown: known, BodyTemp: physio.Celsius(temp)})
		check("PredictedPaCO2", r, err)
		r, err = physio.PredictedPaCO2(physio.PredictedInput{VCO2: physio.MLPerMin(vco2), VCO2Estimated: true, VT: physio.ML(vt), RR: physio.PerMin(rr),
			PBW: physio.Kg(pbw), ApparatusVD: physio.ML(p2), ApparatusVDKnown: known, BodyTemp: physio.Celsius(temp)})
		check("PredictedPaCO2 default anatomic", r, err)
		r, err = physio.PredictedPaCO2(physio.PredictedInput{VCO2: physio.MLPerMin(vco2), VT: physio.ML(vt), RR: physio.PerMin(rr),
			PBW: physio.Kg(pbw), Anatomic: physio.AnatomicModel(sex), ApparatusVD: physio.ML(p2), ApparatusVDKnown: known, BodyTemp: physio.Celsius(temp)})
		check("PredictedPaCO2 anatomic model", r, err)
		r, err = physio.PaCO2AtBodyTemp(physio.MmHg(paCO2), physio.Celsius(temp))
		check("PaCO2AtBodyTemp", r, err)
		r, err = physio.PaCO2Discrepancy(physio.MmHg(paCO2), physio.MmHg(p2), physio.VCO2Measured)
		check("PaCO2Discrepancy", r, err)
		r, err = physio.VentilatoryRatio(physio.LPerMin(ve), physio.MmHg(paCO2), physio.Kg(pbw))
		check("VentilatoryRatio", r, err)
		r, err = physio.EndTidalGradient(physio.MmHg(paCO2), physio.MmHg(p2))
		check("EndTidalGradient", r, err)
		r, err = physio.AlveolarDeadSpaceFraction(physio.MmHg(paCO2), physio.MmHg(p2))
		check("AlveolarDeadSpaceFraction fraction", r, err)
		r, err = physio.RateForTarget(physio.PerMin(rr), physio.MmHg(paCO2), physio.MmHg(p2), physio.ML(vt), physio.Kg(pbw))
		check("RateForTarget", r, err)
		r, err = physio.TidalVolumeForTarget(physio.ML(vt), physio.ML(vd), physio.MmHg(paCO2), physio.MmHg(p2), physio.Kg(pbw))
		check("TidalVolumeForTarget", r, err)
	})
}
