package physio

import (
	"errors"
	"math"
	"strconv"
	"strings"
)

// Sentinel kinds of bad input, for errors.Is on an *InputError.
var (
	// ErrNotFinite: the value is NaN or ±Inf.
	ErrNotFinite = errors.New("not a finite number")
	// ErrNotPositive: the value is zero or negative where only a positive value has meaning.
	ErrNotPositive = errors.New("not positive")
	// ErrImplausible: the value lies outside its published plausible range (see the *Range variables).
	ErrImplausible = errors.New("physiologically implausible")
	// ErrOutOfMeaning: the value, or a result computed from valid values, has no
	// meaning (a fraction outside 0..1, a tidal volume not above dead space, a
	// sex or equation value outside its enumeration).
	ErrOutOfMeaning = errors.New("outside the quantity's meaning")
	// ErrNotGiven: a required choice was left at its zero value (sex,
	// energy equation, apparatus dead space not declared known). Such inputs
	// are never defaulted silently.
	ErrNotGiven = errors.New("not given")
	// ErrBeyondModel: an answer computed from valid inputs lies outside the
	// range in which the formula describes the patient (a breath rate for a
	// target PaCO2 beyond RespRateRange, where the bulk-flow alveolar
	// ventilation equation no longer holds). It is refused, never clamped.
	ErrBeyondModel = errors.New("outside the range in which the equation holds")
)

// InputError names the input (or the result) that stopped a derivation.
// Kind is one of ErrNotFinite, ErrNotPositive, ErrImplausible,
// ErrOutOfMeaning or ErrNotGiven and is what errors.Is matches.
type InputError struct {
	Input  string  // e.g. "PaCO2", "VT - dead space"
	Value  float64 // as given (or as computed, for a result out of meaning)
	Unit   string  // UCUM code of Value
	Kind   error
	Range  Range  // the plausible range checked, zero when none applies
	Detail string // what the value must satisfy, when Range does not say it
}

// Error reads like "physio: PaCO2 300 mm[Hg]: physiologically implausible
// (plausible 10 to 250 mm[Hg])"; for ErrNotGiven the value is left out.
func (e *InputError) Error() string {
	var b strings.Builder
	b.WriteString("physio: ")
	b.WriteString(e.Input)
	if e.Kind != ErrNotGiven {
		b.WriteByte(' ')
		b.WriteString(strconv.FormatFloat(e.Value, 'g', 6, 64))
		if u := DisplayUnit(e.Unit); u != "" {
			b.WriteByte(' ')
			b.WriteString(u)
		}
	}
	b.WriteString(": ")
	b.WriteString(e.Kind.Error())
	if e.Detail != "" {
		b.WriteString(" (")
		b.WriteString(e.Detail)
		b.WriteByte(')')
	} else if e.Range != (Range{}) {
		b.WriteString(" (plausible ")
		b.WriteString(rangeText(e.Range))
		b.WriteByte(')')
	}
	return b.String()
}

// Unwrap returns Kind, so that errors.Is(err, ErrImplausible) works.
func (e *InputError) Unwrap() error { return e.Kind }

// Range is the plausible range of an input, inclusive at both ends, with the
// reasoning behind it. fhirmap uses the exported ranges to refuse implausible
// input with a reason before calling a derivation.
type Range struct {
	Min, Max float64
	Unit     string // UCUM
	Why      string // the reasoning, with its label ([published], [common practice], [memory], [derived])
}

// Contains reports whether v is finite and within [Min, Max].
func (r Range) Contains(v float64) bool {
	return !math.IsNaN(v) && v >= r.Min && v <= r.Max
}

// Check returns nil when v is within the range, else an *InputError naming
// input: ErrNotFinite for NaN or ±Inf, ErrNotPositive for zero or less when
// the range is positive, ErrImplausible otherwise.
func (r Range) Check(input string, v float64) error {
	switch {
	case math.IsNaN(v) || math.IsInf(v, 0):
		return &InputError{Input: input, Value: v, Unit: r.Unit, Kind: ErrNotFinite, Range: r}
	case r.Min > 0 && v <= 0:
		return &InputError{Input: input, Value: v, Unit: r.Unit, Kind: ErrNotPositive, Range: r}
	case v < r.Min || v > r.Max:
		return &InputError{Input: input, Value: v, Unit: r.Unit, Kind: ErrImplausible, Range: r}
	}
	return nil
}

// meaningError reports a value, or a computed result, that has no meaning.
func meaningError(input string, v float64, unit, detail string) error {
	return &InputError{Input: input, Value: v, Unit: unit, Kind: ErrOutOfMeaning, Detail: detail}
}

// checkFraction refuses a fraction that is not strictly between 0 and 1.
func checkFraction(input string, f float64) error {
	if math.IsNaN(f) || math.IsInf(f, 0) {
		return &InputError{Input: input, Value: f, Unit: UnitOne, Kind: ErrNotFinite, Range: DeadSpaceFractionRange}
	}
	if f <= 0 || f >= 1 {
		return meaningError(input, f, UnitOne, "a fraction of the breath must lie strictly between 0 and 1")
	}
	return nil
}

// finite reports whether v is neither NaN nor ±Inf.
func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }

// Plausible ranges of the inputs. Each is wide enough for any adult patient
// a ventilator can support and narrow enough to catch unit and entry errors
// (a kPa value sent as mm[Hg], litres sent as millilitres). Values outside
// are refused with ErrImplausible, never clamped.
var (
	// PaCO2Range bounds arterial PCO2, in mm[Hg]. Why: the healthy range is
	// 35-45 mm[Hg] [published textbooks]; maximal hyperventilation and severe
	// metabolic acidosis reach about 10 mm[Hg], and survival after values
	// above 200 mm[Hg] in acute severe asthma is reported [memory]. The floor
	// of 10 is where those two concerns meet: a kPa value labelled mm[Hg]
	// reads 4.7-6 for a healthy patient and below 10 for any PaCO2 up to 75
	// mm[Hg] (10 kPa), so 10 refuses most such mislabels, while the lowest
	// PaCO2 seen clinically is about 10 mm[Hg] [memory]. A kPa value of 10-13
	// labelled mm[Hg] (severe hypercapnia) still passes as an extreme
	// hypocapnia; the floor cannot tell them apart [common practice].
	PaCO2Range = Range{Min: 10, Max: 250, Unit: UnitMmHg,
		Why: "healthy 35-45 mmHg [published textbooks]; values near 10 (extreme hyperventilation) and far above 100 (severe acute hypercapnia) are rare [common practice]; below 10 most likely kPa sent as mmHg (10 kPa = 75 mmHg) [common practice]"}

	// TargetPaCO2Range bounds a target PaCO2 for the ventilation-for-target
	// advice, in mm[Hg]. Why: targets in practice run from mild
	// hyperventilation (about 30) to permissive hypercapnia (about 60-80)
	// [common practice]; 20-100 leaves room for both and refuses typing errors.
	TargetPaCO2Range = Range{Min: 20, Max: 100, Unit: UnitMmHg,
		Why: "targets run from about 30 (hyperventilation) to 60-80 (permissive hypercapnia) [common practice]"}

	// PECO2Range bounds the mixed-expired PCO2, in mm[Hg]; it must also be
	// below PaCO2 (else ErrOutOfMeaning). Why: mixed-expired gas is alveolar
	// gas diluted by dead-space gas, so it lies between 0 and PaCO2 [published:
	// Bohr-Enghoff]; below 1 mm[Hg] no CO2 is being eliminated.
	PECO2Range = Range{Min: 1, Max: 250, Unit: UnitMmHg,
		Why: "alveolar gas diluted by dead-space gas: above 0 and below PaCO2 [published: Bohr-Enghoff]"}

	// PETCO2Range bounds the end-tidal PCO2, in mm[Hg]. Why: below 10
	// mm[Hg] the reading means disconnection, a sampling fault or very low
	// pulmonary blood flow (the range seen in cardiac arrest), not a steady
	// state [common practice]; and a kPa value labelled mm[Hg] reads 4-6.5
	// for a usual end-tidal PCO2 of 30-49 mm[Hg], so a floor of 10 refuses it
	// (5.3 kPa sent as "5.3 mm[Hg]" would otherwise give a gradient of about
	// 40 mm[Hg]) [common practice]. The upper bound matches PaCO2Range.
	PETCO2Range = Range{Min: 10, Max: 250, Unit: UnitMmHg,
		Why: "below 10 mmHg means disconnection, sampling fault or very low pulmonary flow, or a kPa value labelled mmHg (usual 4-6.5 kPa) [common practice]; upper bound as PaCO2"}

	// VCO2Range bounds CO2 production, in mL/min (STPD). Why: about 200
	// mL/min in a resting adult [published textbooks], about 2.5-3 mL/kg/min;
	// 40 covers a small hypothermic adult, 1000 is five times resting, beyond
	// a sedated ventilated adult [common practice].
	VCO2Range = Range{Min: 40, Max: 1000, Unit: UnitMLPerMin,
		Why: "about 200 mL/min at rest [published textbooks]; 40 small hypothermic adult to 1000, five times resting [common practice]"}

	// MinuteVolumeRange bounds minute ventilation, in L/min (BTPS).
	// Why: ventilated adults need about 4-20 L/min [common practice]; 0.5 and
	// 60 bound a disconnected sensor and a litres/millilitres mix-up.
	MinuteVolumeRange = Range{Min: 0.5, Max: 60, Unit: UnitLPerMin,
		Why: "ventilated adults about 4-20 L/min [common practice]; outside 0.5-60 a sensor or unit error"}

	// AlveolarVentilationRange bounds alveolar ventilation given as an input,
	// in L/min (BTPS). Why: about 4.3 L/min in a healthy adult [derived:
	// 0.863 x 200 mL/min / 40 mm[Hg], textbook VCO2 and PaCO2]; a part of
	// minute ventilation, so within MinuteVolumeRange with a lower floor.
	AlveolarVentilationRange = Range{Min: 0.2, Max: 60, Unit: UnitLPerMin,
		Why: "about 4.3 L/min in health [derived from textbook VCO2 200 mL/min and PaCO2 40 mmHg]; a part of minute ventilation, so at most 60 L/min"}

	// TidalVolumeRange bounds a tidal volume, in mL. Why: 4-10 mL/kg of
	// predicted body weights 15-140 kg gives about 60-1400 mL [derived from
	// the PBW formula; 4-10 mL/kg common practice]; 50-2000 refuses litres
	// sent as millilitres.
	TidalVolumeRange = Range{Min: 50, Max: 2000, Unit: UnitML,
		Why: "4-10 mL/kg of PBW 15-140 kg is about 60-1400 mL [derived]; outside 50-2000 a unit error"}

	// RespRateRange bounds a breath rate, in /min. Why: conventional adult
	// ventilation runs at about 6-35 /min [published: the NIH NHLBI ARDS
	// Network protocol card allows a set rate of 6 to 35 /min]; above 80 /min is high-frequency ventilation, where the
	// bulk-flow alveolar ventilation equation does not hold [common practice].
	RespRateRange = Range{Min: 2, Max: 80, Unit: UnitPerMin,
		Why: "conventional ventilation about 6-35 /min [published: NIH NHLBI ARDS Network protocol card, set rate 6-35 /min]; above 80 high-frequency ventilation, outside the equation's validity [common practice]"}

	// BodyTempRange bounds body temperature, in Cel. Why: therapeutic
	// hypothermia reaches 32-34 Cel and accidental hypothermia lower; above
	// 44 Cel is not survivable [common practice].
	BodyTempRange = Range{Min: 25, Max: 44, Unit: UnitCelsius,
		Why: "therapeutic hypothermia 32-34 °C, accidental lower; above 44 not survivable [common practice]"}

	// WeightRange bounds actual body weight, in kg, for the energy
	// equations. Why: adult weights [common practice].
	WeightRange = Range{Min: 20, Max: 400, Unit: UnitKg,
		Why: "adult body weight [common practice]"}

	// HeightRange bounds body height, in cm. Why: adult heights; below 120
	// cm the ARDS Network formula approaches zero (a woman of 102.4 cm gets
	// 0 kg) and is meaningless [derived from the formula].
	HeightRange = Range{Min: 120, Max: 250, Unit: UnitCm,
		Why: "adult heights; below 120 cm the ARDS Network formula tends to 0 kg (woman 102.4 cm -> 0) [derived]"}

	// AgeRange bounds age, in years (UCUM a), for the energy equations.
	// Why: the Harris-Benedict and Roza-Shizgal equations were fitted in
	// adults [published]; 120 exceeds any documented lifespan.
	AgeRange = Range{Min: 18, Max: 120, Unit: UnitYears,
		Why: "the energy equations were fitted in adults [published]; 120 exceeds any documented lifespan"}

	// PBWRange bounds predicted body weight given as an input, in kg. Why:
	// the ARDS Network formula over HeightRange gives 16.0 kg (woman 120 cm)
	// to 138.8 kg (man 250 cm) [derived].
	PBWRange = Range{Min: 15, Max: 150, Unit: UnitKg,
		Why: "ARDS Network formula over 120-250 cm gives 16.0-138.8 kg [derived]"}

	// RQRange bounds the respiratory quotient. Why: about 0.7 on fat and 1.0
	// on carbohydrate; up to about 1.3 with net lipogenesis in overfeeding
	// [common practice].
	RQRange = Range{Min: 0.67, Max: 1.3, Unit: UnitOne,
		Why: "0.7 fat, 1.0 carbohydrate, up to about 1.3 with lipogenesis [common practice]"}

	// AnatomicDeadSpaceRange bounds an anatomic dead space given as an
	// input, in mL. Why: about 2.2 mL/kg [published: Radford 1955] of PBW
	// 15-150 kg is 33-330 mL; 20-500 leaves room for individual variation.
	AnatomicDeadSpaceRange = Range{Min: 20, Max: 500, Unit: UnitML,
		Why: "about 2.2 mL/kg [published: Radford 1955] of PBW 15-150 kg is 33-330 mL"}

	// ApparatusDeadSpaceRange bounds apparatus dead space (HME, closed
	// suction, extensions beyond the Y-piece), in mL; zero is valid when the
	// circuit has none. Why: heat-moisture exchangers of 25-95 mL and a 25 mL
	// closed-suction unit were studied [published: Respir Care 2000;45:306-12];
	// 500 is more than any such stack.
	ApparatusDeadSpaceRange = Range{Min: 0, Max: 500, Unit: UnitML,
		Why: "HMEs 25-95 mL and closed suction 25 mL [published: Respir Care 2000;45:306-12]; 0 valid when none"}

	// PhysiologicDeadSpaceRange bounds a physiologic dead space per breath
	// given as an input, in mL; it must also be below the tidal volume. Why:
	// about 0.3 of VT in health up to about 0.8 in severe ARDS [published:
	// Nunn & Hill 1960; Nuckton 2002] of TidalVolumeRange.
	PhysiologicDeadSpaceRange = Range{Min: 20, Max: 1600, Unit: UnitML,
		Why: "0.3 (health) to about 0.8 (severe ARDS) of the tidal volume [published: Nunn & Hill 1960; Nuckton 2002]"}

	// DeadSpaceFractionRange is the meaning of VD/VT: strictly between 0 and
	// 1 (both ends excluded; out of meaning, not merely implausible).
	DeadSpaceFractionRange = Range{Min: 0, Max: 1, Unit: UnitOne,
		Why: "a fraction of the breath, strictly between 0 and 1"}
)

// PaCO2RangeKPa is PaCO2Range in kPa (UCUM factor), for the kPa forms.
var PaCO2RangeKPa = Range{
	Min: float64(MmHg(PaCO2Range.Min).KPa()), Max: float64(MmHg(PaCO2Range.Max).KPa()),
	Unit: UnitKPa, Why: PaCO2Range.Why,
}

// checkSex refuses an unknown sex: ErrNotGiven for the zero value,
// ErrOutOfMeaning for any other value than Male or Female.
func checkSex(s Sex) error {
	switch s {
	case Male, Female:
		return nil
	case SexUnknown:
		return &InputError{Input: "sex", Kind: ErrNotGiven, Detail: "male or female is needed by the sex-specific equation"}
	}
	return meaningError("sex", float64(s), "", "must be male or female")
}

// checkComputed refuses a value computed from individually plausible inputs
// that is itself outside its plausible range: the inputs are inconsistent
// with one another (or one of them is wrong), and the value is not reported.
func checkComputed(name string, v float64, r Range) error {
	if !finite(v) {
		return &InputError{Input: name, Value: v, Unit: r.Unit, Kind: ErrNotFinite, Range: r}
	}
	if v < r.Min || v > r.Max {
		return &InputError{Input: name, Value: v, Unit: r.Unit, Kind: ErrImplausible, Range: r,
			Detail: "computed from the inputs, outside the plausible " + rangeText(r) + ": the inputs are inconsistent or one is wrong"}
	}
	return nil
}

func rangeText(r Range) string {
	return strings.TrimSpace(strconv.FormatFloat(r.Min, 'g', 6, 64) + " to " + strconv.FormatFloat(r.Max, 'g', 6, 64) + " " + DisplayUnit(r.Unit))
}
