package physio_test

import (
	"testing"

	"github.com/ventderive/ventderive/physio"
)

// TestDisplayUnit: UCUM codes stay in coded fields; text shows the units
// people write (UCUM specification, unitsofmeasure.org: mm[Hg] is the
// millimetre of mercury, Cel the degree Celsius [published]; "mmHg" and
// "°C" are their usual written forms [common practice]).
func TestDisplayUnit(t *testing.T) {
	for _, c := range []struct{ ucum, want string }{
		{"mm[Hg]", "mmHg"}, {"Cel", "°C"}, {"mm[Hg].L/mL", "mmHg·L/mL"}, {"kPa", "kPa"},
		{"L/min", "L/min"}, {"mL/min", "mL/min"}, {"mL", "mL"}, {"/min", "/min"}, {"1", ""}, {"", ""},
		{"cm[H2O]", "cmH2O"}, {"[degF]", "°F"},
	} {
		if got := physio.DisplayUnit(c.ucum); got != c.want {
			t.Errorf("DisplayUnit(%q) = %q, want %q", c.ucum, got, c.want)
		}
	}
}

// TestDisplayNumber: constants in text at a sensible precision, published
// coefficients as published (Harris & Benedict 1919, 13.7516 [published]),
// computed ones at 4 significant digits (K = 760 x 310/273/1000 =
// 0.8630036630036629 shown 0.863, physiology.md s1 [derived]).
func TestDisplayNumber(t *testing.T) {
	for _, c := range []struct {
		v    float64
		want string
	}{
		{760.0 * 310 / 273 / 1000, "0.863"}, {13.7516, "13.7516"}, {66.473, "66.473"}, {0.86, "0.86"},
		{101.325 * 310 / 273 / 1000, "0.1151"}, {2.2, "2.2"}, {40, "40"}, {152.4, "152.4"}, {1440, "1440"},
	} {
		if got := physio.DisplayNumber(c.v); got != c.want {
			t.Errorf("DisplayNumber(%v) = %q, want %q", c.v, got, c.want)
		}
	}
}
