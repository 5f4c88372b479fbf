package physio

const (
	// SinhaPredictedPaCO2 is the predicted PaCO2 of the ventilatory ratio:
	// 5 kPa = 37.5 mm[Hg] [published: Sinha et al., Br J Anaesth
	// 2009;102:692-697; mm[Hg] form in Sinha et al., AJRCCM 2019]. Not 40.
	SinhaPredictedPaCO2 MmHg = 37.5
	// SinhaPredictedVE is the predicted minute ventilation of the
	// ventilatory ratio, in mL/min per kg of predicted body weight.
	SinhaPredictedVE = 100.0

	// Tyburski et al. (J Trauma 2002;53:738): best survival in trauma with an
	// arterial to end-tidal gradient <= 9 mm[Hg] and an alveolar dead-space
	// fraction <= 0.20.
	tyburskiGradient MmHg = 9
	tyburskiAVDSF         = 0.20

	vrNonSurvivors = 1.55 // Sinha 2009, mean of non-survivors (survivors 1.32)
	vrARDSMedian   = 2.0  // PETAL-ROSE secondary analysis, Crit Care 2022

	methodVR       = "ventilatory ratio (Sinha)"
	methodGradient = "arterial to end-tidal PCO2 gradient"
	methodAVDSF    = "alveolar dead-space fraction"

	assumeVRVE        = "VE is measured expired minute ventilation"
	assumeVRPBW       = "predicted body weight from the ARDS Network formula"
	assumeEndTidal    = "PETCO2 from mainstream or sidestream capnography in the same steady state as the blood gas"
	flagNegativeGrade = "end-tidal PCO2 above arterial PCO2: check sampling times, analyser calibration and units (it can also occur with large tidal volumes at low rates [memory])"
)

var (
	vrPredVEDef    = constDef{name: "predicted minute ventilation", unit: "mL/min/kg", source: "Sinha et al., Br J Anaesth 2009;102:692-697 [published]"}
	vrPredPaCO2Def = constDef{name: "predicted PaCO2", unit: UnitMmHg, source: "Sinha et al., Br J Anaesth 2009 (5 kPa); AJRCCM 2019 (37.5 mm[Hg]) [published]"}
)

var (
	interpVRARDS = Interpretation{Code: "H",
		Text:   "at or above 2, the median in ARDS trial patients (and above 1.55, the mean of non-survivors in a general ICU cohort); published group values, not a validated cut-off",
		Source: "PETAL-ROSE secondary analysis, Crit Care 2022, doi 10.1186/s13054-022-04179-7; Sinha et al., Br J Anaesth 2009"}
	interpVRHigh = Interpretation{Code: "H",
		Text:   "at or above 1.55, the mean of non-survivors in a general ICU cohort (survivors 1.32); a published group value, not a validated cut-off",
		Source: "Sinha et al., Br J Anaesth 2009;102:692-697"}
	interpVRBelow = Interpretation{Code: "",
		Text:   "below 1.55, the mean of non-survivors in a general ICU cohort (survivors 1.32; near 1 in healthy lungs); no published normal cut-off",
		Source: "Sinha et al., Br J Anaesth 2009;102:692-697"}

	interpGradientHigh = Interpretation{Code: "H",
		Text:   "above 9 mm[Hg], beyond the gradient with the best survival in trauma; normal 4.6 +/- 2.5 mm[Hg] in anaesthetised adults",
		Source: "Tyburski et al., J Trauma 2002;53:738; Nunn & Hill, J Appl Physiol 1960"}
	interpGradientNormal = Interpretation{Code: "N",
		Text:   "at or below 9 mm[Hg], the gradient with the best survival in trauma; normal 4.6 +/- 2.5 mm[Hg] in anaesthetised adults",
		Source: "Tyburski et al., J Trauma 2002;53:738; Nunn & Hill, J Appl Physiol 1960"}

	interpAVDSFHigh = Interpretation{Code: "H",
		Text:   "above 0.20, beyond the alveolar dead-space fraction with the best survival in trauma",
		Source: "Tyburski et al., J Trauma 2002;53:738"}
	interpAVDSFNormal = Interpretation{Code: "N",
		Text:   "at or below 0.20, the alveolar dead-space fraction with the best survival in trauma",
		Source: "Tyburski et al., J Trauma 2002;53:738"}
)

// VentilatoryRatio returns the ventilatory ratio of Sinha et al. (UCUM 1):
// VR = (VE [mL/min] x PaCO2) / (PBW x 100 mL/kg/min x 37.5 mm[Hg]), from
// measured expired minute ventilation ve (L/min), measured PaCO2 (mm[Hg])
// and predicted body weight pbw (kg). The predicted PaCO2 is 37.5 mm[Hg]
// (5 kPa) as published, not 40. It is near 1 in healthy lungs; the
// Interpretation compares it with published group values (1.32 survivors,
// 1.55 non-survivors in a general ICU cohort; median about 2 in ARDS).
//
// It refuses ve outside MinuteVolumeRange, paco2 outside PaCO2Range and pbw
// outside PBWRange.
func VentilatoryRatio(ve LPerMin, paco2 MmHg, pbw Kg) (Result, error) {
	if err := MinuteVolumeRange.Check("VE", float64(ve)); err != nil {
		return Result{}, err
	}
	if err := PaCO2Range.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	if err := PBWRange.Check("PBW", float64(pbw)); err != nil {
		return Result{}, err
	}
	veML := float64(ve) * 1000
	v := veML * float64(paco2) / (float64(pbw) * SinhaPredictedVE * float64(SinhaPredictedPaCO2))
	r := Result{Value: v, Unit: UnitOne, Method: methodVR, MethodVersion: MethodVersion}
	switch {
	case v >= vrARDSMedian:
		r.Interpretation = interpVRARDS
	case v >= vrNonSurvivors:
		r.Interpretation = interpVRHigh
	default:
		r.Interpretation = interpVRBelow
	}
	r.addConst(&vrPredVEDef, SinhaPredictedVE)
	r.addConst(&vrPredPaCO2Def, float64(SinhaPredictedPaCO2))
	r.assume(assumeVRVE)
	r.assume(assumeVRPBW)
	r.basis("VR = (VE x PaCO2) / (PBW x 100 mL/kg/min x 37.5 mm[Hg]) = (%.0f mL/min x %.1f mm[Hg]) / (%.3f kg x %g mL/kg/min x %g mm[Hg]) = %.4f",
		veML, float64(paco2), float64(pbw), SinhaPredictedVE, float64(SinhaPredictedPaCO2), v)
	return r, nil
}

// EndTidalGradient returns the arterial to end-tidal PCO2 gradient
// PaCO2 - PETCO2, in mm[Hg]. A negative gradient is returned (it is a
// difference) with a Flag asking for the sampling to be checked. The
// Interpretation reads it against Tyburski (<= 9 mm[Hg] best survival in
// trauma) and names the normal 4.6 +/- 2.5 mm[Hg] of Nunn & Hill.
//
// It refuses paco2 outside PaCO2Range and petco2 outside PETCO2Range.
func EndTidalGradient(paco2, petco2 MmHg) (Result, error) {
	if err := PaCO2Range.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	if err := PETCO2Range.Check("PETCO2", float64(petco2)); err != nil {
		return Result{}, err
	}
	v := float64(paco2 - petco2)
	r := Result{Value: v, Unit: UnitMmHg, Method: methodGradient, MethodVersion: MethodVersion,
		Interpretation: interpGradientNormal}
	if v > float64(tyburskiGradient) {
		r.Interpretation = interpGradientHigh
	}
	if v < 0 {
		r.flag(flagNegativeGrade)
	}
	r.assume(assumeEndTidal)
	r.basis("Pa-ETCO2 = PaCO2 - PETCO2 = %.1f mm[Hg] - %.1f mm[Hg] = %.1f mm[Hg]",
		float64(paco2), float64(petco2), v)
	return r, nil
}

// AlveolarDeadSpaceFraction returns the alveolar dead-space fraction
// AVDSF = (PaCO2 - PETCO2) / PaCO2 (UCUM 1; Yehya et al., Pediatr Crit
// Care Med 2016), read against Tyburski (<= 0.20 best survival in trauma).
//
// It refuses paco2 outside PaCO2Range, petco2 outside PETCO2Range, and a
// petco2 above paco2 (ErrOutOfMeaning: a negative fraction has no meaning;
// see EndTidalGradient for the signed difference).
func AlveolarDeadSpaceFraction(paco2, petco2 MmHg) (Result, error) {
	if err := PaCO2Range.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	if err := PETCO2Range.Check("PETCO2", float64(petco2)); err != nil {
		return Result{}, err
	}
	if petco2 > paco2 {
		return Result{}, meaningError("PETCO2", float64(petco2), UnitMmHg,
			"end-tidal PCO2 above PaCO2 gives a negative fraction: check sampling times and analyser")
	}
	v := float64(paco2-petco2) / float64(paco2)
	r := Result{Value: v, Unit: UnitOne, Method: methodAVDSF, MethodVersion: MethodVersion,
		Interpretation: interpAVDSFNormal}
	if v > tyburskiAVDSF {
		r.Interpretation = interpAVDSFHigh
	}
	r.assume(assumeEndTidal)
	r.basis("AVDSF = (PaCO2 - PETCO2) / PaCO2 = (%.1f mm[Hg] - %.1f mm[Hg]) / %.1f mm[Hg] = %.4f",
		float64(paco2), float64(petco2), float64(paco2), v)
	return r, nil
}
