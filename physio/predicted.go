package physio

import (
	"fmt"
	"math"
)

var (
	pbwInterceptMale   = constDef{name: "PBW intercept, men", unit: UnitKg, source: "ARDS Network, NEJM 2000;342:1301-8 [published]"}
	pbwInterceptFemale = constDef{name: "PBW intercept, women", unit: UnitKg, source: "ARDS Network, NEJM 2000;342:1301-8 [published]"}
	pbwSlope           = constDef{name: "PBW slope", unit: "kg/cm", source: "ARDS Network, NEJM 2000;342:1301-8 [published]"}
	pbwRefHeight       = constDef{name: "PBW reference height", unit: UnitCm, source: "ARDS Network, NEJM 2000;342:1301-8 [published] (60 in)"}
	anatomicPerKg      = constDef{name: "anatomic dead space per kg PBW", unit: "mL/kg", source: "Radford, J Appl Physiol 1955 (about 1 mL per lb) [published]; model whole-airway from the site's setting"}
	anatomicPerKgInput = constDef{name: "anatomic dead space per kg PBW", unit: "mL/kg", source: "Radford, J Appl Physiol 1955 (about 1 mL per lb) [published]; model whole-airway from the patient's airway as recorded (an input of this value), preferred over the site's setting"}
	apparatusSiteDef   = constDef{name: "apparatus dead space", unit: UnitML, source: "the site's setting for its circuits: none recorded for the patient's circuit"}
	apparatusInputDef  = constDef{name: "apparatus dead space", unit: UnitML, source: "recorded for the patient's circuit (an input of this value), preferred over the site's setting"}
	anatomicTubePerKg  = constDef{name: "anatomic dead space per kg PBW, tracheal tube or tracheostomy (intrathoracic airway)", unit: "mL/kg",
		source: "Nunn, Campbell & Peckett, J Appl Physiol 1959;14:174-6: intrathoracic anatomic dead space 0.43 mL per lb body weight in intubated subjects, extrathoracic 0.55 mL per lb (72 mL) bypassed by the tube [published]; 0.43 mL/lb = 0.948 mL/kg [derived]; model artificial-airway from the site's setting"}
	anatomicTubePerKgInput = constDef{name: anatomicTubePerKg.name, unit: "mL/kg",
		source: "Nunn, Campbell & Peckett, J Appl Physiol 1959;14:174-6: intrathoracic anatomic dead space 0.43 mL per lb body weight in intubated subjects, extrathoracic 0.55 mL per lb (72 mL) bypassed by the tube [published]; 0.43 mL/lb = 0.948 mL/kg [derived]; model artificial-airway from the patient's airway as recorded (an input of this value), preferred over the site's setting"}
	discrepancyDef = constDef{name: "material PaCO2 difference", unit: UnitMmHg,
		source: "half-width of the healthy 35-45 mmHg range [derived from published textbooks; common practice]"}
)

const (
	pbwSlopeKgPerCm = 0.91
	pbwRefHeightCm  = 152.4
	pbwMaleKg       = 50.0
	pbwFemaleKg     = 45.5
	anatomicMLPerKg = 2.2
	// anatomicTubeMLPerKg is 0.43 mL per lb (Nunn, Campbell & Peckett 1959)
	// in mL per kg: 0.43 / 0.45359237.
	anatomicTubeMLPerKg = 0.43 / 0.45359237

	// DiscrepancyThreshold is the measured-minus-predicted PaCO2 difference,
	// in mm[Hg], beyond which PaCO2Discrepancy's text calls the difference
	// material (no interpretation code: the band is not a published
	// threshold):
	// half the width of the healthy 35-45 mm[Hg] range, i.e. the spread of
	// PaCO2 between healthy people [derived from published textbooks], and
	// twice the standard deviation (2.5 mm[Hg]) of the arterial to end-tidal
	// gradient in anaesthetised adults [published: Nunn & Hill 1960]; a
	// smaller difference is within the noise of the inputs [common practice].
	DiscrepancyThreshold MmHg = 5

	methodPBW         = "ARDS Network predicted body weight (cm form)"
	methodPredicted   = "alveolar ventilation equation, predicted PaCO2"
	methodDiscrepancy = "measured minus predicted PaCO2"

	assumePBWAdult          = "height is the measured adult standing height"
	assumeAnatomicPBW       = "anatomic dead space not given: 2.2 mL/kg of predicted body weight assumed, the whole airway from mouth and nose (Radford 1955; a poor predictor for an individual, Brewer & Orr); model whole-airway: the site's setting, no airway recorded for the patient"
	assumeAnatomicPBWInput  = "anatomic dead space not given: 2.2 mL/kg of predicted body weight assumed, the whole airway from mouth and nose (Radford 1955; a poor predictor for an individual, Brewer & Orr); model whole-airway: the patient's airway as recorded (no tracheal tube or tracheostomy)"
	assumeAnatomicTube      = "anatomic dead space not given: 0.95 mL/kg of predicted body weight assumed, the intrathoracic airway only, since a tracheal tube or tracheostomy bypasses the extrathoracic airway (Nunn, Campbell & Peckett 1959; a poor predictor for an individual, Brewer & Orr); the tube's own volume belongs to the apparatus dead space; model artificial-airway: the site's setting, no airway recorded for the patient"
	assumeAnatomicTubeInput = "anatomic dead space not given: 0.95 mL/kg of predicted body weight assumed, the intrathoracic airway only, since a tracheal tube or tracheostomy bypasses the extrathoracic airway (Nunn, Campbell & Peckett 1959; a poor predictor for an individual, Brewer & Orr); the tube's own volume belongs to the apparatus dead space; model artificial-airway: the patient's airway as recorded (tracheal tube or tracheostomy)"
	assumeNoAlveolarVD      = "no alveolar dead space and no shunt: a measured PaCO2 above the predicted one points to them"
	assumeVCO2Estimate      = "estimated: VCO2 not measured"
	assumePredictedVT       = "VT and RR are the tidal volume and breath rate supplied (measured or set); the prediction holds for the tidal volume and total breath rate actually delivered"
	assumeDiscrepancy       = "predicted PaCO2 from the same steady state as the measured one, with the VCO2 and dead space it assumed"
)

// PredictedBodyWeight returns the ARDS Network predicted body weight, in
// kg, from sex and height in cm: men 50 + 0.91 x (H - 152.4), women 45.5 +
// 0.91 x (H - 152.4) (ARDS Network, NEJM 2000;342:1301-8). The inch form
// (2.3 kg per inch over 60 in) differs by about 0.1 kg; the cm form is used.
//
// It refuses an unknown sex (ErrNotGiven / ErrOutOfMeaning) and a height
// outside HeightRange.
func PredictedBodyWeight(sex Sex, height Cm) (Result, error) {
	if err := checkSex(sex); err != nil {
		return Result{}, err
	}
	if err := HeightRange.Check("height", float64(height)); err != nil {
		return Result{}, err
	}
	r := Result{Unit: UnitKg, Method: methodPBW, MethodVersion: MethodVersion}
	base, def, format := pbwMaleKg, &pbwInterceptMale, "PBW (male) = %g kg + %g kg/cm x (%.1f cm - %g cm) = %.3f kg"
	if sex == Female {
		base, def, format = pbwFemaleKg, &pbwInterceptFemale, "PBW (female) = %g kg + %g kg/cm x (%.1f cm - %g cm) = %.3f kg"
	}
	v := base + pbwSlopeKgPerCm*(float64(height)-pbwRefHeightCm)
	r.Value = v
	r.addConst(def, base)
	r.addConst(&pbwSlope, pbwSlopeKgPerCm)
	r.addConst(&pbwRefHeight, pbwRefHeightCm)
	r.assume(assumePBWAdult)
	r.basis(format, base, pbwSlopeKgPerCm, float64(height), pbwRefHeightCm, v)
	return r, nil
}

// AnatomicModel says which airway the anatomic dead space estimate
// describes when PredictedInput.AnatomicVD is not given.
type AnatomicModel uint8

const (
	// AnatomicWholeAirway is the zero value: the whole conducting airway
	// from mouth and nose, about 1 mL per lb of body weight, 2.2 mL/kg
	// (Radford, J Appl Physiol 1955). It fits a patient breathing through
	// the upper airway (mask ventilation, no artificial airway).
	AnatomicWholeAirway AnatomicModel = iota
	// AnatomicArtificialAirway is the airway of a patient with a tracheal
	// tube or a tracheostomy, which bypasses the extrathoracic airway (72 mL,
	// 0.55 mL per lb): the intrathoracic airway only, 0.43 mL per lb, 0.948
	// mL/kg (Nunn, Campbell & Peckett, J Appl Physiol 1959;14:174-6, measured
	// in intubated subjects; 1.03 mL/kg intrathoracic in children, Numa &
	// Newth, J Appl Physiol 1996;80:1485-9). The tube's own volume is
	// apparatus dead space.
	AnatomicArtificialAirway
)

// String returns the model's configuration name: "whole-airway" or
// "artificial-airway".
func (m AnatomicModel) String() string {
	switch m {
	case AnatomicWholeAirway:
		return "whole-airway"
	case AnatomicArtificialAirway:
		return "artificial-airway"
	}
	return "unknown"
}

// ParseAnatomicModel reads a configuration name written by String.
func ParseAnatomicModel(s string) (AnatomicModel, bool) {
	switch s {
	case "whole-airway":
		return AnatomicWholeAirway, true
	case "artificial-airway":
		return AnatomicArtificialAirway, true
	}
	return 0, false
}

// PerKg returns the model's anatomic dead space per kg of predicted body
// weight, in mL/kg: 2.2 or 0.948.
func (m AnatomicModel) PerKg() float64 {
	if m == AnatomicArtificialAirway {
		return anatomicTubeMLPerKg
	}
	return anatomicMLPerKg
}

// PredictedInput holds the inputs of PredictedPaCO2.
type PredictedInput struct {
	VCO2          MLPerMin // CO2 production, mL/min STPD, VCO2Range
	VCO2Estimated bool     // true when VCO2 is an estimate (recorded as an assumption)
	VT            ML       // tidal volume, mL, TidalVolumeRange (expired measured preferred; the caller records what it passed)
	RR            PerMin   // breath rate, /min, RespRateRange (total measured preferred; the caller records what it passed)
	// AnatomicVD is the anatomic dead space, mL (AnatomicDeadSpaceRange);
	// 0 means Anatomic's estimate per kg of PBW (2.2 mL/kg, Radford 1955,
	// for the whole airway; 0.948 mL/kg for a tracheal tube or
	// tracheostomy), recorded as an assumption with its model and figure.
	AnatomicVD ML
	Anatomic   AnatomicModel
	// AnatomicFromPatient says where Anatomic comes from, for the recorded
	// constant, assumption and basis: true for the patient's airway as
	// recorded (an input of the value), false for the site's setting.
	AnatomicFromPatient bool
	PBW                 Kg // predicted body weight, kg (PBWRange); needed only when AnatomicVD is 0
	// ApparatusVD is the dead space of the apparatus beyond the Y-piece (HME,
	// closed suction, extensions), mL (ApparatusDeadSpaceRange). It must be
	// declared: ApparatusVDKnown false is refused with ErrNotGiven, so that a
	// missing site configuration is never read as zero.
	ApparatusVD      ML
	ApparatusVDKnown bool
	// ApparatusVDFromPatient says where ApparatusVD comes from, for the
	// recorded constant: true for a value recorded for the patient's
	// circuit, false for the site's setting.
	ApparatusVDFromPatient bool
	// BodyTemp is the measured body temperature; 0 means 37 Cel
	// (recorded). When measured, the prediction (at body temperature, where
	// K(T) puts it) is given back at 37 Cel with PCO2TempFactor, so that it
	// compares with the blood gas as reported (TemperatureConvention).
	BodyTemp Celsius
}

// PredictedPaCO2 returns the PaCO2, in mm[Hg], that the alveolar
// ventilation equation predicts when all dead space is anatomic plus
// apparatus: VA = (VT - VDanat - VDapp) x RR / 1000 (L/min), PaCO2 = K(T) x
// VCO2 / VA. A measured PaCO2 above it points to alveolar dead space (see
// PaCO2Discrepancy).
//
// It refuses, in this order: VCO2, VT and RR outside their ranges; an
// undeclared apparatus dead space (ErrNotGiven) or one outside
// ApparatusDeadSpaceRange; AnatomicVD outside AnatomicDeadSpaceRange (or,
// when it is 0, PBW outside PBWRange); bodyTemp outside BodyTempRange; a VT
// not above the summed dead space (ErrOutOfMeaning); and a computed PaCO2
// outside PaCO2Range.
func PredictedPaCO2(p PredictedInput) (Result, error) {
	if err := VCO2Range.Check("VCO2", float64(p.VCO2)); err != nil {
		return Result{}, err
	}
	if err := TidalVolumeRange.Check("VT", float64(p.VT)); err != nil {
		return Result{}, err
	}
	if err := RespRateRange.Check("RR", float64(p.RR)); err != nil {
		return Result{}, err
	}
	if !p.ApparatusVDKnown {
		return Result{}, &InputError{Input: "apparatus dead space", Value: float64(p.ApparatusVD), Unit: UnitML, Kind: ErrNotGiven,
			Detail: "must be configured for the circuit, 0 when there is none; never assumed zero"}
	}
	if err := ApparatusDeadSpaceRange.Check("apparatus dead space", float64(p.ApparatusVD)); err != nil {
		return Result{}, err
	}
	r := Result{Unit: UnitMmHg, Method: methodPredicted, MethodVersion: MethodVersion}
	if p.ApparatusVDFromPatient {
		r.addConst(&apparatusInputDef, float64(p.ApparatusVD))
	} else {
		r.addConst(&apparatusSiteDef, float64(p.ApparatusVD))
	}
	anat := float64(p.AnatomicVD)
	defaultAnat := anat == 0
	if defaultAnat {
		if err := PBWRange.Check("PBW", float64(p.PBW)); err != nil {
			return Result{}, err
		}
		switch {
		case p.Anatomic == AnatomicWholeAirway && p.AnatomicFromPatient:
			r.addConst(&anatomicPerKgInput, anatomicMLPerKg)
			r.assume(assumeAnatomicPBWInput)
		case p.Anatomic == AnatomicWholeAirway:
			r.addConst(&anatomicPerKg, anatomicMLPerKg)
			r.assume(assumeAnatomicPBW)
		case p.Anatomic == AnatomicArtificialAirway && p.AnatomicFromPatient:
			r.addConst(&anatomicTubePerKgInput, anatomicTubeMLPerKg)
			r.assume(assumeAnatomicTubeInput)
		case p.Anatomic == AnatomicArtificialAirway:
			r.addConst(&anatomicTubePerKg, anatomicTubeMLPerKg)
			r.assume(assumeAnatomicTube)
		default:
			return Result{}, &InputError{Input: "anatomic dead space model", Value: float64(p.Anatomic), Unit: UnitOne, Kind: ErrNotGiven,
				Detail: "whole-airway or artificial-airway"}
		}
		anat = p.Anatomic.PerKg() * float64(p.PBW)
	} else if err := AnatomicDeadSpaceRange.Check("anatomic dead space", anat); err != nil {
		return Result{}, err
	}
	k, t, err := r.alveolarK(p.BodyTemp, false)
	if err != nil {
		return Result{}, err
	}
	effective := float64(p.VT) - anat - float64(p.ApparatusVD)
	if effective <= 0 {
		return Result{}, meaningError("VT - dead space", effective, UnitML,
			"tidal volume must exceed anatomic plus apparatus dead space")
	}
	va := effective * float64(p.RR) / 1000
	vT := k * float64(p.VCO2) / va
	v, back := vT, 1.0
	backTo37 := p.BodyTemp != 0 && t != analyserTemp
	if backTo37 {
		back = PCO2TempFactor(t, analyserTemp)
		v = vT * back
		r.addConst(&pco2TempDef, PCO2TempCoefficient)
	}
	if err := checkComputed("predicted PaCO2", v, PaCO2Range); err != nil {
		return Result{}, err
	}
	r.Value = v
	r.assume(assumeSteadyState)
	r.assume(assumeNoAlveolarVD)
	r.assume(assumePredictedVT)
	if p.VCO2Estimated {
		r.assume(assumeVCO2Estimate)
	}
	perKg := p.Anatomic.PerKg()
	ops := [maxOperands]float64{}
	n := 0
	if defaultAnat {
		ops[0], ops[1], ops[2] = perKg, float64(p.PBW), anat
		n = 3
	}
	n += copy(ops[n:], []float64{float64(p.VT), anat, float64(p.ApparatusVD), float64(p.RR), va,
		float64(t), k, float64(p.VCO2), va, vT})
	if !backTo37 {
		r.basis(basisFormats[basisKey{defaultAnat, p.Anatomic, defaultAnat && p.AnatomicFromPatient, false}], ops[:n]...)
		return r, nil
	}
	n += copy(ops[n:], []float64{float64(t), float64(t), vT, back, v})
	r.basis(basisFormats[basisKey{defaultAnat, p.Anatomic, defaultAnat && p.AnatomicFromPatient, true}], ops[:n]...)
	return r, nil
}

// basisKey selects the basis format of PredictedPaCO2: whether the anatomic
// dead space was estimated, by which model, whether the model is the
// patient's recorded airway (else the site's setting), and whether the
// prediction is given back at 37 Cel from a measured body temperature. The
// formats are built once so that a derivation does not allocate.
type basisKey struct {
	estimated   bool
	model       AnatomicModel
	fromPatient bool
	back37      bool
}

var basisFormats = func() map[basisKey]string {
	const core = "VA = (VT - VDanat - VDapp) x RR = (%.0f mL - %.1f mL - %.0f mL) x %.1f /min = %.3f L/min; PaCO2 = K(%.1f °C) x VCO2 / VA = %.4g x %.1f mL/min / %.3f L/min = %.2f mmHg"
	const back = "; at 37 °C, as the blood gas is reported: PaCO2(37 °C) = PaCO2(%.1f °C) x 10^(0.019 x (37 °C - %.1f °C)) = %.2f mmHg x %.4f = %.2f mmHg"
	anat := map[AnatomicModel]string{
		AnatomicWholeAirway:      "VDanat (whole airway, %s) = %%.1f mL/kg x %%.2f kg = %%.1f mL; ",
		AnatomicArtificialAirway: "VDanat (tube or tracheostomy: intrathoracic airway, %s) = %%.3g mL/kg x %%.2f kg = %%.1f mL; ",
	}
	whence := map[bool]string{false: "site setting", true: "patient's recorded airway"}
	m := map[basisKey]string{}
	for model, prefix := range anat {
		for _, b := range []bool{false, true} {
			tail := ""
			if b {
				tail = back
			}
			for fromPatient, w := range whence {
				m[basisKey{true, model, fromPatient, b}] = fmt.Sprintf(prefix, w) + core + tail
			}
			m[basisKey{false, model, false, b}] = core + tail
		}
	}
	return m
}()

// VCO2Basis says how the VCO2 behind a predicted PaCO2 was obtained, which
// decides what a measured-minus-predicted difference can mean: with a
// measured VCO2, CO2 production is not a cause of the difference.
type VCO2Basis uint8

const (
	// VCO2Unknown is the zero value: PaCO2Discrepancy refuses it
	// (ErrNotGiven); InterpretPaCO2Discrepancy reads it as estimated, the
	// reading that rules out fewer causes.
	VCO2Unknown VCO2Basis = iota
	// VCO2Measured: VCO2 measured (indirect calorimetry, volumetric
	// capnography).
	VCO2Measured
	// VCO2Estimated: VCO2 from an energy equation.
	VCO2Estimated
)

const discrepancySource = "threshold 5 mmHg: half-width of the healthy 35-45 mmHg range [derived; common practice]"

// Readings of the measured-minus-predicted difference. The 5 mm[Hg] band
// is derived, not a published threshold, so no interpretation code is
// given; the text names the causes that the prediction's own assumptions
// leave open. The prediction counts only anatomic and apparatus dead
// space, so physiologic dead space (anatomic plus alveolar) cannot be
// smaller: a measured PaCO2 materially below predicted is not a finding
// about the lung but a sign that an input or an assumption is wrong.
var (
	interpDiscrepancyHighMeasured = Interpretation{Code: "",
		Text:   "measured PaCO2 more than 5 mmHg above predicted: likely more dead space than assumed (alveolar dead space), or an input error (tidal volume, rate, apparatus dead space, units); VCO2 was measured, so CO2 production is not a cause",
		Source: discrepancySource}
	interpDiscrepancyHighEstimated = Interpretation{Code: "",
		Text:   "measured PaCO2 more than 5 mmHg above predicted: likely more dead space than assumed (alveolar dead space), higher CO2 production than estimated, or an input error (tidal volume, rate, apparatus dead space, units)",
		Source: discrepancySource}
	interpDiscrepancyLowMeasured = Interpretation{Code: "",
		Text:   "measured PaCO2 more than 5 mmHg below predicted: physiologically implausible, since it would need a physiologic dead space smaller than the anatomic plus apparatus dead space assumed; likely an input error (VCO2, tidal volume, rate, units, readings from different moments, not a steady state) or an overestimated anatomic dead space; not a finding about the lung",
		Source: discrepancySource}
	interpDiscrepancyLowEstimated = Interpretation{Code: "",
		Text:   "measured PaCO2 more than 5 mmHg below predicted: physiologically implausible at the estimated CO2 production, since it would need a physiologic dead space smaller than the anatomic plus apparatus dead space assumed; likely CO2 production lower than estimated (sedation, hypothermia), an input error (tidal volume, rate, units, readings from different moments) or an overestimated anatomic dead space; not a finding about the lung",
		Source: discrepancySource}
	interpDiscrepancyNone = Interpretation{Code: "",
		Text:   "measured PaCO2 within 5 mmHg of predicted: consistent with the assumed dead space and CO2 production",
		Source: discrepancySource}
)

// FlagPaCO2BelowPredicted is the flag of a measured PaCO2 materially below
// predicted (see InterpretPaCO2Discrepancy).
const FlagPaCO2BelowPredicted = "measured PaCO2 materially below predicted: physiologically implausible (physiologic dead space cannot be smaller than anatomic plus apparatus dead space); check the inputs and the anatomic dead space assumed before using this value"

// InterpretPaCO2Discrepancy reads a measured-minus-predicted PaCO2
// difference (mm[Hg]) against the DiscrepancyThreshold band: above it, below
// its negative, or within. The band is derived, not published, so Code is
// always empty. The text names only the causes the prediction leaves open:
// with vco2 VCO2Measured, CO2 production is not one; below the band the
// difference is called physiologically implausible (likely an input error
// or an overestimated anatomic dead space). VCO2Unknown is read as
// VCO2Estimated. A caller that reports a rounded value calls it on that
// value. It never fails and does not allocate.
func InterpretPaCO2Discrepancy(v MmHg, vco2 VCO2Basis) Interpretation {
	measured := vco2 == VCO2Measured
	switch {
	case v > DiscrepancyThreshold && measured:
		return interpDiscrepancyHighMeasured
	case v > DiscrepancyThreshold:
		return interpDiscrepancyHighEstimated
	case v < -DiscrepancyThreshold && measured:
		return interpDiscrepancyLowMeasured
	case v < -DiscrepancyThreshold:
		return interpDiscrepancyLowEstimated
	}
	return interpDiscrepancyNone
}

// PaCO2Discrepancy returns measured minus predicted PaCO2, in mm[Hg], for a
// prediction made with a VCO2 obtained as vco2 says. Its Interpretation
// (InterpretPaCO2Discrepancy) has no code, since the DiscrepancyThreshold
// band is derived, not published. A difference below -DiscrepancyThreshold,
// decided on the value rounded to 0.1 mm[Hg] (the precision at which it is
// published, so that the flag and the number shown agree), is flagged
// FlagPaCO2BelowPredicted.
//
// It refuses measured outside PaCO2Range, predicted outside PaCO2Range and
// vco2 VCO2Unknown (ErrNotGiven).
func PaCO2Discrepancy(measured, predicted MmHg, vco2 VCO2Basis) (Result, error) {
	if err := PaCO2Range.Check("PaCO2", float64(measured)); err != nil {
		return Result{}, err
	}
	if err := PaCO2Range.Check("predicted PaCO2", float64(predicted)); err != nil {
		return Result{}, err
	}
	if vco2 != VCO2Measured && vco2 != VCO2Estimated {
		return Result{}, &InputError{Input: "VCO2 basis", Value: float64(vco2), Unit: "", Kind: ErrNotGiven,
			Detail: "say whether the prediction's VCO2 was measured or estimated"}
	}
	v := float64(measured - predicted)
	shown := MmHg(math.Round(v*10) / 10)
	r := Result{Value: v, Unit: UnitMmHg, Method: methodDiscrepancy, MethodVersion: MethodVersion,
		Interpretation: InterpretPaCO2Discrepancy(shown, vco2)}
	if shown < -DiscrepancyThreshold {
		r.flag(FlagPaCO2BelowPredicted)
	}
	r.addConst(&discrepancyDef, float64(DiscrepancyThreshold))
	r.assume(assumeDiscrepancy)
	r.basis("PaCO2 measured - predicted = %.1f mmHg - %.2f mmHg = %.2f mmHg (material beyond +/- %g mmHg)",
		float64(measured), float64(predicted), v, float64(DiscrepancyThreshold))
	return r, nil
}
