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

	vrNonSurvivors = 1.55 // Sinha 2009, mean of non-survivors (survivors 1.32); a group value, not a cut-off
	vrARDSMedian   = 2.0  // PETAL-ROSE secondary analysis, Crit Care 2022; a group median, not a cut-off

	// MaxNegativeEndTidalGradient is how far, in mm[Hg], end-tidal PCO2 may
	// exceed arterial PCO2 before EndTidalGradient refuses the pair as
	// inconsistent. Why: the normal gradient is 4.6 +/- 2.5 mm[Hg] in
	// anaesthetised adults [published: Nunn & Hill 1960], so -5 mm[Hg] lies
	// almost 4 standard deviations below the mean; blood-gas analysers and
	// capnographs each read PCO2 to about +/- 2 mm[Hg] [common practice], so
	// a few mm[Hg] of negative gradient can be measurement error, and small
	// negative gradients are reported with large tidal volumes at low rates
	// [memory]; beyond 5 mm[Hg] the samples, the times or the units are
	// wrong [common practice].
	MaxNegativeEndTidalGradient MmHg = 5

	methodVR       = "ventilatory ratio (Sinha)"
	methodGradient = "arterial to end-tidal PCO2 gradient"
	methodAVDSF    = "alveolar dead-space fraction"

	assumeVRVE        = "VE is the minute volume supplied; the published ratio uses measured minute ventilation"
	assumeVRPBW       = "predicted body weight from the ARDS Network formula"
	assumeEndTidal    = "PETCO2 from mainstream or sidestream capnography in the same steady state as the blood gas"
	flagNegativeGrade = "end-tidal PCO2 above arterial PCO2: check sampling times, analyser calibration and units"
)

var (
	vrPredVEDef    = constDef{name: "predicted minute ventilation", unit: "mL/min/kg", source: "Sinha et al., Br J Anaesth 2009;102:692-697 [published]"}
	vrPredPaCO2Def = constDef{name: "predicted PaCO2", unit: UnitMmHg, source: "Sinha et al., Br J Anaesth 2009 (5 kPa); AJRCCM 2019 (37.5 mmHg) [published]"}
)

// Readings of the ventilatory ratio: published group values, not
// validated cut-offs, so no interpretation code is given.
var (
	interpVRARDS = Interpretation{Code: "",
		Text:   "at or above 2, the median in ARDS trial patients (and above 1.55, the mean of non-survivors in a general ICU cohort); published group values, not a validated cut-off",
		Source: "PETAL-ROSE secondary analysis, Crit Care 2022, doi 10.1186/s13054-022-04179-7; Sinha et al., Br J Anaesth 2009"}
	interpVRHigh = Interpretation{Code: "",
		Text:   "at or above 1.55, the mean of non-survivors in a general ICU cohort (survivors 1.32); a published group value, not a validated cut-off",
		Source: "Sinha et al., Br J Anaesth 2009;102:692-697"}
	interpVRBelow = Interpretation{Code: "",
		Text:   "below 1.55, the mean of non-survivors in a general ICU cohort (survivors 1.32; near 1 in healthy lungs); no published normal cut-off",
		Source: "Sinha et al., Br J Anaesth 2009;102:692-697"}
)

// Readings of the end-tidal indices against Tyburski et al. (published
// thresholds).
var (
	interpGradientHigh = Interpretation{Code: "H",
		Text:   "above 9 mmHg, beyond the gradient with the best survival in trauma; normal 4.6 +/- 2.5 mmHg in anaesthetised adults",
		Source: "Tyburski et al., J Trauma 2002;53:738; Nunn & Hill, J Appl Physiol 1960"}
	interpGradientNormal = Interpretation{Code: "N",
		Text:   "at or below 9 mmHg, the gradient with the best survival in trauma; normal 4.6 +/- 2.5 mmHg in anaesthetised adults",
		Source: "Tyburski et al., J Trauma 2002;53:738; Nunn & Hill, J Appl Physiol 1960"}
	interpGradientNegative = Interpretation{Code: "",
		Text:   "negative: end-tidal PCO2 above arterial PCO2, which no published reading covers; check sampling times, analyser calibration and units",
		Source: "Nunn & Hill, J Appl Physiol 1960 (normal 4.6 +/- 2.5 mmHg)"}

	interpAVDSFHigh = Interpretation{Code: "H",
		Text:   "above 0.20, beyond the alveolar dead-space fraction with the best survival in trauma",
		Source: "Tyburski et al., J Trauma 2002;53:738"}
	interpAVDSFNormal = Interpretation{Code: "N",
		Text:   "at or below 0.20, the alveolar dead-space fraction with the best survival in trauma",
		Source: "Tyburski et al., J Trauma 2002;53:738"}
)

// InterpretVentilatoryRatio reads a ventilatory ratio (UCUM 1) against the
// published group values: at or above 2 (median in ARDS trial patients,
// PETAL-ROSE secondary analysis, Crit Care 2022), at or above 1.55 (mean of
// non-survivors, Sinha et al. 2009), below 1.55. These are group values,
// not validated cut-offs, so Code is always empty and only the text
// explains. A caller that reports a rounded value calls it on that value.
// It never fails and does not allocate.
func InterpretVentilatoryRatio(v float64) Interpretation {
	switch {
	case v >= vrARDSMedian:
		return interpVRARDS
	case v >= vrNonSurvivors:
		return interpVRHigh
	}
	return interpVRBelow
}

// InterpretEndTidalGradient reads an arterial to end-tidal PCO2 gradient
// (mm[Hg]) against Tyburski et al. (J Trauma 2002;53:738): N at or below 9
// mm[Hg] (best survival in trauma), H above. A negative gradient (end-tidal
// above arterial) gets no code, only a text asking for the sampling to be
// checked. A caller that reports a rounded value calls it on that value.
// It never fails and does not allocate.
func InterpretEndTidalGradient(v MmHg) Interpretation {
	switch {
	case v < 0:
		return interpGradientNegative
	case v <= tyburskiGradient:
		return interpGradientNormal
	}
	return interpGradientHigh
}

// InterpretAlveolarDeadSpaceFraction reads an alveolar dead-space fraction
// (UCUM 1) against Tyburski et al. (J Trauma 2002;53:738): N at or below
// 0.20 (best survival in trauma), H above. A caller that reports a rounded
// value calls it on that value. It never fails and does not allocate.
func InterpretAlveolarDeadSpaceFraction(v float64) Interpretation {
	if v > tyburskiAVDSF {
		return interpAVDSFHigh
	}
	return interpAVDSFNormal
}

// VentilatoryRatio returns the ventilatory ratio of Sinha et al. (UCUM 1):
// VR = (VE [mL/min] x PaCO2) / (PBW x 100 mL/kg/min x 37.5 mm[Hg]), from
// minute ventilation ve (L/min; the published ratio uses measured minute
// ventilation), measured PaCO2 (mm[Hg])
// and predicted body weight pbw (kg). The predicted PaCO2 is 37.5 mm[Hg]
// (5 kPa) as published, not 40. It is near 1 in healthy lungs; the
// Interpretation compares it in words with published group values (1.32
// survivors, 1.55 non-survivors in a general ICU cohort; median about 2 in
// ARDS) and carries no code (see InterpretVentilatoryRatio).
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
	r := Result{Value: v, Unit: UnitOne, Method: methodVR, MethodVersion: MethodVersion,
		Interpretation: InterpretVentilatoryRatio(v)}
	r.addConst(&vrPredVEDef, SinhaPredictedVE)
	r.addConst(&vrPredPaCO2Def, float64(SinhaPredictedPaCO2))
	r.assume(assumeVRVE)
	r.assume(assumeVRPBW)
	r.basis("VR = (VE x PaCO2) / (PBW x 100 mL/kg/min x 37.5 mmHg) = (%.0f mL/min x %.1f mmHg) / (%.3f kg x %g mL/kg/min x %g mmHg) = %.4f",
		veML, float64(paco2), float64(pbw), SinhaPredictedVE, float64(SinhaPredictedPaCO2), v)
	return r, nil
}

// EndTidalGradient returns the arterial to end-tidal PCO2 gradient
// PaCO2 - PETCO2, in mm[Hg]. A negative gradient down to
// -MaxNegativeEndTidalGradient is returned (it is a difference) with a Flag
// asking for the sampling to be checked and an Interpretation without code.
// Otherwise the Interpretation reads it against Tyburski (<= 9 mm[Hg] best
// survival in trauma) and names the normal 4.6 +/- 2.5 mm[Hg] of Nunn &
// Hill (see InterpretEndTidalGradient).
//
// It refuses paco2 outside PaCO2Range, petco2 outside PETCO2Range, and a
// petco2 more than MaxNegativeEndTidalGradient above paco2
// (ErrOutOfMeaning: the samples are inconsistent).
func EndTidalGradient(paco2, petco2 MmHg) (Result, error) {
	if err := PaCO2Range.Check("PaCO2", float64(paco2)); err != nil {
		return Result{}, err
	}
	if err := PETCO2Range.Check("PETCO2", float64(petco2)); err != nil {
		return Result{}, err
	}
	v := float64(paco2 - petco2)
	if v < -float64(MaxNegativeEndTidalGradient) {
		return Result{}, meaningError("PETCO2", float64(petco2), UnitMmHg,
			"end-tidal PCO2 more than 5 mmHg above PaCO2: the gas and blood samples are inconsistent (sampling times, analyser calibration or units)")
	}
	r := Result{Value: v, Unit: UnitMmHg, Method: methodGradient, MethodVersion: MethodVersion,
		Interpretation: InterpretEndTidalGradient(MmHg(v))}
	if v < 0 {
		r.flag(flagNegativeGrade)
	}
	r.assume(assumeEndTidal)
	r.basis("Pa-ETCO2 = PaCO2 - PETCO2 = %.1f mmHg - %.1f mmHg = %.1f mmHg",
		float64(paco2), float64(petco2), v)
	return r, nil
}

// AlveolarDeadSpaceFraction returns the alveolar dead-space fraction
// AVDSF = (PaCO2 - PETCO2) / PaCO2 (UCUM 1; Yehya et al., Pediatr Crit
// Care Med 2016), read against Tyburski (<= 0.20 best survival in trauma;
// see InterpretAlveolarDeadSpaceFraction).
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
		Interpretation: InterpretAlveolarDeadSpaceFraction(v)}
	r.assume(assumeEndTidal)
	r.basis("AVDSF = (PaCO2 - PETCO2) / PaCO2 = (%.1f mmHg - %.1f mmHg) / %.1f mmHg = %.4f",
		float64(paco2), float64(petco2), float64(paco2), v)
	return r, nil
}
