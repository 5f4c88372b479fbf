package physio

// EnergyInput describes a patient for the resting-energy equations, used
// only to estimate CO2 production when it is not measured.
type EnergyInput struct {
	Sex      Sex            // required (ErrNotGiven when zero)
	Age      Years          // AgeRange
	Weight   Kg             // actual body weight, WeightRange (the equations were fitted on actual weight)
	Height   Cm             // HeightRange
	Equation EnergyEquation // required (ErrNotGiven when zero)
	RQ       float64        // respiratory quotient, RQRange; 0 means 0.8 (recorded as assumed); another value is recorded as configured, not measured
}

// DefaultRQ is the respiratory quotient assumed when EnergyInput.RQ is 0.
const DefaultRQ = 0.8

// energyCoeffs are the published coefficients of one equation for one sex:
// REE [kcal/d] = c0 + w x W [kg] + h x H [cm] - a x A [years].
type energyCoeffs struct {
	c0, w, h, a float64
	defs        [4]constDef
	method      string // of RestingEnergy
	methodVCO2  string // of EstimateVCO2
	// Basis formats, built from constants at compile time so that
	// derivations do not concatenate strings.
	basisREE, basisVCO2, basisDeadSpace string
}

const (
	srcHB = "Harris & Benedict 1919 (coefficients as widely reprinted) [published]"
	srcRS = "Roza & Shizgal, Am J Clin Nutr 1984;40:168-182 [published]"

	// One format per equation and sex; operands: c0, w, W, h, H, a, A, REE.
	fmtREEHBMale   = "REE (Harris-Benedict 1919, male) = %g + %g x %.1f kg + %g x %.1f cm - %g x %g years = %.2f kcal/d"
	fmtREEHBFemale = "REE (Harris-Benedict 1919, female) = %g + %g x %.1f kg + %g x %.1f cm - %g x %g years = %.2f kcal/d"
	fmtREERSMale   = "REE (Roza-Shizgal 1984, male) = %g + %g x %.1f kg + %g x %.1f cm - %g x %g years = %.2f kcal/d"
	fmtREERSFemale = "REE (Roza-Shizgal 1984, female) = %g + %g x %.1f kg + %g x %.1f cm - %g x %g years = %.2f kcal/d"
	// Operands: REE, factor, O2 coefficient, RQ, CO2 coefficient, VCO2.
	fmtVCO2 = "; VCO2 (estimated) = REE / (1.440 x (3.941/RQ + 1.106)) = %.2f / (%.3f x (%.3f/%.2f + %.3f)) = %.2f mL/min"
	// Operands: K, VCO2, VE, PaCO2, VD/VT.
	fmtDSEst = "; VD/VT = 1 - K x VCO2 / (VE x PaCO2) = 1 - %.2f x %.2f mL/min / (%.2f L/min x %.1f mmHg) = %.4f"
)

func coeffDefs(src string) [4]constDef {
	return [4]constDef{
		{name: "REE intercept", unit: "kcal/d", source: src},
		{name: "REE weight coefficient", unit: "kcal/d/kg", source: src},
		{name: "REE height coefficient", unit: "kcal/d/cm", source: src},
		{name: "REE age coefficient", unit: "kcal/d/a", source: src},
	}
}

// energyTable is indexed by [EnergyEquation][Sex]; unknown entries are zero.
var energyTable = [3][3]energyCoeffs{
	HarrisBenedict1919: {
		Male: {c0: 66.4730, w: 13.7516, h: 5.0033, a: 6.7550, defs: coeffDefs(srcHB + ", men"),
			method: "Harris-Benedict 1919 resting energy expenditure", methodVCO2: "Weir 1949 VCO2 from Harris-Benedict 1919 resting energy expenditure",
			basisREE: fmtREEHBMale, basisVCO2: fmtREEHBMale + fmtVCO2, basisDeadSpace: fmtREEHBMale + fmtVCO2 + fmtDSEst},
		Female: {c0: 655.0955, w: 9.5634, h: 1.8496, a: 4.6756, defs: coeffDefs(srcHB + ", women"),
			method: "Harris-Benedict 1919 resting energy expenditure", methodVCO2: "Weir 1949 VCO2 from Harris-Benedict 1919 resting energy expenditure",
			basisREE: fmtREEHBFemale, basisVCO2: fmtREEHBFemale + fmtVCO2, basisDeadSpace: fmtREEHBFemale + fmtVCO2 + fmtDSEst},
	},
	RozaShizgal1984: {
		Male: {c0: 88.362, w: 13.397, h: 4.799, a: 5.677, defs: coeffDefs(srcRS + ", men"),
			method: "Roza-Shizgal 1984 resting energy expenditure", methodVCO2: "Weir 1949 VCO2 from Roza-Shizgal 1984 resting energy expenditure",
			basisREE: fmtREERSMale, basisVCO2: fmtREERSMale + fmtVCO2, basisDeadSpace: fmtREERSMale + fmtVCO2 + fmtDSEst},
		Female: {c0: 447.593, w: 9.247, h: 3.098, a: 4.330, defs: coeffDefs(srcRS + ", women"),
			method: "Roza-Shizgal 1984 resting energy expenditure", methodVCO2: "Weir 1949 VCO2 from Roza-Shizgal 1984 resting energy expenditure",
			basisREE: fmtREERSFemale, basisVCO2: fmtREERSFemale + fmtVCO2, basisDeadSpace: fmtREERSFemale + fmtVCO2 + fmtDSEst},
	},
}

// Weir 1949 (J Physiol 1949;109:1-9): REE [kcal/d] = (3.941 VO2 + 1.106 VCO2)
// x 1440 with gases in L/min; with gases in mL/min the factor is 1.440.
const (
	weirO2  = 3.941
	weirCO2 = 1.106
	weirDay = 1.440
)

var (
	weirO2Def  = constDef{name: "Weir O2 coefficient", unit: "kcal/L", source: "Weir, J Physiol 1949;109:1-9 [published]"}
	weirCO2Def = constDef{name: "Weir CO2 coefficient", unit: "kcal/L", source: "Weir, J Physiol 1949;109:1-9 [published]"}
	weirDayDef = constDef{name: "minutes per day / mL per L", unit: "L.min/(mL.d)", source: "1440 min/d / 1000 mL/L (Weir gives gases in L/min)"}
	rqDefault  = constDef{name: "RQ", unit: UnitOne, source: "default 0.8, not measured [common practice]"}
	rqGiven    = constDef{name: "RQ", unit: UnitOne, source: "configured by the caller, not measured in this patient"}
)

const (
	assumeREE     = "estimated: resting energy expenditure from a population equation on actual body weight, not measured by calorimetry"
	assumeRQ      = "respiratory quotient not measured: 0.8 assumed"
	assumeRQGiven = "respiratory quotient not measured: the configured value is used (see the constants)"
	assumeVCO     = "estimated: VCO2 from resting energy expenditure and the Weir equation, not measured"
)

// checkEnergy validates an EnergyInput in a fixed order: sex, equation,
// weight, height, age, RQ.
func checkEnergy(e EnergyInput) (*energyCoeffs, error) {
	if err := checkSex(e.Sex); err != nil {
		return nil, err
	}
	switch e.Equation {
	case HarrisBenedict1919, RozaShizgal1984:
	case 0:
		return nil, &InputError{Input: "energy equation", Kind: ErrNotGiven, Detail: "Harris-Benedict 1919 or Roza-Shizgal 1984 must be chosen"}
	default:
		return nil, meaningError("energy equation", float64(e.Equation), "", "must be Harris-Benedict 1919 or Roza-Shizgal 1984")
	}
	if err := WeightRange.Check("weight", float64(e.Weight)); err != nil {
		return nil, err
	}
	if err := HeightRange.Check("height", float64(e.Height)); err != nil {
		return nil, err
	}
	if err := AgeRange.Check("age", float64(e.Age)); err != nil {
		return nil, err
	}
	if e.RQ != 0 {
		if err := RQRange.Check("RQ", e.RQ); err != nil {
			return nil, err
		}
	}
	return &energyTable[e.Equation][e.Sex], nil
}

// ree computes resting energy expenditure and records the coefficients.
func (r *Result) ree(c *energyCoeffs, e EnergyInput) (float64, error) {
	v := c.c0 + c.w*float64(e.Weight) + c.h*float64(e.Height) - c.a*float64(e.Age)
	if !finite(v) || v <= 0 {
		return 0, meaningError("computed REE", v, UnitKcalPerD, "resting energy expenditure must be positive")
	}
	r.addConst(&c.defs[0], c.c0)
	r.addConst(&c.defs[1], c.w)
	r.addConst(&c.defs[2], c.h)
	r.addConst(&c.defs[3], c.a)
	r.assume(assumeREE)
	return v, nil
}

// RestingEnergy returns the resting energy expenditure, in kcal/d (UCUM
// kcal/d), from the equation e.Equation: Harris-Benedict 1919 (men 66.4730
// + 13.7516 W + 5.0033 H - 6.7550 A; women 655.0955 + 9.5634 W + 1.8496 H -
// 4.6756 A) or Roza-Shizgal 1984 (men 88.362 + 13.397 W + 4.799 H - 5.677 A;
// women 447.593 + 9.247 W + 3.098 H - 4.330 A), W kg, H cm, A years. The
// value is labelled estimated in Assumptions.
//
// It refuses an unknown sex or equation (ErrNotGiven / ErrOutOfMeaning),
// weight, height or age outside WeightRange, HeightRange or AgeRange, and an
// RQ (when not 0) outside RQRange, although RQ is not used here.
func RestingEnergy(e EnergyInput) (Result, error) {
	c, err := checkEnergy(e)
	if err != nil {
		return Result{}, err
	}
	r := Result{Unit: UnitKcalPerD, Method: c.method, MethodVersion: MethodVersion}
	v, err := r.ree(c, e)
	if err != nil {
		return Result{}, err
	}
	r.Value = v
	r.basis(c.basisREE, c.c0, c.w, float64(e.Weight), c.h, float64(e.Height), c.a, float64(e.Age), v)
	return r, nil
}

// vco2Est computes the estimated VCO2 and records constants and assumptions.
func (r *Result) vco2Est(c *energyCoeffs, e EnergyInput) (ree, rq, vco2 float64, err error) {
	ree, err = r.ree(c, e)
	if err != nil {
		return 0, 0, 0, err
	}
	rq = e.RQ
	if rq == 0 {
		rq = DefaultRQ
		r.addConst(&rqDefault, rq)
		r.assume(assumeRQ)
	} else {
		r.addConst(&rqGiven, rq)
		r.assume(assumeRQGiven)
	}
	r.addConst(&weirO2Def, weirO2)
	r.addConst(&weirCO2Def, weirCO2)
	r.addConst(&weirDayDef, weirDay)
	r.assume(assumeVCO)
	vco2 = ree / (weirDay * (weirO2/rq + weirCO2))
	if err := checkComputed("estimated VCO2", vco2, VCO2Range); err != nil {
		return 0, 0, 0, err
	}
	return ree, rq, vco2, nil
}

// EstimateVCO2 returns an estimated CO2 production, in mL/min (STPD), from
// the resting energy expenditure of e.Equation and the Weir equation solved
// for VCO2 at respiratory quotient RQ (VO2 = VCO2/RQ):
// VCO2 = REE / (1.440 x (3.941/RQ + 1.106)). RQ 0 means 0.8 (recorded).
// The value is labelled estimated in Assumptions.
//
// It refuses what RestingEnergy refuses, and an estimate outside VCO2Range.
func EstimateVCO2(e EnergyInput) (Result, error) {
	c, err := checkEnergy(e)
	if err != nil {
		return Result{}, err
	}
	r := Result{Unit: UnitMLPerMin, Method: c.methodVCO2, MethodVersion: MethodVersion}
	ree, rq, v, err := r.vco2Est(c, e)
	if err != nil {
		return Result{}, err
	}
	r.Value = v
	r.basis(c.basisVCO2, c.c0, c.w, float64(e.Weight), c.h, float64(e.Height), c.a, float64(e.Age), ree,
		ree, weirDay, weirO2, rq, weirCO2, v)
	return r, nil
}
