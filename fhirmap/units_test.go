package fhirmap

import (
	"errors"
	"math"
	"testing"
)

// cmH2OPerMmHg: 1 mm[Hg] = 1.359510 cm[H2O], from the UCUM definitions in units.go.
const cmH2OPerMmHg = ucumMHgKPa / ucumMH2OKPa / 10

func near(a, b, tol float64) bool { return math.Abs(a-b) <= tol }

// TestUCUMFactors checks each conversion factor against the published
// definition it rests on.
func TestUCUMFactors(t *testing.T) {
	cases := []struct {
		name      string
		got, want float64
		tol       float64
		source    string
	}{
		{"mm[Hg]_in_Pa", ucumMHgKPa * 1000 / 1000, 133.322, 1e-9,
			"UCUM ucum-essence.xml: m[Hg] = 133.3220 kPa, so mmHg = 133.322 Pa"},
		{"mm[Hg]_in_Pa_vs_conventional_mercury", ucumMHgKPa, 13.5951 * 9.80665, 5e-4,
			"conventional mercury 13.5951 g/cm3 x standard gravity 9.80665 m/s2 (UCUM [g]) = 133.3224 Pa per mm; UCUM rounds to 133.3220"},
		{"mm[Hg]_in_Pa_vs_NIST", ucumMHgKPa, 133.3224, 5e-4,
			"NIST SP 811 appendix B: 1 mmHg (conventional) = 133.3224 Pa"},
		{"mm[Hg]_per_kPa", mmHgPerKPa, 7.500638, 5e-7,
			"shared reference codes.md (UCUM): 1 kPa = 7.500638 mmHg"},
		{"cm[H2O]_in_mm[Hg]", 1 / cmH2OPerMmHg, 0.735561, 5e-7,
			"shared reference codes.md (UCUM): 1 cm[H2O] = 0.735561 mmHg; UCUM m[H2O] = 9.80665 kPa"},
		{"[lb_av]_in_kg", kgPerPound, 0.45359237, 1e-15,
			"UCUM: [lb_av] = 7000 [gr], [gr] = 64.79891 mg; international pound = 0.45359237 kg exactly"},
		{"[in_i]_in_cm", cmPerInch, 2.54, 0,
			"UCUM: [in_i] = 2.54 cm"},
		{"98.6_[degF]_in_Cel", fahrenheitToCelsius(98.6), 37, 1e-12,
			"UCUM [degF] = degf(5 K/9), 0 K = -459.67 [degF]; °C = K - 273.15"},
		{"32_[degF]_in_Cel", fahrenheitToCelsius(32), 0, 1e-12, "UCUM [degF], °C (freezing point of water)"},
		{"212_[degF]_in_Cel", fahrenheitToCelsius(212), 100, 1e-12, "UCUM [degF], °C (boiling point of water at 1 atm)"},
		{"-40_[degF]_in_Cel", fahrenheitToCelsius(-40), -40, 1e-12, "UCUM [degF], °C (the scales cross at -40)"},
		{"[degF]_long_form", fahrenheitToCelsius(100.4), (100.4+ucumDegFZero)*ucumDegFKelvin - ucumCelZero, 1e-9,
			"UCUM [degF] definition, K = (F + 459.67) x 5/9, °C = K - 273.15"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if !near(c.got, c.want, c.tol) {
				t.Errorf("got %.10g, want %.10g (+/- %g) [%s]", c.got, c.want, c.tol, c.source)
			}
		})
	}
}

func TestNormalise(t *testing.T) {
	cases := []struct {
		name   string
		q      Quantity
		value  float64
		unit   string
		want   float64
		reason string // refusal reason, "" when accepted
	}{
		{"pco2_40_mm[Hg]", QPCO2, 40, "mm[Hg]", 40, ""},
		{"pco2_40_mmHg_alias", QPCO2, 40, "mmHg", 40, ""},
		// 5.333 kPa / 0.133322 kPa per mm[Hg] (UCUM m[Hg] = 133.3220 kPa) = 40.0009 mm[Hg].
		{"pco2_5.333_kPa", QPCO2, 5.333, "kPa", 40.000900076506, ""},
		{"pco2_mm_Hg_with_space", QPCO2, 40, "mm Hg", 0, "unknown-unit"},
		{"pco2_no_unit", QPCO2, 40, "", 0, "unknown-unit"},
		{"pco2_Torr_not_accepted", QPCO2, 40, "Torr", 0, "unknown-unit"},
		// 4.9 kPa / 0.133322 = 36.753124 mm[Hg] (UCUM m[Hg]).
		{"petco2_4.9_kPa", QPETCO2, 4.9, "kPa", 36.753124015541, ""},
		{"peep_8_cm[H2O]", QPEEP, 8, "cm[H2O]", 8, ""},
		{"peep_cmH2O_not_UCUM", QPEEP, 8, "cmH2O", 0, "unknown-unit"},
		{"minute_volume_8800_mL/min", QMinuteVol, 8800, "mL/min", 8.8, ""},
		{"minute_volume_8.8_l/min", QMinuteVol, 8.8, "l/min", 8.8, ""},
		{"minute_volume_L_not_rate", QMinuteVol, 8.8, "L", 0, "unknown-unit"},
		{"vco2_0.2_L/min", QVCO2, 0.2, "L/min", 200, ""},
		{"vco2_200_mL/min", QVCO2, 200, "mL/min", 200, ""},
		{"tidal_volume_0.45_L", QTidalVol, 0.45, "L", 450, ""},
		{"tidal_volume_450_mL", QTidalVol, 450, "mL", 450, ""},
		{"tidal_volume_450_cc", QTidalVol, 450, "cc", 0, "unknown-unit"},
		{"resp_rate_20_/min", QRespRate, 20, "/min", 20, ""},
		{"resp_rate_20_1/min", QRespRate, 20, "1/min", 20, ""},
		{"resp_rate_20_{breaths}/min", QRespRate, 20, "{breaths}/min", 20, ""},
		{"resp_rate_20_{breath}/min", QRespRate, 20, "{breath}/min", 20, ""},
		{"resp_rate_20_breaths/min_no_braces", QRespRate, 20, "breaths/min", 0, "unknown-unit"},
		{"resp_rate_20_{}/min_empty_annotation", QRespRate, 20, "{}/min", 0, "unknown-unit"},
		{"resp_rate_per_second", QRespRate, 0.3, "/s", 0, "unknown-unit"},
		{"weight_80_kg", QWeight, 80, "kg", 80, ""},
		{"weight_80000_g", QWeight, 80000, "g", 80, ""},
		{"weight_176.37_[lb_av]", QWeight, 176.37, "[lb_av]", 176.37 * 0.45359237, ""},
		{"weight_lb_not_UCUM", QWeight, 176, "lb", 0, "unknown-unit"},
		{"height_175_cm", QHeight, 175, "cm", 175, ""},
		{"height_1.75_m", QHeight, 1.75, "m", 175, ""},
		{"height_69_[in_i]", QHeight, 69, "[in_i]", 175.26, ""},
		{"temp_37_Cel", QBodyTemp, 37, "Cel", 37, ""},
		{"temp_98.6_[degF]", QBodyTemp, 98.6, "[degF]", 37, ""},
		{"temp_degC_not_UCUM", QBodyTemp, 37, "°C", 0, "unknown-unit"},
		{"hco3_24_mmol/L", QBicarbonate, 24, "mmol/L", 24, ""},
		{"base_excess_-3_mmol/L_negative_allowed", QBaseExcess, -3, "mmol/L", -3, ""},
		{"ph_7.4_[pH]", QPH, 7.4, "[pH]", 7.4, ""},
		{"ph_no_unit", QPH, 7.4, "", 0, "unknown-unit"},
		{"fetco2_5_%", QFETCO2, 5, "%", 0.05, ""},
		{"pco2_negative", QPCO2, -1, "mm[Hg]", 0, "negative-value"},
		{"temp_negative_after_conversion_[degF]", QBodyTemp, 20, "[degF]", 0, "negative-value"},
		{"pco2_infinite", QPCO2, math.Inf(1), "mm[Hg]", 0, "not-finite"},
		{"pco2_NaN", QPCO2, math.NaN(), "mm[Hg]", 0, "not-finite"},
		{"pco2_overflow_kPa", QPCO2, math.MaxFloat64, "kPa", 0, "not-finite"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got, err := normalise(c.q, c.value, c.unit)
			checkNormalised(t, got, err, c.want, c.reason)
		})
	}
}

func checkNormalised(t *testing.T, got float64, err error, want float64, reason string) {
	t.Helper()
	if reason != "" {
		var ue *unitError
		if !errors.As(err, &ue) || ue.reason != reason {
			t.Fatalf("got %v, %v; want refusal %q", got, err, reason)
		}
		return
	}
	if err != nil {
		t.Fatalf("unexpected refusal: %v", err)
	}
	if !near(got, want, 1e-9*math.Max(1, math.Abs(want))) {
		t.Fatalf("got %.12g, want %.12g", got, want)
	}
}

// TestFiO2 checks the FiO2 range rule (task rule; shared reference
// codes.md notes that fractions arrive labelled "%").
func TestFiO2(t *testing.T) {
	cases := []struct {
		name   string
		value  float64
		unit   string
		want   float64
		reason string
	}{
		{"21_%_room_air", 21, "%", 0.21, ""},
		{"40_%", 40, "%", 0.40, ""},
		{"100_%", 100, "%", 1, ""},
		// 2-20 % is below room air: neither a plausible percent nor (above
		// 1) a fraction, so ambiguous as the documented rule says.
		{"1.5_%_ambiguous", 1.5, "%", 0, "ambiguous-value"},
		{"2_%_ambiguous", 2, "%", 0, "ambiguous-value"},
		{"20_%_ambiguous", 20, "%", 0, "ambiguous-value"},
		{"20.9_%_ambiguous", 20.9, "%", 0, "ambiguous-value"},
		{"0.4_%_fraction_mislabelled", 0.4, "%", 0.4, ""},
		{"0.21_%_fraction_mislabelled", 0.21, "%", 0.21, ""},
		{"1.0_%_ambiguous", 1.0, "%", 0, "ambiguous-value"},
		{"0.15_%_ambiguous", 0.15, "%", 0, "ambiguous-value"},
		{"101_%_impossible", 101, "%", 0, "ambiguous-value"},
		{"0_%", 0, "%", 0, "ambiguous-value"},
		{"0.4_1", 0.4, "1", 0.4, ""},
		{"1_1", 1, "1", 1, ""},
		{"0.21_1", 0.21, "1", 0.21, ""},
		{"0.2_1_below_room_air", 0.2, "1", 0, "ambiguous-value"},
		{"40_1_percent_labelled_fraction", 40, "1", 0, "ambiguous-value"},
		{"-0.4_1_negative", -0.4, "1", 0, "negative-value"},
		{"40_no_unit", 40, "", 0, "unknown-unit"},
		{"40_{ratio}", 40, "{ratio}", 0, "unknown-unit"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			got, err := normalise(QFiO2, c.value, c.unit)
			checkNormalised(t, got, err, c.want, c.reason)
		})
	}
}

func TestQuantityUnit(t *testing.T) {
	// Every quantity of fact.go has a canonical unit (or is coded).
	all := []Quantity{QPCO2, QPO2, QPH, QBicarbonate, QBaseExcess, QPETCO2, QVCO2, QMinuteVol, QTidalVol,
		QRespRate, QFiO2, QPEEP, QPlateau, QMeanAirway, QPFRatio, QWeight, QHeight, QBodyTemp, QSex,
		QBirthDate, QPECO2, QFETCO2}
	for _, q := range all {
		t.Run(string(q), func(t *testing.T) {
			if !q.known() {
				t.Fatal("not known")
			}
			if q.coded() != (q.Unit() == "") {
				t.Fatalf("unit %q, coded %v", q.Unit(), q.coded())
			}
			if q.coded() {
				return
			}
			// The canonical unit is itself accepted, unchanged.
			v := 0.5
			if q == QBaseExcess {
				v = -0.5
			}
			got, err := normalise(q, v, q.Unit())
			if err != nil || got != v {
				t.Fatalf("canonical unit %q: got %v, %v", q.Unit(), got, err)
			}
		})
	}
	if Quantity("nonsense").Unit() != "" {
		t.Error("unknown quantity has a unit")
	}
}
