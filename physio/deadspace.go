package physio

import "math"

const (
	methodEnghoff = "Bohr-Enghoff"
	// The method names name the published method, which uses the expired
	// minute volume; what the caller supplied is stated by the assumptions
	// and by the caller.
	methodEnghoffVCO2      = "Bohr-Enghoff, PECO2 from VCO2 and expired minute volume"
	methodMixedExpired     = "mixed-expired PCO2 from VCO2 and expired minute volume"
	methodSiddiki          = "estimated dead-space fraction (Siddiki 2010), VCO2 from resting energy expenditure"
	methodDeadSpaceVolume  = "dead-space volume VD/VT x VT"
	methodVAFromDeadSpace  = "alveolar ventilation VE x (1 - VD/VT)"
	assumeMixedExpired     = "PECO2 is mixed-expired PCO2 (volumetric capnography, Douglas bag or calorimetry), not end-tidal"
	assumeSameSteadyState  = "arterial blood and expired gas taken in the same steady state"
	assumeExpiredVE        = "VE is the minute volume supplied, taken as BTPS; the method needs the expired minute volume: circuit compressible volume is not subtracted and an inspired volume also counts leaks, both of which raise VE and so VD/VT"
	assumeVentilatorVE     = "VE is the minute volume supplied; the published method used ventilator rate x expired tidal volume"
	assumeVDVTFromBohr     = "VD/VT from a Bohr-Enghoff derivation in the same steady state"
	assumeVTExpiredVolumes = "VT is the tidal volume supplied, taken as BTPS; the method needs the expired tidal volume"

	flagVDVTLowVCO2      = "dead-space fraction below 0.15, below the anatomic dead space alone: check the minute volume and VCO2 inputs"
	flagVDVTLowEstimated = "estimated dead-space fraction below 0.15, below the anatomic dead space alone: the VCO2 from the energy equation is likely above this patient's CO2 production (sedation, paralysis, hypothermia lower it), or check the minute volume and PaCO2"
	flagVDVTLowPECO2     = "dead-space fraction below 0.15, below the anatomic dead space alone: check the mixed-expired PCO2 and PaCO2 inputs"
)

// DeadSpaceFractionFloor is the physiologic dead-space fraction below which
// a value is flagged as implausibly low (UCUM 1). Why: anatomic dead space
// alone is about 2.2 mL/kg of predicted body weight [published: Radford, J
// Appl Physiol 1955], i.e. 0.27-0.37 of a usual tidal volume of 6-8 mL/kg
// [derived]; physiologic dead space includes it, so a fraction below 0.15
// (about half the smallest of those) points to an input error (minute
// volume too high, VCO2 too low, PECO2 too close to PaCO2) rather than to
// good lungs [derived; common practice]. The flag is judged on the value at
// 3 decimals, the precision at which a fraction is reported, so that a
// value reported as 0.150 is never flagged as below 0.15.
const DeadSpaceFractionFloor = 0.15

// flagLowVDVT flags a dead-space fraction below DeadSpaceFractionFloor.
func (r *Result) flagLowVDVT(v float64, flag string) {
	if math.Round(v*1000)/1000 < DeadSpaceFractionFloor {
		r.flag(flag)
	}
}

var kDefSiddiki = constDef{name: "K", unit: "mm[Hg].L/mL",
	source: "as published by Siddiki et al., Crit Care 2010, doi 10.1186/cc9206 (0.86; the ideal gas law gives 0.863 at 37 °C)"}

// Published readings of the physiologic dead-space fraction.
var (
	interpVDVTBelowAnatomic = Interpretation{Code: "",
		Text:   "below 0.15, less than the anatomic dead space alone (about 0.27-0.37 of a 6-8 mL/kg breath): not a reading of healthy lungs but a sign of an input error; no published threshold applies",
		Source: "Radford, J Appl Physiol 1955 (anatomic dead space about 2.2 mL/kg) [derived]"}
	interpVDVTNormal = Interpretation{Code: "N",
		Text:   "at or below about 0.3, the value in healthy and anaesthetised adults",
		Source: "Nunn & Hill, J Appl Physiol 1960"}
	interpVDVTHigh = Interpretation{Code: "H",
		Text:   "above about 0.3, the value in healthy and anaesthetised adults",
		Source: "Nunn & Hill, J Appl Physiol 1960"}
	interpVDVTARDS = Interpretation{Code: "H",
		Text:   "above 0.3 (healthy adults) and at or above 0.58, the mean at ARDS onset; 0.63 in non-survivors vs 0.54 in survivors, odds of death x1.45 per 0.05 rise",
		Source: "Nunn & Hill, J Appl Physiol 1960; Nuckton et al., NEJM 2002;346:1281-6"}
)

// Readings of the estimated dead-space fraction. Its only published source
// (Siddiki et al., Crit Care 2010, doi 10.1186/cc9206) reports an
// association with hospital mortality in acute lung injury per 10% increase
// (adjusted odds ratio 1.07 on day 1, 1.12 on day 3), no normal range and no
// cut-off; the thresholds of measured dead space (Nunn & Hill, Nuckton) were
// found with measured VCO2 or PECO2 and are not borrowed.
var (
	interpVDVTEstimated = Interpretation{Code: "",
		Text:   "estimated (VCO2 from an energy equation, not measured): no published normal range or cut-off applies to the estimated fraction, and thresholds found for measured dead space do not apply to it; its source reports only a trend across a cohort with acute lung injury",
		Source: "Siddiki et al., Crit Care 2010, doi 10.1186/cc9206 [published]: no threshold given"}
	interpVDVTEstimatedLow = Interpretation{Code: "",
		Text:   "estimated fraction below 0.15, less than the anatomic dead space alone: a sign that the estimated CO2 production or an input is wrong, not a reading of the lung; no published threshold applies",
		Source: "Radford, J Appl Physiol 1955 (anatomic dead space about 2.2 mL/kg) [derived]; Siddiki et al., Crit Care 2010 [published]: no threshold given"}
)

var interpVDVTEstimatedBesideMeasured = Interpretation{Code: "",
	Text:   "estimated (VCO2 from an energy equation, not measured) while a measured dead-space fraction exists for the same blood gas: read the measured value, not this estimate; no published threshold applies to the estimate",
	Source: "Siddiki et al., Crit Care 2010, doi 10.1186/cc9206 [published]: the estimate is for when VCO2 is not measured; no threshold given"}

// FlagMeasuredFractionExists is the flag of an estimated dead-space
// fraction for a blood gas that also has a measured one (see
// MarkMeasuredFractionExists).
const FlagMeasuredFractionExists = "a measured dead-space fraction exists for this blood gas: use it; this estimate rests on a population equation for CO2 production"

// InterpretEstimatedDeadSpaceFraction reads an estimated dead-space
// fraction (DeadSpaceEstimated, UCUM 1); measuredExists says that a
// measured fraction exists for the same blood gas. It never gives a code:
// the estimate's published source gives no threshold, and those of
// measured dead space are not borrowed. Below DeadSpaceFractionFloor the
// text says the value is implausible; otherwise, with measuredExists, it
// says to read the measured value. It never fails and does not allocate.
func InterpretEstimatedDeadSpaceFraction(v float64, measuredExists bool) Interpretation {
	switch {
	case v < DeadSpaceFractionFloor:
		return interpVDVTEstimatedLow
	case measuredExists:
		return interpVDVTEstimatedBesideMeasured
	}
	return interpVDVTEstimated
}

// MarkMeasuredFractionExists records on an estimated dead-space fraction
// (a DeadSpaceEstimated result) that a measured fraction exists for the
// same blood gas: it adds FlagMeasuredFractionExists and reads the value
// again with InterpretEstimatedDeadSpaceFraction. The caller knows what
// else was derived; physio does not. On another result it does nothing.
func (r *Result) MarkMeasuredFractionExists() {
	if r.Method != methodSiddiki {
		return
	}
	r.flag(FlagMeasuredFractionExists)
	r.Interpretation = InterpretEstimatedDeadSpaceFraction(r.Value, true)
}

// Thresholds of the dead-space fraction readings.
const (
	vdvtHealthy   = 0.30 // Nunn & Hill 1960
	vdvtARDSOnset = 0.58 // Nuckton 2002, mean at onset
)

// InterpretDeadSpaceFraction reads a physiologic dead-space fraction VD/VT
// (UCUM 1) against the published values: N at or below 0.30 (about 0.3 in
// healthy and anaesthetised adults, Nunn & Hill 1960), H above it, and H
// with the ARDS reading at or above 0.58 (the mean at ARDS onset, Nuckton
// et al. 2002). Below DeadSpaceFractionFloor it gives no code: such a value
// is not healthy but implausible. The derivations call it on the unrounded
// value; a caller that reports a rounded value calls it again on that value
// so that the reading matches what is shown. It never fails and does not
// allocate.
func InterpretDeadSpaceFraction(v float64) Interpretation {
	switch {
	case v < DeadSpaceFractionFloor:
		return interpVDVTBelowAnatomic
	case v <= vdvtHealthy:
		return interpVDVTNormal
	case v < vdvtARDSOnset:
		return interpVDVTHigh
	}
	return interpVDVTARDS
}

// DeadSpaceEnghoff returns the physiologic dead-space fraction VD/VT
// (UCUM 1) by the Enghoff modification of the Bohr equation:
// VD/VT = (PaCO2 - PECO2) / PaCO2, from arterial PCO2 paco2 and
// mixed-expired PCO2 peco2, both in mm[Hg]. The Interpretation reads the
// value against Nunn & Hill (about 0.3 in health) and Nuckton (ARDS) (see
// InterpretDeadSpaceFraction); a value below DeadSpaceFractionFloor is
// flagged.
//
// It refuses paco2 outside PaCO2Range, peco2 outside PECO2Range, and a
// peco2 not below paco2 (ErrOutOfMeaning: mixed-expired gas is diluted
// alveolar gas).
func DeadSpaceEnghoff(paco2, peco2 MmHg) (Result, error) {
	if err := PaCO2Range.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	if err := PECO2Range.Check("PECO2", float64(peco2)); err != nil {
		return Result{}, err
	}
	if peco2 >= paco2 {
		return Result{}, meaningError("PECO2", float64(peco2), UnitMmHg, "mixed-expired PCO2 must be below PaCO2")
	}
	v := float64(paco2-peco2) / float64(paco2)
	r := Result{Value: v, Unit: UnitOne, Method: methodEnghoff, MethodVersion: MethodVersion,
		Interpretation: InterpretDeadSpaceFraction(v)}
	r.flagLowVDVT(v, flagVDVTLowPECO2)
	r.assume(assumeMixedExpired)
	r.assume(assumeSameSteadyState)
	r.assume(assumeSteadyState)
	r.basis("VD/VT = (PaCO2 - PECO2) / PaCO2 = (%.1f mmHg - %.1f mmHg) / %.1f mmHg = %.4f",
		float64(paco2), float64(peco2), float64(paco2), v)
	return r, nil
}

// MixedExpiredPCO2 returns the mixed-expired PCO2, in mm[Hg], implied by
// CO2 production vco2 (mL/min, STPD) leaving in minute volume ve (L/min,
// BTPS; the method needs the expired minute volume): PECO2 = K(T) x VCO2 /
// VE. bodyTemp 0 means 37 Cel (recorded).
//
// It refuses vco2 outside VCO2Range, ve outside MinuteVolumeRange, bodyTemp
// outside BodyTempRange and a computed PECO2 outside PECO2Range.
func MixedExpiredPCO2(vco2 MLPerMin, ve LPerMin, bodyTemp Celsius) (Result, error) {
	r := Result{Unit: UnitMmHg, Method: methodMixedExpired, MethodVersion: MethodVersion}
	if err := VCO2Range.Check("VCO2", float64(vco2)); err != nil {
		return Result{}, err
	}
	if err := MinuteVolumeRange.Check("VE", float64(ve)); err != nil {
		return Result{}, err
	}
	k, t, err := r.alveolarK(bodyTemp, false)
	if err != nil {
		return Result{}, err
	}
	v := k * float64(vco2) / float64(ve)
	if err := checkComputed("computed PECO2", v, PECO2Range); err != nil {
		return Result{}, err
	}
	r.Value = v
	r.assume(assumeSteadyState)
	r.assume(assumeExpiredVE)
	r.basis("PECO2 = K(%.1f °C) x VCO2 / VE = %.4g x %.1f mL/min / %.2f L/min = %.2f mmHg",
		float64(t), k, float64(vco2), float64(ve), v)
	return r, nil
}

// DeadSpaceFromVCO2 returns the physiologic dead-space fraction VD/VT (UCUM
// 1) from measured CO2 production: the Enghoff equation with the
// mixed-expired PCO2 implied by VCO2 and minute volume,
// VD/VT = 1 - K(T) x VCO2 / (VE x PaCO2), K from AlveolarConstant.
// paco2 in mm[Hg], vco2 in mL/min (STPD), ve in L/min (BTPS): the method
// needs the measured expired minute volume; whatever the caller passes is
// recorded neutrally in the assumptions, and the caller states which kind
// it was. bodyTemp 0 means 37 Cel (recorded). Interpretation as
// InterpretDeadSpaceFraction; a value below DeadSpaceFractionFloor is
// flagged.
//
// It refuses inputs outside PaCO2Range, VCO2Range, MinuteVolumeRange and
// BodyTempRange, and a result not strictly between 0 and 1
// (ErrOutOfMeaning: the inputs are inconsistent).
func DeadSpaceFromVCO2(paco2 MmHg, vco2 MLPerMin, ve LPerMin, bodyTemp Celsius) (Result, error) {
	r := Result{Unit: UnitOne, Method: methodEnghoffVCO2, MethodVersion: MethodVersion}
	if err := PaCO2Range.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	if err := VCO2Range.Check("VCO2", float64(vco2)); err != nil {
		return Result{}, err
	}
	if err := MinuteVolumeRange.Check("VE", float64(ve)); err != nil {
		return Result{}, err
	}
	k, t, err := r.alveolarK(bodyTemp, false)
	if err != nil {
		return Result{}, err
	}
	v := 1 - k*float64(vco2)/(float64(ve)*float64(paco2))
	if err := checkFraction("computed VD/VT", v); err != nil {
		return Result{}, err
	}
	r.Value = v
	r.Interpretation = InterpretDeadSpaceFraction(v)
	r.flagLowVDVT(v, flagVDVTLowVCO2)
	r.assume(assumeSteadyState)
	r.assume(assumeExpiredVE)
	r.assume(assumeGasStates)
	r.basis("VD/VT = 1 - K(%.1f °C) x VCO2 / (VE x PaCO2) = 1 - %.4g x %.1f mL/min / (%.2f L/min x %.1f mmHg) = %.4f",
		float64(t), k, float64(vco2), float64(ve), float64(paco2), v)
	return r, nil
}

// DeadSpaceEstimated returns an estimated physiologic dead-space fraction
// VD/VT (UCUM 1) when CO2 production is not measured, by the method of
// Siddiki et al. (Crit Care 2010): VD/VT = 1 - 0.86 x VCO2est / (VE x
// PaCO2), with VCO2est from EstimateVCO2(e) (resting energy expenditure and
// the Weir equation). It uses K = 0.86 as published, not the
// temperature-dependent K, and records it. paco2 in mm[Hg]; ve in L/min
// (the published method used ventilator rate x expired tidal volume; the
// assumption recorded says so without claiming what the caller passed).
// Assumptions label the value estimated. Interpretation as
// InterpretEstimatedDeadSpaceFraction (no code: the source gives no
// threshold, and measured-dead-space thresholds are not borrowed); a value
// below DeadSpaceFractionFloor is flagged, naming the estimated VCO2 (not
// an input) as the likely cause.
//
// It refuses what EstimateVCO2 refuses, paco2 outside PaCO2Range, ve
// outside MinuteVolumeRange, and a result not strictly between 0 and 1.
func DeadSpaceEstimated(paco2 MmHg, ve LPerMin, e EnergyInput) (Result, error) {
	if err := PaCO2Range.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	if err := MinuteVolumeRange.Check("VE", float64(ve)); err != nil {
		return Result{}, err
	}
	c, err := checkEnergy(e)
	if err != nil {
		return Result{}, err
	}
	const k = 0.86
	r := Result{Unit: UnitOne, Method: methodSiddiki, MethodVersion: MethodVersion}
	r.addConst(&kDefSiddiki, k)
	ree, rq, vco2, err := r.vco2Est(c, e)
	if err != nil {
		return Result{}, err
	}
	v := 1 - k*vco2/(float64(ve)*float64(paco2))
	if err := checkFraction("computed VD/VT", v); err != nil {
		return Result{}, err
	}
	r.Value = v
	r.Interpretation = InterpretEstimatedDeadSpaceFraction(v, false)
	r.flagLowVDVT(v, flagVDVTLowEstimated)
	r.assume(assumeSteadyState)
	r.assume(assumeVentilatorVE)
	r.basis(c.basisDeadSpace, c.c0, c.w, float64(e.Weight), c.h, float64(e.Height), c.a, float64(e.Age), ree,
		ree, weirDay, weirO2, rq, weirCO2, vco2,
		k, vco2, float64(ve), float64(paco2), v)
	return r, nil
}

// DeadSpaceVolume returns the physiologic dead-space volume per breath, in
// mL: VD = VD/VT x VT, from a dead-space fraction vdvt (UCUM 1) and a tidal
// volume vt in mL (BTPS; the method needs the expired tidal volume).
//
// It refuses vdvt not strictly between 0 and 1 (ErrOutOfMeaning) and vt
// outside TidalVolumeRange.
func DeadSpaceVolume(vdvt Fraction, vt ML) (Result, error) {
	if err := checkFraction("VD/VT", float64(vdvt)); err != nil {
		return Result{}, err
	}
	if err := TidalVolumeRange.Check("VT", float64(vt)); err != nil {
		return Result{}, err
	}
	v := float64(vdvt) * float64(vt)
	r := Result{Value: v, Unit: UnitML, Method: methodDeadSpaceVolume, MethodVersion: MethodVersion}
	r.assume(assumeVDVTFromBohr)
	r.assume(assumeVTExpiredVolumes)
	r.basis("VD = VD/VT x VT = %.4f x %.0f mL = %.1f mL", float64(vdvt), float64(vt), v)
	return r, nil
}

// AlveolarVentilationFromDeadSpace returns the alveolar ventilation, in
// L/min (BTPS): VA = VE x (1 - VD/VT), from minute volume ve (L/min; the
// method needs the expired minute volume) and a dead-space fraction vdvt
// (UCUM 1).
//
// It refuses ve outside MinuteVolumeRange and vdvt not strictly between 0
// and 1 (ErrOutOfMeaning). The result is positive by construction.
func AlveolarVentilationFromDeadSpace(ve LPerMin, vdvt Fraction) (Result, error) {
	if err := MinuteVolumeRange.Check("VE", float64(ve)); err != nil {
		return Result{}, err
	}
	if err := checkFraction("VD/VT", float64(vdvt)); err != nil {
		return Result{}, err
	}
	v := float64(ve) * (1 - float64(vdvt))
	r := Result{Value: v, Unit: UnitLPerMin, Method: methodVAFromDeadSpace, MethodVersion: MethodVersion}
	r.assume(assumeVDVTFromBohr)
	r.assume(assumeExpiredVE)
	r.basis("VA = VE x (1 - VD/VT) = %.2f L/min x (1 - %.4f) = %.3f L/min", float64(ve), float64(vdvt), v)
	return r, nil
}
