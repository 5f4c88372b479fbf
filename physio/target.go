package physio

// Advisory bounds of the ventilation-for-target answers. An answer outside
// them is still returned, never clamped, with a Flag.
const (
	// MaxVTPerKgPBW: tidal volume above 8 mL/kg PBW, the upper limit of the
	// ARDS Network protocol (NEJM 2000;342:1301-8) [published: the NIH NHLBI
	// protocol card, 6 mL/kg target, 7-8 mL/kg only for breath stacking or
	// dyssynchrony with plateau pressure below 30 cmH2O].
	MaxVTPerKgPBW = 8.0
	// MinVTPerKgPBW: tidal volume below 4 mL/kg PBW, the lowest the ARDS
	// Network protocol allows [published: protocol card, down to 4 mL/kg
	// when plateau pressure stays above 30 cmH2O]; below it VT approaches anatomic dead
	// space (2.2 mL/kg, Radford 1955), so ventilation becomes ineffective.
	MinVTPerKgPBW = 4.0
	// MaxRate: breath rate above 35 /min, the ARDS Network protocol maximum
	// [published: protocol card, rate not above 35 /min]; gas trapping and
	// intrinsic PEEP become likely.
	MaxRate PerMin = 35
	// MinRate: breath rate below 8 /min [common practice: adult backup rates
	// are rarely set lower; below it each breath cycle lasts more than 7.5 s,
	// a long gap without a mandatory breath if the patient stops triggering].
	MinRate PerMin = 8

	flagVTHigh   = "tidal volume above 8 mL/kg predicted body weight, the ARDS Network upper limit"
	flagVTLow    = "tidal volume below 4 mL/kg predicted body weight, the ARDS Network lower limit; close to anatomic dead space"
	flagRateHigh = "rate above 35 /min, the ARDS Network maximum; gas trapping and intrinsic PEEP become likely"
	flagRateLow  = "rate below 8 /min [common practice lower bound]; long pauses without mandatory breaths"

	assumeAdvisory        = "advisory only, not an order: the value that would bring PaCO2 to the target if CO2 production stays constant; verify at the bedside"
	assumeFixedDeadSpace  = "dead space per breath stays constant when the rate changes"
	assumeFixedDeadSpaceV = "dead space per breath (VD) stays constant when the tidal volume changes"
	assumeFixedRate       = "breath rate unchanged"
	assumeFixedVT         = "tidal volume unchanged"

	methodRateForTarget = "alveolar ventilation equation, rate for a target PaCO2 at fixed tidal volume"
	methodVTForTarget   = "alveolar ventilation equation, tidal volume for a target PaCO2 at fixed rate"
)

var (
	maxVTDef   = constDef{name: "advisory upper tidal volume", unit: "mL/kg", source: "NIH NHLBI ARDS Network protocol card (NEJM 2000;342:1301-8): tidal volume 4-8 mL/kg predicted body weight [published]"}
	minVTDef   = constDef{name: "advisory lower tidal volume", unit: "mL/kg", source: "NIH NHLBI ARDS Network protocol card: minimum 4 mL/kg predicted body weight [published]"}
	maxRateDef = constDef{name: "advisory upper rate", unit: UnitPerMin, source: "NIH NHLBI ARDS Network protocol card: set rate not above 35 /min [published]"}
	minRateDef = constDef{name: "advisory lower rate", unit: UnitPerMin, source: "[common practice]"}
	targetDef  = constDef{name: "target PaCO2", unit: UnitMmHg, source: "the target the value aims at, not derived here: the assumptions say whether it is the patient's PaCO2 Goal or the site's setting"}
)

// FlagWithinGoalRange is the flag of a value for a target that is the
// midpoint of the patient's goal range while the measured PaCO2 already
// lies within that range: the goal is met, and the value is not a change
// that is needed.
const FlagWithinGoalRange = "measured PaCO2 already within the patient's goal range: no change is needed to meet the goal; this value aims at the midpoint of the range"

// FlagWithinGoalRange adds FlagWithinGoalRange to a value for a target; the
// caller, who knows the goal, decides. Adding it twice adds it once.
func (r *Result) FlagWithinGoalRange() {
	if r.Method != methodRateForTarget && r.Method != methodVTForTarget {
		return
	}
	for _, f := range r.flags[:r.nFlags] {
		if f == FlagWithinGoalRange {
			return
		}
	}
	r.flag(FlagWithinGoalRange)
}

// beyondModel refuses an answer for a target outside the input range r of
// the same quantity: the ranges bound where the alveolar ventilation
// equation describes conventional ventilation (RespRateRange: above 80 /min
// is high-frequency ventilation; TidalVolumeRange), so an answer beyond
// them is not advice the equation can give (ErrBeyondModel).
func beyondModel(name string, v float64, r Range) error {
	if finite(v) && v >= r.Min && v <= r.Max {
		return nil
	}
	return &InputError{Input: name, Value: v, Unit: r.Unit, Kind: ErrBeyondModel, Range: r,
		Detail: "outside " + rangeText(r) + ", the range in which the alveolar ventilation equation describes conventional ventilation; the target cannot be reached by this change alone"}
}

// flagVT flags a tidal volume outside the advisory bounds per kg PBW.
func (r *Result) flagVT(vtPerKg float64) {
	r.addConst(&maxVTDef, MaxVTPerKgPBW)
	r.addConst(&minVTDef, MinVTPerKgPBW)
	switch {
	case vtPerKg > MaxVTPerKgPBW:
		r.flag(flagVTHigh)
	case vtPerKg < MinVTPerKgPBW:
		r.flag(flagVTLow)
	}
}

// RateForTarget returns, as advice, the breath rate in /min that would bring
// PaCO2 from paco2 to target (both mm[Hg]) at the current tidal volume,
// with CO2 production and dead space per breath unchanged: PaCO2 is
// inversely proportional to alveolar ventilation, so RR_new = RR x PaCO2 /
// target. vt (mL) and pbw (kg) do not enter the formula; they are used to
// flag the tidal volume per kg PBW. Flags mark an answer above MaxRate or
// below MinRate and a VT outside MinVTPerKgPBW..MaxVTPerKgPBW. The target
// is recorded as the constant "target PaCO2" (given by the caller; the
// caller names its origin in the assumptions).
//
// It refuses rr outside RespRateRange, paco2 outside PaCO2Range, target
// outside TargetPaCO2Range, vt outside TidalVolumeRange, pbw outside
// PBWRange, and an answer outside RespRateRange (ErrBeyondModel).
func RateForTarget(rr PerMin, paco2, target MmHg, vt ML, pbw Kg) (Result, error) {
	if err := RespRateRange.Check("RR", float64(rr)); err != nil {
		return Result{}, err
	}
	if err := PaCO2Range.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	if err := TargetPaCO2Range.Check("target PaCO2", float64(target)); err != nil {
		return Result{}, err
	}
	if err := TidalVolumeRange.Check("VT", float64(vt)); err != nil {
		return Result{}, err
	}
	if err := PBWRange.Check("PBW", float64(pbw)); err != nil {
		return Result{}, err
	}
	v := float64(rr) * float64(paco2) / float64(target)
	if err := beyondModel("rate for target", v, RespRateRange); err != nil {
		return Result{}, err
	}
	vtPerKg := float64(vt) / float64(pbw)
	r := Result{Value: v, Unit: UnitPerMin, Method: methodRateForTarget, MethodVersion: MethodVersion}
	r.addConst(&targetDef, float64(target))
	r.addConst(&maxRateDef, float64(MaxRate))
	r.addConst(&minRateDef, float64(MinRate))
	switch {
	case v > float64(MaxRate):
		r.flag(flagRateHigh)
	case v < float64(MinRate):
		r.flag(flagRateLow)
	}
	r.flagVT(vtPerKg)
	r.assume(assumeAdvisory)
	r.assume(assumeFixedDeadSpace)
	r.assume(assumeFixedVT)
	r.assume(assumeSteadyState)
	r.basis("RR for target = RR x PaCO2 / target = %.1f /min x %.1f mmHg / %.1f mmHg = %.2f /min (VT %.0f mL = %.2f mL/kg PBW of %.2f kg)",
		float64(rr), float64(paco2), float64(target), v, float64(vt), vtPerKg, float64(pbw))
	return r, nil
}

// TidalVolumeForTarget returns, as advice, the tidal volume in mL that
// would bring PaCO2 from paco2 to target (both mm[Hg]) at the current rate,
// with CO2 production and the dead space per breath vd (mL) held constant:
// VT_new = VD + (VT - VD) x PaCO2 / target. Scaling VT alone would
// overestimate the change, since only VT - VD ventilates alveoli. pbw (kg)
// is used to flag the answer per kg PBW (MinVTPerKgPBW..MaxVTPerKgPBW).
// The target is recorded as the constant "target PaCO2" (given by the
// caller).
//
// It refuses vt outside TidalVolumeRange, vd outside
// PhysiologicDeadSpaceRange or not below vt (ErrOutOfMeaning), paco2
// outside PaCO2Range, target outside TargetPaCO2Range, pbw outside
// PBWRange, and an answer outside TidalVolumeRange (ErrBeyondModel).
func TidalVolumeForTarget(vt, vd ML, paco2, target MmHg, pbw Kg) (Result, error) {
	if err := TidalVolumeRange.Check("VT", float64(vt)); err != nil {
		return Result{}, err
	}
	if err := PhysiologicDeadSpaceRange.Check("VD", float64(vd)); err != nil {
		return Result{}, err
	}
	if vd >= vt {
		return Result{}, meaningError("VD", float64(vd), UnitML, "dead space per breath must be below the tidal volume")
	}
	if err := PaCO2Range.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	if err := TargetPaCO2Range.Check("target PaCO2", float64(target)); err != nil {
		return Result{}, err
	}
	if err := PBWRange.Check("PBW", float64(pbw)); err != nil {
		return Result{}, err
	}
	v := float64(vd) + float64(vt-vd)*float64(paco2)/float64(target)
	if err := beyondModel("tidal volume for target", v, TidalVolumeRange); err != nil {
		return Result{}, err
	}
	vtPerKg := v / float64(pbw)
	r := Result{Value: v, Unit: UnitML, Method: methodVTForTarget, MethodVersion: MethodVersion}
	r.addConst(&targetDef, float64(target))
	r.flagVT(vtPerKg)
	r.assume(assumeAdvisory)
	r.assume(assumeFixedDeadSpaceV)
	r.assume(assumeFixedRate)
	r.assume(assumeSteadyState)
	r.basis("VT for target = VD + (VT - VD) x PaCO2 / target = %.0f mL + (%.0f mL - %.0f mL) x %.1f mmHg / %.1f mmHg = %.1f mL (%.2f mL/kg PBW of %.2f kg)",
		float64(vd), float64(vt), float64(vd), float64(paco2), float64(target), v, vtPerKg, float64(pbw))
	return r, nil
}
