package physio

import "fmt"

// Constant is a numeric constant used by a derivation, with its unit and
// where it comes from, so that a reviewer can check it.
type Constant struct {
	Name   string  // e.g. "K"
	Value  float64 // as used
	Unit   string  // UCUM, "1" for dimensionless
	Source string  // publication or derivation, e.g. "ideal gas law, STPD to BTPS at 37 Cel"
}

// Interpretation is a reading of a value against a published threshold.
// Code is an HL7 v3 ObservationInterpretation code (N, H, L, A); it is empty
// when no published threshold applies.
type Interpretation struct {
	Code   string
	Text   string // e.g. "above 0.30, the healthy adult value"
	Source string // the publication that sets the threshold
}

// Capacities of the fixed-size parts of a Result. They are internal limits of
// this package's derivations, not of the physiology; a derivation that would
// exceed one is a programming error caught by the package's tests.
const (
	maxConstants   = 12
	maxAssumptions = 6
	maxFlags       = 6
	maxOperands    = 20
)

// constDef is the fixed part of a Constant; the value is stored beside it so
// that a derivation records a constant without allocating.
type constDef struct {
	name, unit, source string
}

type constRef struct {
	def   *constDef
	value float64
}

// Result is one derived value with everything needed to redo it by hand.
//
// The exported fields are set by every derivation. The constants,
// assumptions, flags and basis are stored in fixed-size arrays so that a
// derivation allocates nothing; read them with the methods Constants,
// Assumptions, Flags and Basis, which build fresh slices and strings on each
// call (the caller owns them). The zero Result has no value and an empty
// basis. Results are comparable with ==.
type Result struct {
	Value          float64 // in Unit; never NaN or ±Inf when the derivation returned no error
	Unit           string  // UCUM code of Value
	Method         string  // published method name, e.g. "Bohr-Enghoff"
	MethodVersion  string  // version of this implementation of the method
	Interpretation Interpretation

	consts       [maxConstants]constRef
	nConsts      uint8
	assumptions  [maxAssumptions]string
	nAssumptions uint8
	flags        [maxFlags]string
	nFlags       uint8
	basisFormat  string // fmt format with one %-verb per operand
	operands     [maxOperands]float64
	nOperands    uint8
}

// Constants returns every constant the derivation used, in the order used,
// each with its value, UCUM unit and source. It returns nil when the formula
// has no constants (e.g. Bohr-Enghoff).
func (r Result) Constants() []Constant {
	if r.nConsts == 0 {
		return nil
	}
	out := make([]Constant, r.nConsts)
	for i, c := range r.consts[:r.nConsts] {
		out[i] = Constant{Name: c.def.name, Value: c.value, Unit: c.def.unit, Source: c.def.source}
	}
	return out
}

// Assumptions returns the assumptions the derivation rests on (e.g.
// "steady state", "VCO2 estimated, not measured"), or nil when there are none.
func (r Result) Assumptions() []string {
	if r.nAssumptions == 0 {
		return nil
	}
	return append([]string(nil), r.assumptions[:r.nAssumptions]...)
}

// Flags returns advisory warnings on the value (e.g. "tidal volume above
// 8 mL/kg predicted body weight"), or nil when there are none.
func (r Result) Flags() []string {
	if r.nFlags == 0 {
		return nil
	}
	return append([]string(nil), r.flags[:r.nFlags]...)
}

// Basis renders, on one line, the formula with the numbers substituted, so
// that a clinician can redo the derivation by hand, e.g.
// "VD/VT = 1 - 0.863 x 200.0 mL/min / (10.0 L/min x 45.0 mm[Hg]) = 0.6164".
// Numbers are rounded for reading; Value holds the unrounded result. It
// returns "" for the zero Result. It allocates; derivations do not call it.
func (r Result) Basis() string {
	if r.basisFormat == "" {
		return ""
	}
	args := make([]any, r.nOperands)
	for i := range args {
		args[i] = r.operands[i]
	}
	return fmt.Sprintf(r.basisFormat, args...)
}

// addConst records a constant. Exceeding the capacity is a programming error.
func (r *Result) addConst(d *constDef, v float64) {
	if int(r.nConsts) == maxConstants {
		panic("physio: too many constants in one result")
	}
	r.consts[r.nConsts] = constRef{def: d, value: v}
	r.nConsts++
}

// assume records an assumption. Exceeding the capacity is a programming error.
func (r *Result) assume(s string) {
	if int(r.nAssumptions) == maxAssumptions {
		panic("physio: too many assumptions in one result")
	}
	r.assumptions[r.nAssumptions] = s
	r.nAssumptions++
}

// flag records an advisory warning. Exceeding the capacity is a programming error.
func (r *Result) flag(s string) {
	if int(r.nFlags) == maxFlags {
		panic("physio: too many flags in one result")
	}
	r.flags[r.nFlags] = s
	r.nFlags++
}

// basis stores the basis format and its operands for lazy rendering.
func (r *Result) basis(format string, ops ...float64) {
	if len(ops) > maxOperands {
		panic("physio: too many basis operands in one result")
	}
	r.basisFormat = format
	r.nOperands = uint8(copy(r.operands[:], ops))
}

// inherit copies the constants and assumptions of a sub-derivation (e.g. the
// estimated VCO2 inside an estimated dead-space fraction).
func (r *Result) inherit(sub *Result) {
	for _, c := range sub.consts[:sub.nConsts] {
		r.addConst(c.def, c.value)
	}
	for _, a := range sub.assumptions[:sub.nAssumptions] {
		r.assume(a)
	}
}

// FlagInputsApart is the flag of a value whose time-dependent inputs (the
// blood gas and the ventilator readings) were taken more than 15 min
// apart: they may not describe one steady state.
const FlagInputsApart = "inputs taken more than 15 min apart (blood gas and ventilator readings): they may not describe one steady state; check that ventilation and CO2 production did not change between them"

// FlagInputsApart adds FlagInputsApart; the caller, who knows when each
// input was taken, decides. Adding it twice adds it once.
func (r *Result) FlagInputsApart() {
	for _, f := range r.flags[:r.nFlags] {
		if f == FlagInputsApart {
			return
		}
	}
	r.flag(FlagInputsApart)
}
