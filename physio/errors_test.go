package physio_test

import (
	"errors"
	"math"
	"strings"
	"testing"

	"github.com/ventderive/ventderive/physio"
)

var (
	nan  = math.NaN()
	pInf = math.Inf(1)
	nInf = math.Inf(-1)
)

// Bad input is refused with an *InputError naming the offending input and
// a sentinel kind, and the Result is the zero Result: never a NaN, never a
// clamped value.
func TestRefusals(t *testing.T) {
	cases := []struct {
		name  string
		call  func() (physio.Result, error)
		kind  error
		input string
	}{
		{"PaCO2_NaN", func() (physio.Result, error) { return physio.DeadSpaceEnghoff(physio.MmHg(nan), 27) }, physio.ErrNotFinite, "PaCO2"},
		{"PaCO2_plusInf", func() (physio.Result, error) { return physio.DeadSpaceEnghoff(physio.MmHg(pInf), 27) }, physio.ErrNotFinite, "PaCO2"},
		{"PECO2_minusInf", func() (physio.Result, error) { return physio.DeadSpaceEnghoff(40, physio.MmHg(nInf)) }, physio.ErrNotFinite, "PECO2"},
		{"PaCO2_0mmHg", func() (physio.Result, error) { return physio.DeadSpaceEnghoff(0, 27) }, physio.ErrNotPositive, "PaCO2"},
		{"PaCO2_negative_mmHg", func() (physio.Result, error) { return physio.DeadSpaceEnghoff(-40, 27) }, physio.ErrNotPositive, "PaCO2"},
		{"PaCO2_5.3_kPa_sent_as_mmHg", func() (physio.Result, error) { return physio.DeadSpaceEnghoff(5.3, 2) }, physio.ErrImplausible, "PaCO2"},
		{"PaCO2_300mmHg", func() (physio.Result, error) { return physio.DeadSpaceEnghoff(300, 27) }, physio.ErrImplausible, "PaCO2"},
		{"PECO2_equal_PaCO2", func() (physio.Result, error) { return physio.DeadSpaceEnghoff(40, 40) }, physio.ErrOutOfMeaning, "PECO2"},
		{"PECO2_above_PaCO2", func() (physio.Result, error) { return physio.DeadSpaceEnghoff(40, 45) }, physio.ErrOutOfMeaning, "PECO2"},
		{"VCO2_0mLmin", func() (physio.Result, error) { return physio.PaCO2FromAlveolarVentilation(0, 4.2, 37) }, physio.ErrNotPositive, "VCO2"},
		{"VCO2_in_Lmin_0.2", func() (physio.Result, error) { return physio.PaCO2FromAlveolarVentilation(0.2, 4.2, 37) }, physio.ErrImplausible, "VCO2"},
		{"VA_NaN", func() (physio.Result, error) {
			return physio.PaCO2FromAlveolarVentilation(200, physio.LPerMin(nan), 37)
		}, physio.ErrNotFinite, "VA"},
		{"VA_0Lmin", func() (physio.Result, error) { return physio.PaCO2FromAlveolarVentilationKPa(200, 0, 37) }, physio.ErrNotPositive, "VA"},
		{"body_temp_50Cel", func() (physio.Result, error) { return physio.PaCO2FromAlveolarVentilation(200, 4.2, 50) }, physio.ErrImplausible, "body temperature"},
		{"body_temp_minus_5Cel", func() (physio.Result, error) { return physio.AlveolarVentilationFromPaCO2(200, 40, -5) }, physio.ErrNotPositive, "body temperature"},
		{"body_temp_NaN", func() (physio.Result, error) { return physio.MixedExpiredPCO2(200, 10, physio.Celsius(nan)) }, physio.ErrNotFinite, "body temperature"},
		{"computed_PaCO2_implausible", func() (physio.Result, error) { return physio.PaCO2FromAlveolarVentilation(1000, 0.3, 37) }, physio.ErrImplausible, "computed PaCO2"},
		{"computed_VA_implausible", func() (physio.Result, error) { return physio.AlveolarVentilationFromPaCO2(40, 250, 37) }, physio.ErrImplausible, "computed VA"},
		{"PaCO2_kPa_40_sent_as_kPa", func() (physio.Result, error) { return physio.AlveolarVentilationFromPaCO2KPa(200, 40, 37) }, physio.ErrImplausible, "PaCO2"},
		{"VE_in_mLmin_10000", func() (physio.Result, error) { return physio.DeadSpaceFromVCO2(45, 200, 10000, 37) }, physio.ErrImplausible, "VE"},
		{"computed_VDVT_negative", func() (physio.Result, error) { return physio.DeadSpaceFromVCO2(10, 400, 5, 37) }, physio.ErrOutOfMeaning, "computed VD/VT"},
		{"computed_estimated_VDVT_negative", func() (physio.Result, error) { return physio.DeadSpaceEstimated(10, 5, man) }, physio.ErrOutOfMeaning, "computed VD/VT"},
		{"VDVT_0", func() (physio.Result, error) { return physio.DeadSpaceVolume(0, 500) }, physio.ErrOutOfMeaning, "VD/VT"},
		{"VDVT_1", func() (physio.Result, error) { return physio.DeadSpaceVolume(1, 500) }, physio.ErrOutOfMeaning, "VD/VT"},
		{"VDVT_1.2", func() (physio.Result, error) { return physio.AlveolarVentilationFromDeadSpace(10, 1.2) }, physio.ErrOutOfMeaning, "VD/VT"},
		{"VDVT_NaN", func() (physio.Result, error) {
			return physio.AlveolarVentilationFromDeadSpace(10, physio.Fraction(nan))
		}, physio.ErrNotFinite, "VD/VT"},
		{"VT_0mL", func() (physio.Result, error) { return physio.DeadSpaceVolume(0.3, 0) }, physio.ErrNotPositive, "VT"},
		{"VT_0.5_litres_sent_as_mL", func() (physio.Result, error) { return physio.DeadSpaceVolume(0.3, 0.5) }, physio.ErrImplausible, "VT"},
		{"sex_not_given", func() (physio.Result, error) { return physio.PredictedBodyWeight(physio.SexUnknown, 175) }, physio.ErrNotGiven, "sex"},
		{"sex_out_of_enum", func() (physio.Result, error) { return physio.PredictedBodyWeight(physio.Sex(9), 175) }, physio.ErrOutOfMeaning, "sex"},
		{"height_1.75_metres_sent_as_cm", func() (physio.Result, error) { return physio.PredictedBodyWeight(physio.Male, 1.75) }, physio.ErrImplausible, "height"},
		{"energy_equation_not_given", func() (physio.Result, error) {
			e := man
			e.Equation = 0
			return physio.RestingEnergy(e)
		}, physio.ErrNotGiven, "energy equation"},
		{"energy_equation_out_of_enum", func() (physio.Result, error) {
			e := man
			e.Equation = 7
			return physio.EstimateVCO2(e)
		}, physio.ErrOutOfMeaning, "energy equation"},
		{"weight_0kg", func() (physio.Result, error) {
			e := man
			e.Weight = 0
			return physio.RestingEnergy(e)
		}, physio.ErrNotPositive, "weight"},
		{"age_10_years_child", func() (physio.Result, error) {
			e := man
			e.Age = 10
			return physio.RestingEnergy(e)
		}, physio.ErrImplausible, "age"},
		{"RQ_2", func() (physio.Result, error) {
			e := man
			e.RQ = 2
			return physio.EstimateVCO2(e)
		}, physio.ErrImplausible, "RQ"},
		{"RQ_negative", func() (physio.Result, error) {
			e := man
			e.RQ = -0.8
			return physio.DeadSpaceEstimated(45, 10, e)
		}, physio.ErrNotPositive, "RQ"},
		{"estimated_VCO2_implausible", func() (physio.Result, error) {
			return physio.EstimateVCO2(physio.EnergyInput{Sex: physio.Male, Age: 120, Weight: 20, Height: 120, Equation: physio.HarrisBenedict1919})
		}, physio.ErrImplausible, "estimated VCO2"},
		{"apparatus_dead_space_not_declared", func() (physio.Result, error) {
			return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 420, RR: 20, AnatomicVD: 150})
		}, physio.ErrNotGiven, "apparatus dead space"},
		{"apparatus_dead_space_negative_mL", func() (physio.Result, error) {
			return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 420, RR: 20, AnatomicVD: 150, ApparatusVD: -10, ApparatusVDKnown: true})
		}, physio.ErrImplausible, "apparatus dead space"},
		{"anatomic_default_needs_PBW", func() (physio.Result, error) {
			return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 420, RR: 20, ApparatusVDKnown: true})
		}, physio.ErrNotPositive, "PBW"},
		{"VT_not_above_dead_space", func() (physio.Result, error) {
			return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 250, RR: 20, AnatomicVD: 150, ApparatusVD: 120, ApparatusVDKnown: true})
		}, physio.ErrOutOfMeaning, "VT - dead space"},
		{"RR_0", func() (physio.Result, error) {
			return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 420, RR: 0, AnatomicVD: 150, ApparatusVDKnown: true})
		}, physio.ErrNotPositive, "RR"},
		{"RR_high_frequency_300", func() (physio.Result, error) { return physio.RateForTarget(300, 55, 40, 420, 70) }, physio.ErrImplausible, "RR"},
		{"predicted_PaCO2_NaN", func() (physio.Result, error) {
			return physio.PaCO2Discrepancy(45, physio.MmHg(nan), physio.VCO2Measured)
		}, physio.ErrNotFinite, "predicted PaCO2"},
		{"PBW_0kg", func() (physio.Result, error) { return physio.VentilatoryRatio(10, 45, 0) }, physio.ErrNotPositive, "PBW"},
		{"PETCO2_0mmHg", func() (physio.Result, error) { return physio.EndTidalGradient(45, 0) }, physio.ErrNotPositive, "PETCO2"},
		{"PETCO2_above_PaCO2_fraction", func() (physio.Result, error) { return physio.AlveolarDeadSpaceFraction(35, 38) }, physio.ErrOutOfMeaning, "PETCO2"},
		{"target_PaCO2_400mmHg", func() (physio.Result, error) { return physio.RateForTarget(14, 55, 400, 420, 70) }, physio.ErrImplausible, "target PaCO2"},
		{"dead_space_not_below_VT", func() (physio.Result, error) { return physio.TidalVolumeForTarget(420, 420, 55, 40, 70) }, physio.ErrOutOfMeaning, "VD"},
		{"dead_space_NaN", func() (physio.Result, error) { return physio.TidalVolumeForTarget(420, physio.ML(nan), 55, 40, 70) }, physio.ErrNotFinite, "VD"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r, err := c.call()
			if err == nil {
				t.Fatalf("no error; got value %v", r.Value)
			}
			if !errors.Is(err, c.kind) {
				t.Errorf("error %q is not %v", err, c.kind)
			}
			ie, ok := errors.AsType[*physio.InputError](err)
			if !ok {
				t.Fatalf("error %T is not *physio.InputError", err)
			}
			if ie.Input != c.input {
				t.Errorf("Input %q, want %q", ie.Input, c.input)
			}
			if !strings.Contains(err.Error(), c.input) {
				t.Errorf("message %q does not name %q", err, c.input)
			}
			if r != (physio.Result{}) {
				t.Errorf("refusal returned a non-zero Result %+v", r)
			}
		})
	}
}

func TestRangeCheck(t *testing.T) {
	r := physio.PaCO2Range
	cases := []struct {
		name string
		v    float64
		kind error
	}{
		{"40mmHg_ok", 40, nil},
		{"min_10mmHg_inclusive", 10, nil},
		{"max_250mmHg_inclusive", 250, nil},
		{"9.9mmHg", 9.9, physio.ErrImplausible},
		// A kPa PaCO2 labelled mm[Hg]: 8-9.9 kPa (60-74 mm[Hg]) passed the
		// old floor of 8; 10 kPa = 75.0 mm[Hg] (UCUM factor) still passes
		// and is documented as a limit of the floor.
		{"8kPa_sent_as_mmHg", 8, physio.ErrImplausible},
		{"9.9kPa_sent_as_mmHg", 9.9, physio.ErrImplausible},
		{"0mmHg", 0, physio.ErrNotPositive},
		{"NaN", nan, physio.ErrNotFinite},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			err := r.Check("PaCO2", c.v)
			if c.kind == nil {
				if err != nil || !r.Contains(c.v) {
					t.Errorf("Check = %v, Contains = %v; want accepted", err, r.Contains(c.v))
				}
				return
			}
			if !errors.Is(err, c.kind) || r.Contains(c.v) {
				t.Errorf("Check = %v, Contains = %v; want %v", err, r.Contains(c.v), c.kind)
			}
		})
	}
	t.Run("message_names_range", func(t *testing.T) {
		err := r.Check("PaCO2", 300)
		if want := "physio: PaCO2 300 mmHg: physiologically implausible (plausible 10 to 250 mmHg)"; err.Error() != want {
			t.Errorf("message %q, want %q", err, want)
		}
	})
}

// Every exported range states its reasoning, a unit and a non-empty span.
func TestRangesAreDocumented(t *testing.T) {
	ranges := map[string]physio.Range{
		"PaCO2": physio.PaCO2Range, "PaCO2 kPa": physio.PaCO2RangeKPa, "target PaCO2": physio.TargetPaCO2Range,
		"PECO2": physio.PECO2Range, "PETCO2": physio.PETCO2Range, "VCO2": physio.VCO2Range,
		"VE": physio.MinuteVolumeRange, "VA": physio.AlveolarVentilationRange, "VT": physio.TidalVolumeRange,
		"RR": physio.RespRateRange, "temperature": physio.BodyTempRange, "weight": physio.WeightRange,
		"height": physio.HeightRange, "age": physio.AgeRange, "PBW": physio.PBWRange, "RQ": physio.RQRange,
		"anatomic VD": physio.AnatomicDeadSpaceRange, "apparatus VD": physio.ApparatusDeadSpaceRange,
		"physiologic VD": physio.PhysiologicDeadSpaceRange, "VD/VT": physio.DeadSpaceFractionRange,
	}
	for name, r := range ranges {
		t.Run(strings.ReplaceAll(name, " ", "_"), func(t *testing.T) {
			if r.Why == "" || r.Unit == "" || !(r.Min < r.Max) || r.Min < 0 {
				t.Errorf("range %+v lacks reasoning, unit or span", r)
			}
		})
	}
	// PaCO2RangeKPa is PaCO2Range through the UCUM factor.
	if got := physio.KPa(physio.PaCO2RangeKPa.Max).MmHg(); math.Abs(float64(got)-physio.PaCO2Range.Max) > 1e-9 {
		t.Errorf("PaCO2RangeKPa.Max is %v mmHg, want %v", got, physio.PaCO2Range.Max)
	}
}
