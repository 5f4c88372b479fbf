package physio

import (
	"strconv"
	"strings"
)

// Named float64 types carry the unit of every value that crosses the package
// boundary. The UCUM code of each is given beside it.
type (
	MmHg     float64 // pressure in millimetres of mercury, UCUM mm[Hg]
	KPa      float64 // pressure in kilopascals, UCUM kPa
	MLPerMin float64 // gas flow in millilitres per minute, UCUM mL/min (VCO2 at STPD)
	LPerMin  float64 // ventilation in litres per minute, UCUM L/min (BTPS)
	ML       float64 // volume in millilitres, UCUM mL (BTPS)
	PerMin   float64 // rate per minute, UCUM /min
	Kg       float64 // mass in kilograms, UCUM kg
	Cm       float64 // length in centimetres, UCUM cm
	Celsius  float64 // temperature in degrees Celsius, UCUM Cel
	Years    float64 // age in years, UCUM a
	Fraction float64 // dimensionless ratio, UCUM 1
)

// UCUM unit codes used in Result.Unit and Constant.Unit.
const (
	UnitMmHg     = "mm[Hg]"
	UnitKPa      = "kPa"
	UnitMLPerMin = "mL/min"
	UnitLPerMin  = "L/min"
	UnitML       = "mL"
	UnitPerMin   = "/min"
	UnitKg       = "kg"
	UnitCm       = "cm"
	UnitCelsius  = "Cel"
	UnitYears    = "a"
	UnitOne      = "1"
	UnitKcalPerD = "kcal/d"
)

// PascalPerMmHg is the UCUM definition of the millimetre of mercury:
// UCUM defines m[Hg] as 133.3220 kPa, so 1 mm[Hg] = 133.322 Pa. NIST SP 811
// (Appendix B) lists the conventional millimetre of mercury as 133.3224 Pa;
// the two differ by 3 parts per million (0.0001 mm[Hg] at 40 mm[Hg]), far
// below any blood-gas analyser's resolution. UCUM is used because FHIR
// quantities are UCUM-coded.
const PascalPerMmHg = 133.322

// KPa converts a pressure to kilopascals with the UCUM factor.
func (p MmHg) KPa() KPa { return KPa(float64(p) * PascalPerMmHg / 1000) }

// MmHg converts a pressure to millimetres of mercury with the UCUM factor
// (1 kPa = 7.500638 mm[Hg]).
func (p KPa) MmHg() MmHg { return MmHg(float64(p) * 1000 / PascalPerMmHg) }

// Sex is the sex used by sex-specific equations (predicted body weight,
// resting energy expenditure). The zero value is unknown and is refused by
// every equation that needs a sex.
type Sex uint8

// The sexes of the sex-specific equations (FHIR administrative-gender
// "male" and "female"). SexUnknown, the zero value, is refused with
// ErrNotGiven; any other value with ErrOutOfMeaning.
const (
	SexUnknown Sex = iota // not given
	Male                  // FHIR administrative-gender "male"
	Female                // FHIR administrative-gender "female"
)

// String returns "male", "female" or "unknown" (FHIR administrative-gender codes).
func (s Sex) String() string {
	switch s {
	case Male:
		return "male"
	case Female:
		return "female"
	}
	return "unknown"
}

// EnergyEquation chooses the resting-energy equation used to estimate CO2
// production when it is not measured. The zero value is refused: the choice
// must be explicit because it changes the estimate by up to about 2 %.
type EnergyEquation uint8

const (
	// HarrisBenedict1919 is the original Harris & Benedict equation, as
	// used by Siddiki et al. (Crit Care 2010) for estimated dead space.
	HarrisBenedict1919 EnergyEquation = iota + 1
	// RozaShizgal1984 is the Roza & Shizgal revision (Am J Clin Nutr 1984).
	RozaShizgal1984
)

// String returns the equation's published name.
func (e EnergyEquation) String() string {
	switch e {
	case HarrisBenedict1919:
		return "Harris-Benedict 1919"
	case RozaShizgal1984:
		return "Roza-Shizgal 1984"
	}
	return "unknown"
}

// displayUnits maps the UCUM codes used in human-readable text to the units
// people write: UCUM stays in coded fields (Result.Unit, Constant.Unit,
// FHIR Quantity.code), display units go into basis, notes and messages.
var displayUnits = map[string]string{
	UnitMmHg:        "mmHg",
	UnitCelsius:     "°C",
	UnitYears:       "years",
	UnitKcalPerD:    "kcal/day",
	"mm[Hg].L/mL":   "mmHg·L/mL",
	"kPa.L/mL":      "kPa·L/mL",
	"cm[H2O]":       "cmH2O",
	"[degF]":        "°F",
	"{breaths}/min": "/min",
}

// DisplayUnit returns the unit to write in human-readable text for a UCUM
// code: "mmHg" for mm[Hg], "°C" for Cel, and the code itself where people
// write it the same way (mL, L/min, kPa, kg, /min); "" and "1" give "".
func DisplayUnit(ucum string) string {
	if ucum == UnitOne {
		return ""
	}
	if d, ok := displayUnits[ucum]; ok {
		return d
	}
	return ucum
}

// DisplayNumber writes a constant for people: as given when it has at most
// 6 significant digits (a published coefficient such as 13.7516 is shown
// as published), else at 4 significant digits (K = 0.8630036630036629 is
// shown 0.863). Full precision stays in the data (Constant.Value).
func DisplayNumber(v float64) string {
	s := strconv.FormatFloat(v, 'g', -1, 64)
	if significantDigits(s) <= 6 {
		return s
	}
	return strconv.FormatFloat(v, 'g', 4, 64)
}

// significantDigits counts the significant digits of a decimal number as
// written by strconv ('g', -1).
func significantDigits(s string) int {
	if i := strings.IndexAny(s, "eE"); i >= 0 {
		s = s[:i]
	}
	s = strings.TrimLeft(s, "-")
	s = strings.Replace(s, ".", "", 1)
	s = strings.TrimLeft(s, "0")
	return len(s)
}
