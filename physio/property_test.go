package physio_test

import (
	"errors"
	"fmt"
	"math"
	"testing"

	"github.com/ventderive/ventderive/physio"
)

// Grids of plausible inputs for the property tests.
var (
	gridVCO2  = []physio.MLPerMin{80, 150, 200, 260, 400}
	gridVA    = []physio.LPerMin{2, 3.836, 4.2, 6, 9}
	gridTemp  = []physio.Celsius{33, 35, 37, 39, 40}
	gridPaCO2 = []physio.MmHg{25, 35, 40, 45, 60, 90}
	gridVE    = []physio.LPerMin{5, 8, 10, 14, 20}
)

// mustV returns a function that takes a derivation's two results and
// returns its value, failing the test on an error.
func mustV(t *testing.T) func(physio.Result, error) float64 {
	return func(r physio.Result, err error) float64 {
		t.Helper()
		if err != nil {
			t.Fatalf("unexpected error: %v", err)
		}
		return r.Value
	}
}

func relClose(a, b, rel float64) bool { return math.Abs(a-b) <= rel*math.Max(math.Abs(a), math.Abs(b)) }

// refusedAsInconsistent reports whether err is the refusal of a
// combination of individually plausible inputs whose result is implausible
// or meaningless; any other error fails the test.
func refusedAsInconsistent(t *testing.T, name string, err error) bool {
	t.Helper()
	if err == nil {
		return false
	}
	if !errors.Is(err, physio.ErrImplausible) && !errors.Is(err, physio.ErrOutOfMeaning) {
		t.Errorf("%s: unexpected error %v", name, err)
	}
	return true
}

// The alveolar ventilation equation solved for PaCO2 and for VA must invert
// each other (reference §1), in mm[Hg] and in kPa, at any body temperature.
func TestAlveolarEquationRoundTrip(t *testing.T) {
	checked := 0
	for _, vco2 := range gridVCO2 {
		for _, va := range gridVA {
			for _, temp := range gridTemp {
				name := fmt.Sprintf("VCO2 %g mL/min, VA %g L/min, %g °C", vco2, va, temp)
				pa, err := physio.PaCO2FromAlveolarVentilation(vco2, va, temp)
				if refusedAsInconsistent(t, name, err) {
					continue
				}
				checked++
				back := mustV(t)(physio.AlveolarVentilationFromPaCO2(vco2, physio.MmHg(pa.Value), temp))
				if !relClose(back, float64(va), 1e-12) {
					t.Errorf("%s: VA round trip -> %v mmHg -> %v", name, pa.Value, back)
				}
				paK := mustV(t)(physio.PaCO2FromAlveolarVentilationKPa(vco2, va, temp))
				// kPa and mm[Hg] forms agree through the UCUM factor to within
				// the 3 ppm between 760 x 0.133322 and 101.325 kPa.
				if !relClose(paK, float64(physio.MmHg(pa.Value).KPa()), 5e-6) {
					t.Errorf("%s: kPa form %v disagrees with mmHg form %v", name, paK, physio.MmHg(pa.Value).KPa())
				}
				backK := mustV(t)(physio.AlveolarVentilationFromPaCO2KPa(vco2, physio.KPa(paK), temp))
				if !relClose(backK, float64(va), 1e-12) {
					t.Errorf("%s: kPa VA round trip -> %v kPa -> %v", name, paK, backK)
				}
			}
		}
	}
	if total := len(gridVCO2) * len(gridVA) * len(gridTemp); checked < total*3/4 {
		t.Errorf("only %d of %d grid points were derivable", checked, total)
	}
}

// Dead space from VCO2 and minute volume must equal the Enghoff value
// computed from the implied mixed-expired PCO2 (reference §2, derived), and
// VE x (1 - VD/VT) must give back, through the alveolar equation, the
// measured PaCO2 (reference §11 check back).
func TestDeadSpaceMethodsAgree(t *testing.T) {
	checked, total := 0, 0
	for _, vco2 := range gridVCO2 {
		for _, ve := range gridVE {
			for _, pa := range gridPaCO2 {
				for _, temp := range []physio.Celsius{35, 37, 39} {
					total++
					name := fmt.Sprintf("VCO2 %g mL/min, VE %g L/min, PaCO2 %g mmHg, %g °C", vco2, ve, pa, temp)
					vd, err := physio.DeadSpaceFromVCO2(pa, vco2, ve, temp)
					if refusedAsInconsistent(t, name, err) {
						continue
					}
					pe := mustV(t)(physio.MixedExpiredPCO2(vco2, ve, temp))
					eng := mustV(t)(physio.DeadSpaceEnghoff(pa, physio.MmHg(pe)))
					if !relClose(vd.Value, eng, 1e-12) {
						t.Errorf("%s: VCO2 method %v != Enghoff from implied PECO2 %v", name, vd.Value, eng)
					}
					va := mustV(t)(physio.AlveolarVentilationFromDeadSpace(ve, physio.Fraction(vd.Value)))
					back, err := physio.PaCO2FromAlveolarVentilation(vco2, physio.LPerMin(va), temp)
					if refusedAsInconsistent(t, name, err) {
						continue
					}
					checked++
					if !relClose(back.Value, float64(pa), 1e-12) {
						t.Errorf("%s: PaCO2 check back %v", name, back.Value)
					}
				}
			}
		}
	}
	if checked < total/2 {
		t.Errorf("only %d of %d grid points were derivable", checked, total)
	}
}

// Predicted PaCO2 with the measured dead space must equal the measured
// PaCO2: VA = (VT - VD) x RR is the same alveolar ventilation as VE x (1 -
// VD/VT) when VE = VT x RR.
func TestPredictedPaCO2MatchesMeasuredDeadSpace(t *testing.T) {
	vt, rr := physio.ML(500), physio.PerMin(20)
	ve := physio.LPerMin(float64(vt) * float64(rr) / 1000)
	pa := physio.MmHg(45)
	vd := mustV(t)(physio.DeadSpaceFromVCO2(pa, 200, ve, 37))
	vdML := mustV(t)(physio.DeadSpaceVolume(physio.Fraction(vd), vt))
	pred := mustV(t)(physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: vt, RR: rr,
		AnatomicVD: physio.ML(vdML - 50), ApparatusVD: 50, ApparatusVDKnown: true, BodyTemp: 37}))
	if !relClose(pred, float64(pa), 1e-12) {
		t.Errorf("predicted %v with the measured dead space, want measured %v", pred, pa)
	}
}

// TidalVolumeForTarget and RateForTarget must reach the target when fed back
// into the alveolar equation with unchanged VCO2 and dead space.
func TestTargetsReachTarget(t *testing.T) {
	const vd = 180.0
	for _, from := range []physio.MmHg{35, 48, 55, 70} {
		for _, target := range []physio.MmHg{35, 40, 50} {
			t.Run(fmt.Sprintf("from_%gmmHg_to_%gmmHg", from, target), func(t *testing.T) {
				const vt, rr = 420.0, 16.0
				k, _ := physio.AlveolarConstant(37)
				// Choose VCO2-consistent start: PaCO2 = K VCO2 / ((VT - VD) RR).
				vco2Start := float64(from) * (vt - vd) * rr / 1000 / k
				newRR := mustV(t)(physio.RateForTarget(rr, from, target, vt, 70.566))
				pa := k * vco2Start / ((vt - vd) * newRR / 1000)
				if !relClose(pa, float64(target), 1e-12) {
					t.Errorf("rate %v gives %v, want %v", newRR, pa, target)
				}
				newVT := mustV(t)(physio.TidalVolumeForTarget(vt, vd, from, target, 70.566))
				pa = k * vco2Start / ((newVT - vd) * rr / 1000)
				if !relClose(pa, float64(target), 1e-12) {
					t.Errorf("VT %v gives %v, want %v", newVT, pa, target)
				}
			})
		}
	}
}

// monotone checks that f rises (sign +1) or falls (sign -1) strictly across xs.
func monotone(t *testing.T, name string, sign float64, xs []float64, f func(x float64) (physio.Result, error)) {
	t.Helper()
	t.Run(name, func(t *testing.T) {
		prev := math.NaN()
		for _, x := range xs {
			v := mustV(t)(f(x))
			if !math.IsNaN(prev) && sign*(v-prev) <= 0 {
				t.Errorf("at %v: %v does not move %+g from %v", x, v, sign, prev)
			}
			prev = v
		}
	})
}

// Results move the right way when one input rises (the direction follows
// from the published formula, reference §§1-9).
func TestMonotonicity(t *testing.T) {
	up, down := 1.0, -1.0
	monotone(t, "PaCO2_rises_with_VCO2", up, []float64{100, 150, 200, 300}, func(x float64) (physio.Result, error) {
		return physio.PaCO2FromAlveolarVentilation(physio.MLPerMin(x), 4.2, 37)
	})
	monotone(t, "PaCO2_falls_with_VA", down, []float64{2, 3, 4.2, 6}, func(x float64) (physio.Result, error) {
		return physio.PaCO2FromAlveolarVentilation(200, physio.LPerMin(x), 37)
	})
	monotone(t, "PaCO2_rises_with_body_temp_Cel", up, []float64{33, 35, 37, 39, 41}, func(x float64) (physio.Result, error) {
		return physio.PaCO2FromAlveolarVentilation(200, 4.2, physio.Celsius(x))
	})
	monotone(t, "VA_falls_with_PaCO2", down, []float64{30, 40, 50, 60}, func(x float64) (physio.Result, error) {
		return physio.AlveolarVentilationFromPaCO2(200, physio.MmHg(x), 37)
	})
	monotone(t, "Enghoff_VDVT_rises_with_PaCO2", up, []float64{30, 40, 50, 60}, func(x float64) (physio.Result, error) {
		return physio.DeadSpaceEnghoff(physio.MmHg(x), 20)
	})
	monotone(t, "Enghoff_VDVT_falls_with_PECO2", down, []float64{10, 15, 20, 27}, func(x float64) (physio.Result, error) {
		return physio.DeadSpaceEnghoff(40, physio.MmHg(x))
	})
	monotone(t, "VCO2_VDVT_rises_with_VE_Lmin", up, []float64{6, 8, 10, 14}, func(x float64) (physio.Result, error) {
		return physio.DeadSpaceFromVCO2(45, 200, physio.LPerMin(x), 37)
	})
	monotone(t, "VCO2_VDVT_falls_with_VCO2", down, []float64{120, 160, 200, 240}, func(x float64) (physio.Result, error) {
		return physio.DeadSpaceFromVCO2(45, physio.MLPerMin(x), 10, 37)
	})
	monotone(t, "VCO2_VDVT_rises_with_PaCO2", up, []float64{30, 40, 45, 60}, func(x float64) (physio.Result, error) {
		return physio.DeadSpaceFromVCO2(physio.MmHg(x), 200, 10, 37)
	})
	monotone(t, "estimated_VDVT_rises_with_PaCO2", up, []float64{30, 40, 45, 60}, func(x float64) (physio.Result, error) {
		return physio.DeadSpaceEstimated(physio.MmHg(x), 10, man)
	})
	monotone(t, "estimated_VDVT_falls_with_weight_kg", down, []float64{50, 70, 90, 120}, func(x float64) (physio.Result, error) {
		e := man
		e.Weight = physio.Kg(x)
		return physio.DeadSpaceEstimated(45, 10, e)
	})
	monotone(t, "REE_rises_with_weight_kg", up, []float64{50, 70, 90}, func(x float64) (physio.Result, error) {
		e := man
		e.Weight = physio.Kg(x)
		return physio.RestingEnergy(e)
	})
	monotone(t, "REE_rises_with_height_cm", up, []float64{150, 175, 200}, func(x float64) (physio.Result, error) {
		e := man
		e.Height = physio.Cm(x)
		return physio.RestingEnergy(e)
	})
	monotone(t, "REE_falls_with_age_years", down, []float64{20, 40, 80}, func(x float64) (physio.Result, error) {
		e := man
		e.Age = physio.Years(x)
		e.Sex = physio.Female
		return physio.RestingEnergy(e)
	})
	monotone(t, "VCO2_estimate_rises_with_RQ", up, []float64{0.7, 0.8, 0.9, 1.0}, func(x float64) (physio.Result, error) {
		e := man
		e.RQ = x
		return physio.EstimateVCO2(e)
	})
	monotone(t, "PBW_rises_with_height_cm", up, []float64{150, 163, 175, 190}, func(x float64) (physio.Result, error) {
		return physio.PredictedBodyWeight(physio.Female, physio.Cm(x))
	})
	monotone(t, "predicted_PaCO2_rises_with_apparatus_VD_mL", up, []float64{0, 25, 95, 120}, func(x float64) (physio.Result, error) {
		return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 420, RR: 20, AnatomicVD: 150, ApparatusVD: physio.ML(x), ApparatusVDKnown: true})
	})
	monotone(t, "predicted_PaCO2_falls_with_VT_mL", down, []float64{350, 420, 500, 600}, func(x float64) (physio.Result, error) {
		return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: physio.ML(x), RR: 20, PBW: 70.566, ApparatusVDKnown: true})
	})
	monotone(t, "predicted_PaCO2_falls_with_RR", down, []float64{10, 15, 20, 30}, func(x float64) (physio.Result, error) {
		return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 420, RR: physio.PerMin(x), PBW: 70.566, ApparatusVDKnown: true})
	})
	monotone(t, "VR_rises_with_VE_Lmin", up, []float64{6, 8, 10, 14}, func(x float64) (physio.Result, error) {
		return physio.VentilatoryRatio(physio.LPerMin(x), 45, 70.566)
	})
	monotone(t, "VR_rises_with_PaCO2", up, []float64{35, 40, 45, 60}, func(x float64) (physio.Result, error) {
		return physio.VentilatoryRatio(10, physio.MmHg(x), 70.566)
	})
	monotone(t, "VR_falls_with_PBW_kg", down, []float64{50, 60, 70.566, 90}, func(x float64) (physio.Result, error) {
		return physio.VentilatoryRatio(10, 45, physio.Kg(x))
	})
	monotone(t, "AVDSF_falls_with_PETCO2", down, []float64{20, 30, 35, 44}, func(x float64) (physio.Result, error) {
		return physio.AlveolarDeadSpaceFraction(45, physio.MmHg(x))
	})
	monotone(t, "gradient_falls_with_PETCO2", down, []float64{20, 30, 35, 50}, func(x float64) (physio.Result, error) {
		return physio.EndTidalGradient(45, physio.MmHg(x))
	})
	monotone(t, "rate_for_target_rises_with_PaCO2", up, []float64{40, 50, 55, 70}, func(x float64) (physio.Result, error) {
		return physio.RateForTarget(14, physio.MmHg(x), 40, 420, 70.566)
	})
	monotone(t, "rate_for_target_falls_with_target", down, []float64{30, 40, 50, 60}, func(x float64) (physio.Result, error) {
		return physio.RateForTarget(14, 55, physio.MmHg(x), 420, 70.566)
	})
	monotone(t, "VT_for_target_rises_with_PaCO2", up, []float64{40, 50, 55, 70}, func(x float64) (physio.Result, error) {
		return physio.TidalVolumeForTarget(420, 180, physio.MmHg(x), 40, 70.566)
	})
	monotone(t, "VT_for_target_falls_with_target", down, []float64{30, 40, 50, 60}, func(x float64) (physio.Result, error) {
		return physio.TidalVolumeForTarget(420, 180, 55, physio.MmHg(x), 70.566)
	})
}
