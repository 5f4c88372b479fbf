package fhirmap

import (
	"math"
	"strings"

	"github.com/ventderive/ventderive/physio"
)

// UCUMSystem is the FHIR system URI of UCUM unit codes.
const UCUMSystem = "http://unitsofmeasure.org"

// UCUM definitions the conversions rest on. Each value is copied from the
// UCUM essence table (ucum-essence.xml, unit definitions), so a reviewer can
// check it against the specification line by line.
const (
	// ucumMHgKPa: m[Hg] "meter of mercury column" = 133.3220 kPa (UCUM, class
	// clinical). Hence 1 mm[Hg] = 133.322 Pa, the value physio converts with.
	ucumMHgKPa = physio.PascalPerMmHg
	// ucumMH2OKPa: m[H2O] "meter of water column" = 9.80665 kPa (UCUM, class
	// clinical). Hence 1 cm[H2O] = 98.0665 Pa.
	ucumMH2OKPa = 9.80665
	// ucumGrainMg: [gr] "grain" = 64.79891 mg (UCUM, class avoirdupois).
	ucumGrainMg = 64.79891
	// ucumPoundGrains: [lb_av] "pound" = 7000 [gr] (UCUM, class avoirdupois).
	ucumPoundGrains = 7000
	// ucumInchCm: [in_i] "inch" = 2.54 cm (UCUM, class intcust).
	ucumInchCm = 2.54
	// ucumDegFKelvin: [degF] is the special unit degf(5 K/9): one degree
	// Fahrenheit is 5/9 K, and 0 K is -459.67 [degF] (UCUM special units).
	ucumDegFKelvin = 5.0 / 9.0
	ucumDegFZero   = 459.67
	// ucumCelZero: Cel is cel(1 K) with 0 Cel = 273.15 K (UCUM special units).
	ucumCelZero = 273.15
)

// Derived conversion factors into the canonical units.
const (
	mmHgPerKPa = 1 / (ucumMHgKPa / 1000)             // 1 mm[Hg] = 0.133322 kPa -> 7.500638 mm[Hg] per kPa
	kgPerPound = ucumPoundGrains * ucumGrainMg / 1e6 // 453.59237 g -> 0.45359237 kg
	cmPerInch  = ucumInchCm                          // 2.54
	mLPerL     = 1000.0                              // UCUM L = dm3; mL = 1e-3 L
	cmPerM     = 100.0                               // UCUM prefix c = 1e-2
	kgPerG     = 1e-3                                // UCUM prefix k = 1e3
	fracPerPct = 1e-2                                // UCUM % = 10*-2
)

// Unit returns the canonical UCUM unit of q: the unit of Fact.Value for
// every fact of that quantity. It returns "" for coded and date quantities
// (QSex, QBirthDate) and for quantities this package does not know.
func (q Quantity) Unit() string {
	switch q {
	case QPCO2, QPO2, QPETCO2, QPFRatio, QPECO2, QTargetPaCO2:
		return "mm[Hg]"
	case QPH:
		return "[pH]"
	case QBicarbonate, QBaseExcess:
		return "mmol/L"
	case QVCO2:
		return "mL/min"
	case QMinuteVol:
		return "L/min"
	case QTidalVol, QApparatusVD:
		return "mL"
	case QRespRate:
		return "/min"
	case QFiO2, QFETCO2:
		return "1"
	case QPEEP, QPlateau, QMeanAirway:
		return "cm[H2O]"
	case QWeight:
		return "kg"
	case QHeight:
		return "cm"
	case QBodyTemp:
		return "Cel"
	}
	return ""
}

// known reports whether q is a quantity the decoder can emit.
func (q Quantity) known() bool {
	return q.Unit() != "" || q == QSex || q == QBirthDate || q == QAirway
}

// coded reports whether facts of q carry Text rather than a number.
func (q Quantity) coded() bool { return q == QSex || q == QBirthDate || q == QAirway }

// negativeAllowed reports whether a negative value of q is physically
// possible. Base excess is signed by definition; nothing else here is.
func (q Quantity) negativeAllowed() bool { return q == QBaseExcess }

// unitError is a refusal from unit normalisation, turned into a
// DecodeError by the caller that knows the field.
type unitError struct {
	reason string
	detail string
}

func (e *unitError) Error() string { return e.reason + ": " + e.detail }

// linear maps accepted units of one dimension to factors into the canonical
// unit. Both UCUM spellings of the litre (L and l) are valid UCUM.
var (
	pressureUnits = map[string]float64{"mm[Hg]": 1, "mmHg": 1, "kPa": mmHgPerKPa} // "mmHg" is a common non-UCUM alias, accepted, never emitted
	airwayUnits   = map[string]float64{"cm[H2O]": 1}
	lPerMinUnits  = map[string]float64{"L/min": 1, "l/min": 1, "mL/min": 1 / mLPerL, "ml/min": 1 / mLPerL}
	mLPerMinUnits = map[string]float64{"mL/min": 1, "ml/min": 1, "L/min": mLPerL, "l/min": mLPerL}
	mLUnits       = map[string]float64{"mL": 1, "ml": 1, "L": mLPerL, "l": mLPerL}
	mmolUnits     = map[string]float64{"mmol/L": 1, "mmol/l": 1}
	pHUnits       = map[string]float64{"[pH]": 1}
	weightUnits   = map[string]float64{"kg": 1, "g": kgPerG, "[lb_av]": kgPerPound}
	heightUnits   = map[string]float64{"cm": 1, "m": cmPerM, "[in_i]": cmPerInch}
	fractionUnits = map[string]float64{"1": 1, "%": fracPerPct}
)

// linearUnits returns the accepted units of q, or nil for quantities with
// special rules (rates, FiO2, temperature) or no unit.
func linearUnits(q Quantity) map[string]float64 {
	switch q {
	case QPCO2, QPO2, QPETCO2, QPFRatio, QPECO2, QTargetPaCO2:
		return pressureUnits
	case QPEEP, QPlateau, QMeanAirway:
		return airwayUnits
	case QMinuteVol:
		return lPerMinUnits
	case QVCO2:
		return mLPerMinUnits
	case QTidalVol, QApparatusVD:
		return mLUnits
	case QBicarbonate, QBaseExcess:
		return mmolUnits
	case QPH:
		return pHUnits
	case QWeight:
		return weightUnits
	case QHeight:
		return heightUnits
	case QFETCO2:
		return fractionUnits
	}
	return nil
}

// isPerMinute reports whether unit is a UCUM rate per minute: "/min",
// "1/min", "min-1", or an annotated count per minute such as
// "{breaths}/min" (UCUM annotations in braces have the value 1).
func isPerMinute(unit string) bool {
	switch unit {
	case "/min", "1/min", "min-1":
		return true
	}
	rest, ok := strings.CutSuffix(unit, "/min")
	if !ok || len(rest) < 3 || rest[0] != '{' || rest[len(rest)-1] != '}' {
		return false
	}
	inner := rest[1 : len(rest)-1]
	// An annotation holds printable ASCII without braces (UCUM §2.1.1);
	// an empty one says nothing and is refused.
	for i := 0; i < len(inner); i++ {
		if c := inner[i]; c < 0x21 || c > 0x7e || c == '{' || c == '}' {
			return false
		}
	}
	return true
}

// FiO2 range limits: room air is 0.21, and a fraction cannot exceed 1.
const (
	fio2RoomAir    = 0.21
	fio2RoomAirPct = 21.0
	fio2Max        = 1.0
)

// normalise converts value, received in unit, into q's canonical unit. It
// refuses a unit that q does not accept ("unknown-unit", never guessed), a
// FiO2 that stays ambiguous ("ambiguous-value"), a result that is not
// finite ("not-finite") and a negative result where none is possible
// ("negative-value").
func normalise(q Quantity, value float64, unit string) (float64, error) {
	if math.IsNaN(value) || math.IsInf(value, 0) {
		return 0, &unitError{"not-finite", "value is not a finite number"}
	}
	var out float64
	switch {
	case q == QRespRate:
		if !isPerMinute(unit) {
			return 0, unknownUnit(q, unit)
		}
		out = value
	case q == QBodyTemp:
		switch unit {
		case "Cel":
			out = value
		case "[degF]":
			out = fahrenheitToCelsius(value)
		default:
			return 0, unknownUnit(q, unit)
		}
	case q == QFiO2:
		v, err := fio2Fraction(value, unit)
		if err != nil {
			return 0, err
		}
		out = v
	default:
		units := linearUnits(q)
		f, ok := units[unit]
		if !ok {
			return 0, unknownUnit(q, unit)
		}
		out = value * f
	}
	if math.IsNaN(out) || math.IsInf(out, 0) {
		return 0, &unitError{"not-finite", "value overflows after conversion"}
	}
	if out < 0 && !q.negativeAllowed() {
		return 0, &unitError{"negative-value", "negative " + string(q) + " is impossible"}
	}
	return out, nil
}

// fahrenheitToCelsius follows the UCUM definitions: K = (F + 459.67) * 5/9
// and Cel = K - 273.15, which is Cel = (F - 32) * 5/9 since
// 273.15 / (5/9) - 459.67 = 32 exactly. The second form is used because it
// rounds better (100.4 [degF] gives 38 Cel, not 38.00000000000006).
func fahrenheitToCelsius(f float64) float64 {
	return (f - degFAtCelZero) * ucumDegFKelvin
}

// degFAtCelZero is 0 Cel in [degF]: ucumCelZero/ucumDegFKelvin - ucumDegFZero = 32.
const degFAtCelZero = 32

// fio2Fraction applies the FiO2 rule. A value in [21, 100] labelled "%" is
// a percent. A value in [0.21, 1] labelled "1" is a fraction, and so is one
// in [0.21, 1) labelled "%" (senders are seen to label fractions "%").
// Anything else is ambiguous and refused: 1.0 labelled "%" (1 % or
// 100 %?), values in (1, 21) labelled "%" (2-20 % is below room air, so it
// is neither a plausible percent nor, being above 1, a fraction), values
// below 0.21 (no patient breathes less than room-air oxygen), and values
// above 1 labelled "1".
func fio2Fraction(v float64, unit string) (float64, error) {
	switch unit {
	case "%":
		switch {
		case v >= fio2RoomAirPct && v <= 100:
			return v * fracPerPct, nil
		case v >= fio2RoomAir && v < fio2Max:
			return v, nil
		}
	case "1":
		if v >= fio2RoomAir && v <= fio2Max {
			return v, nil
		}
	default:
		return 0, unknownUnit(QFiO2, unit)
	}
	if v < 0 {
		return 0, &unitError{"negative-value", "negative fio2 is impossible"}
	}
	return 0, &unitError{"ambiguous-value", "fio2 labelled " + quoteShort(unit) + " is neither a clear percent nor a clear fraction"}
}

func unknownUnit(q Quantity, unit string) error {
	if unit == "" {
		return &unitError{"unknown-unit", "no unit given for " + string(q)}
	}
	return &unitError{"unknown-unit", "unit " + quoteShort(unit) + " is not accepted for " + string(q)}
}

// quoteShort quotes s for an error detail, cut to 40 bytes so that a
// hostile input cannot flood logs.
func quoteShort(s string) string {
	const max = 40
	if len(s) > max {
		s = s[:max] + "..."
	}
	var b strings.Builder
	b.WriteByte('"')
	for _, r := range s {
		if r < 0x20 || r == 0x7f || r == '"' || r == '\\' {
			b.WriteByte('?')
			continue
		}
		b.WriteRune(r)
	}
	b.WriteByte('"')
	return b.String()
}
