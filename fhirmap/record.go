package fhirmap

import "github.com/ventderive/ventderive/physio"

// Record is the structured form of what a derivation's Observation
// publishes about how its value was made: the same formula, worked basis,
// intermediate steps, constants, assumptions and flags that its notes
// write for people (basisNotes), as data. The provenance store keeps it
// with every derivation version, so that a reviewer reads the published
// basis field by field rather than parsing the notes.
type Record struct {
	Formula string `json:"formula"`
	Worked  string `json:"worked,omitempty"` // the formula with the numbers, as published
	// Steps are the intermediate results, in order (e.g. the predicted body
	// weight inside a predicted PaCO2), each with its own constants and
	// assumptions.
	Steps []RecordStep `json:"steps"`
	// Constants are every constant of the steps and the result, each once,
	// in order of use: the note's "Constants:" line.
	Constants []RecordConstant `json:"constants"`
	// Assumptions are the note's "Assumptions:" line: the steps' and the
	// result's, then each input's fallback, then the target statement of a
	// for-target kind.
	Assumptions []string `json:"assumptions"`
	Flags       []string `json:"flags"`
}

// RecordStep is one intermediate result of a Record.
type RecordStep struct {
	Method        string           `json:"method"`
	MethodVersion string           `json:"methodVersion"`
	Value         float64          `json:"value"`
	Unit          string           `json:"unit"`
	Basis         string           `json:"basis"`
	Constants     []RecordConstant `json:"constants"`
	Assumptions   []string         `json:"assumptions"`
	Flags         []string         `json:"flags"`
}

// RecordConstant is a physio.Constant as a Record keeps it: the value at
// full precision (the notes write it rounded, physio.DisplayNumber), the
// UCUM unit and the source.
type RecordConstant struct {
	Name   string  `json:"name"`
	Value  float64 `json:"value"`
	Unit   string  `json:"unit"`
	Source string  `json:"source"`
}

func recordConstants(cs []physio.Constant) []RecordConstant {
	out := make([]RecordConstant, len(cs))
	for i, c := range cs {
		out[i] = RecordConstant(c)
	}
	return out
}

// RecordOf returns the Record of d: what EncodeObservation writes into the
// notes of d, as data. A retraction (no method to redo) has an empty one.
func RecordOf(d Derivation) Record {
	r := Record{Steps: []RecordStep{}, Constants: []RecordConstant{}, Assumptions: []string{}, Flags: []string{}}
	if k, ok := LookupKind(d.Kind); ok {
		r.Formula = k.Formula
	}
	r.Worked = d.Result.Basis()
	for _, st := range d.Steps {
		r.Steps = append(r.Steps, RecordStep{Method: st.Method, MethodVersion: st.MethodVersion, Value: st.Value,
			Unit: st.Unit, Basis: st.Basis(), Constants: recordConstants(st.Constants()), Assumptions: orNone(st.Assumptions()),
			Flags: orNone(st.Flags())})
	}
	r.Constants = append(r.Constants, recordConstants(allConstants(d))...)
	for _, st := range d.Steps {
		r.Assumptions = appendNew(r.Assumptions, st.Assumptions()...)
	}
	r.Assumptions = appendNew(r.Assumptions, d.Result.Assumptions()...)
	for _, in := range d.Inputs {
		if in.Fallback != "" {
			r.Assumptions = append(r.Assumptions, in.Fallback)
		}
	}
	if a := targetAssumption(d); a != "" {
		r.Assumptions = append(r.Assumptions, a)
	}
	r.Flags = append(r.Flags, d.Result.Flags()...)
	return r
}

func orNone[T any](v []T) []T {
	if v == nil {
		return []T{}
	}
	return v
}

// IsVentilatorReading reports whether facts of quantity q count as
// ventilator readings for the pairing window (Selection.Ventilator and the
// nearest reading outside the window that a "no-ventilator-data-in-window"
// refusal names).
func IsVentilatorReading(q Quantity) bool {
	rule, ok := ruleFor(q)
	return ok && rule.ventilator
}

// DeriveFrom re-derives one kind from exactly the inputs a stored
// derivation used (the blood gas first, in the stored order), for
// verification: no other fact is considered, so the result is what those
// inputs give under site. others are further inputs of the same blood gas
// that a kind's rules read without using them (the measured dead-space
// fraction that an estimated one defers to): they fill roles the stored
// inputs leave empty. ok is false when the kind was refused, with the
// refusal.
func DeriveFrom(kind string, inputs, others []Input, site Site) (Derivation, Refusal, bool) {
	if len(inputs) == 0 || inputs[0].Role != RoleBloodGas {
		return Derivation{}, Refusal{}, false
	}
	all := append([]Input(nil), inputs...)
	for _, o := range others {
		if _, ok := (Selection{Inputs: all}).Input(o.Role); !ok {
			all = append(all, o)
		}
	}
	sel := Selection{BloodGas: inputs[0].Fact, Window: site.Window, Inputs: sortedInputs(all), Ventilator: len(all) - 1}
	x := deriver{sel: sel, site: site}
	return x.derive(kind)
}
