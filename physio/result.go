package physio

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

// Result is one derived value with everything needed to redo it by hand.
type Result struct {
	Value          float64
	Unit           string // UCUM code of Value
	Method         string // published method name, e.g. "Bohr-Enghoff"
	MethodVersion  string // version of this implementation of the method
	Constants      []Constant
	Assumptions    []string // e.g. "VCO2 estimated from Harris-Benedict 1919 and Weir, RQ 0.8"
	Basis          string   // the formula with the numbers substituted, one line
	Interpretation Interpretation
	// Flags are advisory warnings on the value, e.g. "tidal volume above 8 mL/kg predicted body weight".
	Flags []string
}
