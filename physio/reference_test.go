package physio_test

import (
	"math"
	"testing"

	"github.com/ventderive/ventderive/physio"
)

// Check values from /work/shared/reference/physiology.md (cited below as
// "reference §n") and codes.md (UCUM). Each case names the source and its
// label. Tolerance: the reference gives each value rounded to 3-6
// significant figures, so a case passes when the computed value rounds to
// the printed one, i.e. lies within half a unit of the last printed digit.

// halfUnit returns half a unit in the last decimal place of a value printed
// with the given number of decimals: the rounding tolerance.
func halfUnit(decimals int) float64 { return 0.5 * math.Pow(10, -float64(decimals)) }

// man is the reference patient of §3 and §11: man, 175 cm, 70 kg, 40 years.
var man = physio.EnergyInput{Sex: physio.Male, Age: 40, Weight: 70, Height: 175, Equation: physio.HarrisBenedict1919}

type refCase struct {
	name     string
	source   string // where the expected value comes from, with its label
	got      func() (physio.Result, error)
	want     float64
	decimals int    // decimals printed in the source
	unit     string // expected UCUM unit
}

func refCases() []refCase {
	return []refCase{
		// §1 alveolar ventilation equation
		{"PaCO2_mmHg_from_VCO2_200mLmin_VA_4.2Lmin", "reference §1 check [derived]",
			func() (physio.Result, error) { return physio.PaCO2FromAlveolarVentilation(200, 4.2, 37) },
			41.10, 2, "mm[Hg]"},
		{"PaCO2_kPa_from_VCO2_200mLmin_VA_4.2Lmin", "reference §1 check (5.479 kPa) [derived]",
			func() (physio.Result, error) { return physio.PaCO2FromAlveolarVentilationKPa(200, 4.2, 37) },
			5.479, 3, "kPa"},
		{"VA_Lmin_for_PaCO2_40mmHg_VCO2_200mLmin", "reference §1 check [derived]",
			func() (physio.Result, error) { return physio.AlveolarVentilationFromPaCO2(200, 40, 37) },
			4.315, 3, "L/min"},
		{"VA_Lmin_for_PaCO2_5.3329kPa_VCO2_200mLmin", "reference §1 check with §10 40 mmHg = 5.3329 kPa [derived]",
			func() (physio.Result, error) { return physio.AlveolarVentilationFromPaCO2KPa(200, 5.3329, 37) },
			4.315, 3, "L/min"},
		// §2 Bohr-Enghoff
		{"PECO2_mmHg_VE_10Lmin_VCO2_200mLmin", "reference §2 check [derived]",
			func() (physio.Result, error) { return physio.MixedExpiredPCO2(200, 10, 37) },
			17.26, 2, "mm[Hg]"},
		{"VDVT_VCO2_200mLmin_VE_10Lmin_PaCO2_45mmHg", "reference §2 check [derived]",
			func() (physio.Result, error) { return physio.DeadSpaceFromVCO2(45, 200, 10, 37) },
			0.6164, 4, "1"},
		{"VDVT_Enghoff_PaCO2_40mmHg_PECO2_27mmHg", "reference §2 check [derived]",
			func() (physio.Result, error) { return physio.DeadSpaceEnghoff(40, 27) },
			0.325, 3, "1"},
		{"VD_mL_VDVT_0.325_VT_500mL", "reference §2 check [derived]",
			func() (physio.Result, error) { return physio.DeadSpaceVolume(0.325, 500) },
			162.5, 1, "mL"},
		// §3-4 estimated dead space and energy
		{"REE_kcald_HarrisBenedict1919_man_70kg_175cm_40y", "reference §3 check, §4 Harris-Benedict 1919 [derived]",
			func() (physio.Result, error) { return physio.RestingEnergy(man) },
			1634.46, 2, "kcal/d"},
		{"VCO2_mLmin_estimated_Weir_RQ_0.8", "reference §3 check [derived from Weir 1949]",
			func() (physio.Result, error) { return physio.EstimateVCO2(man) },
			188.16, 2, "mL/min"},
		{"VDVT_estimated_K_0.86_VE_10Lmin_PaCO2_45mmHg", "reference §3 check, Siddiki 2010 method [derived]",
			func() (physio.Result, error) { return physio.DeadSpaceEstimated(45, 10, man) },
			0.6404, 4, "1"},
		{"REE_kcald_RozaShizgal1984_man_70kg_175cm_40y", "reference §4 Roza-Shizgal 1984 coefficients, hand arithmetic [derived]",
			func() (physio.Result, error) {
				e := man
				e.Equation = physio.RozaShizgal1984
				return physio.RestingEnergy(e)
			},
			1638.897, 3, "kcal/d"},
		{"REE_kcald_HarrisBenedict1919_woman_60kg_163cm_50y", "reference §4 Harris-Benedict 1919 women's coefficients, hand arithmetic [derived]",
			func() (physio.Result, error) {
				return physio.RestingEnergy(physio.EnergyInput{Sex: physio.Female, Age: 50, Weight: 60, Height: 163, Equation: physio.HarrisBenedict1919})
			},
			1296.6043, 4, "kcal/d"},
		{"REE_kcald_RozaShizgal1984_woman_60kg_163cm_50y", "reference §4 Roza-Shizgal 1984 women's coefficients, hand arithmetic [derived]",
			func() (physio.Result, error) {
				return physio.RestingEnergy(physio.EnergyInput{Sex: physio.Female, Age: 50, Weight: 60, Height: 163, Equation: physio.RozaShizgal1984})
			},
			1290.887, 3, "kcal/d"},
		// §5 predicted body weight
		{"PBW_kg_man_175cm", "reference §5 check, ARDS Network NEJM 2000 [published formula, derived value]",
			func() (physio.Result, error) { return physio.PredictedBodyWeight(physio.Male, 175) },
			70.566, 3, "kg"},
		{"PBW_kg_woman_163cm", "reference §5 check, ARDS Network NEJM 2000 [published formula, derived value]",
			func() (physio.Result, error) { return physio.PredictedBodyWeight(physio.Female, 163) },
			55.146, 3, "kg"},
		// §6 ventilatory ratio
		{"VR_VE_10Lmin_PaCO2_45mmHg_PBW_70.566kg", "reference §6 check, Sinha 2009 with 37.5 mmHg [derived]",
			func() (physio.Result, error) { return physio.VentilatoryRatio(10, 45, 70.566) },
			1.7005, 4, "1"},
		// §7 predicted PaCO2: VA 5.4 and 3.0 L/min give 0.863 x 200 / VA.
		{"PredictedPaCO2_mmHg_VT_420mL_RR_20_VDanat_150mL_VDapp_0mL", "reference §7 check VA 5.4 L/min, §1 K [derived]",
			func() (physio.Result, error) {
				return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 420, RR: 20, AnatomicVD: 150, ApparatusVDKnown: true, BodyTemp: 37})
			},
			0.863004 * 200 / 5.4, 3, "mm[Hg]"},
		{"PredictedPaCO2_mmHg_VT_420mL_RR_20_VDanat_150mL_VDapp_120mL", "reference §7 check VA 3.0 L/min, §1 K [derived]",
			func() (physio.Result, error) {
				return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 420, RR: 20, AnatomicVD: 150, ApparatusVD: 120, ApparatusVDKnown: true, BodyTemp: 37})
			},
			0.863004 * 200 / 3.0, 3, "mm[Hg]"},
		{"PredictedPaCO2_mmHg_anatomic_2.2mLkg_of_PBW_70.566kg", "reference §7 check 155.2 mL anatomic dead space, VA (420-155.2) x 20 [derived]",
			func() (physio.Result, error) {
				return physio.PredictedPaCO2(physio.PredictedInput{VCO2: 200, VT: 420, RR: 20, PBW: 70.566, ApparatusVDKnown: true, BodyTemp: 37})
			},
			0.863004 * 200 / ((420 - 155.2) * 20 / 1000.0), 1, "mm[Hg]"},
		// §8 end-tidal indices
		{"Gradient_mmHg_PaCO2_45_PETCO2_35", "reference §8 check [derived]",
			func() (physio.Result, error) { return physio.EndTidalGradient(45, 35) },
			10, 0, "mm[Hg]"},
		{"AVDSF_PaCO2_45mmHg_PETCO2_35mmHg", "reference §8 check [derived]",
			func() (physio.Result, error) { return physio.AlveolarDeadSpaceFraction(45, 35) },
			0.222, 3, "1"},
		// §9 ventilation for a target
		{"Rate_per_min_RR_14_PaCO2_55_to_40mmHg", "reference §9 check [published rule; derived]",
			func() (physio.Result, error) { return physio.RateForTarget(14, 55, 40, 420, 70.566) },
			19.25, 2, "/min"},
		{"VT_mL_VT_420_VD_180_PaCO2_55_to_40mmHg", "reference §9 check (not 577.5) [derived]",
			func() (physio.Result, error) { return physio.TidalVolumeForTarget(420, 180, 55, 40, 70.566) },
			510, 0, "mL"},
		// §11 one consistent end-to-end vector
		{"E2E_PBW_kg", "reference §11 [derived]",
			func() (physio.Result, error) { return physio.PredictedBodyWeight(physio.Male, 175) },
			70.566, 3, "kg"},
		{"E2E_VR", "reference §11 [derived]",
			func() (physio.Result, error) { return physio.VentilatoryRatio(10, 45, 70.566) },
			1.7005, 4, "1"},
		{"E2E_PECO2_mmHg", "reference §11 [derived]",
			func() (physio.Result, error) { return physio.MixedExpiredPCO2(200, 10, 37) },
			17.26, 2, "mm[Hg]"},
		{"E2E_VDVT_K_0.863", "reference §11 [derived]",
			func() (physio.Result, error) { return physio.DeadSpaceFromVCO2(45, 200, 10, 37) },
			0.61644, 5, "1"},
		// The package uses K(T) with measured VCO2; K(T) = 0.86 at T = 273 x
		// 0.86/0.76 - 273 = 35.92105 Cel, which reproduces the K 0.86 value.
		{"E2E_VDVT_K_0.86_VCO2_200mLmin_at_35.92105Cel", "reference §11 [derived]; K(T) of §1",
			func() (physio.Result, error) { return physio.DeadSpaceFromVCO2(45, 200, 10, 273*0.86/0.76-273) },
			0.61778, 5, "1"},
		{"E2E_VDVT_K_0.86_HarrisBenedict_VCO2", "reference §11 [derived]",
			func() (physio.Result, error) { return physio.DeadSpaceEstimated(45, 10, man) },
			0.64040, 5, "1"},
		{"E2E_AVDSF", "reference §11 [derived]",
			func() (physio.Result, error) { return physio.AlveolarDeadSpaceFraction(45, 35) },
			0.2222, 4, "1"},
		{"E2E_VA_Lmin_from_VE_10_VDVT_0.61644", "reference §11 [derived]",
			func() (physio.Result, error) { return physio.AlveolarVentilationFromDeadSpace(10, 0.61644) },
			3.836, 3, "L/min"},
		{"E2E_PaCO2_mmHg_back_from_VA_3.836Lmin", "reference §11 check back [derived]",
			func() (physio.Result, error) { return physio.PaCO2FromAlveolarVentilation(200, 3.836, 37) },
			45.0, 1, "mm[Hg]"},
	}
}

func TestReferenceCheckValues(t *testing.T) {
	for _, c := range refCases() {
		t.Run(c.name, func(t *testing.T) {
			r, err := c.got()
			if err != nil {
				t.Fatalf("%s: unexpected error: %v", c.source, err)
			}
			if tol := halfUnit(c.decimals); math.Abs(r.Value-c.want) > tol {
				t.Errorf("%s: got %.6f, want %.*f (tolerance %g)", c.source, r.Value, c.decimals, c.want, tol)
			}
			if r.Unit != c.unit {
				t.Errorf("unit %q, want %q", r.Unit, c.unit)
			}
			if r.Method == "" || r.MethodVersion == "" || r.Basis() == "" {
				t.Errorf("result lacks method, version or basis: %+v", r)
			}
		})
	}
}

func TestAlveolarConstant(t *testing.T) {
	// reference §1: K(T) = 0.760 x (273 + T)/273 [derived, ideal gas law],
	// printed to 5 decimals; 37 Cel also to 6 (0.863004) and in kPa 0.115058.
	cases := []struct {
		name     string
		tempCel  physio.Celsius
		wantMmHg float64
		decimals int
	}{
		{"35Cel", 35, 0.85744, 5},
		{"37Cel", 37, 0.863004, 6},
		{"39Cel", 39, 0.86857, 5},
		{"40Cel", 40, 0.87136, 5},
		{"0Cel_means_not_measured_37Cel", 0, 0.863004, 6},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			km, kk := physio.AlveolarConstant(c.tempCel)
			if math.Abs(km-c.wantMmHg) > halfUnit(c.decimals) {
				t.Errorf("reference §1 [derived]: K = %.6f, want %.*f", km, c.decimals, c.wantMmHg)
			}
			// The kPa form is the mm[Hg] form scaled by 101.325/760 (one
			// standard atmosphere in both units).
			if math.Abs(kk-km*101.325/760) > 1e-12 {
				t.Errorf("kPa form %.7f is not the mmHg form x 101.325/760", kk)
			}
		})
	}
	t.Run("37Cel_kPa_form", func(t *testing.T) {
		_, kk := physio.AlveolarConstant(37)
		if math.Abs(kk-0.115058) > halfUnit(6) {
			t.Errorf("reference §1 [derived]: kPa K = %.7f, want 0.115058", kk)
		}
	})
	t.Run("37Cel_rounds_to_published_0.863", func(t *testing.T) {
		km, _ := physio.AlveolarConstant(37)
		if math.Abs(km-0.863) > halfUnit(3) {
			t.Errorf("Wang et al. 2020 [published]: K = %.6f does not round to 0.863", km)
		}
	})
	for _, bad := range []physio.Celsius{physio.Celsius(math.NaN()), physio.Celsius(math.Inf(1)), -5, 20, 50} {
		if km, kk := physio.AlveolarConstant(bad); km != 0 || kk != 0 {
			t.Errorf("AlveolarConstant(%v) = %v, %v; want 0, 0 (refused, never NaN)", bad, km, kk)
		}
	}
}

func TestUnitConversions(t *testing.T) {
	cases := []struct {
		name     string
		source   string
		got      float64
		want     float64
		decimals int
	}{
		{"40mmHg_in_kPa", "reference §10 [derived]; UCUM 133.322 Pa", float64(physio.MmHg(40).KPa()), 5.3329, 4},
		{"5kPa_in_mmHg", "reference §10 [derived]", float64(physio.KPa(5).MmHg()), 37.503, 3},
		{"1kPa_in_mmHg", "codes.md UCUM: 1 kPa = 7.500638 mmHg", float64(physio.KPa(1).MmHg()), 7.500638, 6},
		{"1mmHg_in_Pa_UCUM", "UCUM m[Hg] = 133.3220 kPa [published]", float64(physio.MmHg(1).KPa()) * 1000, 133.322, 3},
		{"1mmHg_UCUM_vs_NIST_133.3224Pa_in_ppm", "NIST SP 811 App. B 133.3224 Pa [memory]: 3.0 ppm above UCUM", (133.3224 - physio.PascalPerMmHg) / 133.3224 * 1e6, 3.0, 1},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if math.Abs(c.got-c.want) > halfUnit(c.decimals) {
				t.Errorf("%s: got %.7f, want %.*f", c.source, c.got, c.decimals, c.want)
			}
		})
	}
	t.Run("round_trip_45mmHg", func(t *testing.T) {
		if got := physio.MmHg(45).KPa().MmHg(); math.Abs(float64(got)-45) > 1e-12 {
			t.Errorf("45 mmHg -> kPa -> mmHg = %v", got)
		}
	})
}

// The Weir check of reference §4: 1.44 x (3.941 x 235.20 + 1.106 x 188.16)
// = 1634.46, with VO2 = VCO2 / RQ = 235.20 mL/min (reference §3).
func TestWeirCheckValues(t *testing.T) {
	r, err := physio.EstimateVCO2(man)
	if err != nil {
		t.Fatal(err)
	}
	vo2 := r.Value / physio.DefaultRQ
	if math.Abs(vo2-235.20) > halfUnit(2) {
		t.Errorf("reference §3 [derived]: VO2 = %.3f, want 235.20", vo2)
	}
	ree := 1.44 * (3.941*vo2 + 1.106*r.Value)
	if math.Abs(ree-1634.46) > halfUnit(2) {
		t.Errorf("reference §4 Weir 1949 [published formula, derived value]: REE = %.3f, want 1634.46", ree)
	}
}

// Published normal and group values lie inside the plausible ranges, so
// that no published patient is refused as implausible.
func TestPublishedValuesArePlausible(t *testing.T) {
	cases := []struct {
		name   string
		source string
		r      physio.Range
		values []float64
	}{
		{"PaCO2_35_to_45mmHg", "reference §1, textbooks [published]", physio.PaCO2Range, []float64{35, 40, 45}},
		{"VCO2_200mLmin", "reference §1, textbooks [published]", physio.VCO2Range, []float64{200}},
		{"VE_10Lmin", "reference §2, §11 vectors [derived]", physio.MinuteVolumeRange, []float64{10}},
		{"apparatus_25_to_95mL_HME_plus_25mL_suction", "reference §7, Respir Care 2000;45:306-12 [published]", physio.ApparatusDeadSpaceRange, []float64{0, 25, 95, 120}},
		{"anatomic_155.2mL", "reference §7, Radford 1955 [published]", physio.AnatomicDeadSpaceRange, []float64{155.2}},
		{"PBW_55.146_and_70.566kg", "reference §5 [derived]", physio.PBWRange, []float64{55.146, 70.566}},
		{"PETCO2_35mmHg", "reference §8 [derived]", physio.PETCO2Range, []float64{35}},
		{"temperature_35_to_40Cel", "reference §1 K(T) table [derived]", physio.BodyTempRange, []float64{35, 37, 39, 40}},
		{"RR_14_to_20_per_min", "reference §7, §9 [derived]", physio.RespRateRange, []float64{14, 19.25, 20}},
		{"VT_420_to_510mL", "reference §7, §9 [derived]", physio.TidalVolumeRange, []float64{420, 500, 510}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			for _, v := range c.values {
				if err := c.r.Check("value", v); err != nil {
					t.Errorf("%s: %v", c.source, err)
				}
			}
		})
	}
}
