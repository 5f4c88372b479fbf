// Package physio computes CO2-elimination physiology from arterial blood
// gas and ventilator values: dead-space fractions, alveolar ventilation,
// measured versus predicted PaCO2, the ventilatory ratio, end-tidal indices
// and the ventilation that would reach a target PaCO2. Every derived value
// is advisory, never an order.
//
// The package imports only the standard library: values in, values and
// errors out. No context, I/O, logging or FHIR.
//
// # Results
//
// Each derivation returns a Result: Value in Unit (a UCUM code), the
// Method and MethodVersion, and, through methods, every Constant used
// (name, value, unit, source), every assumption, advisory Flags and a Basis
// line with the numbers substituted so that a clinician can redo it by
// hand. Where a published threshold applies, Interpretation carries an HL7
// v3 ObservationInterpretation code (N, H) and names the publication; where
// only group values or a derived band exist (ventilatory ratio, measured
// minus predicted PaCO2), or the value lies outside what the publication
// covers (a negative end-tidal gradient, a dead-space fraction below the
// anatomic dead space), the Interpretation has text and source but no
// code. The readings are exported (InterpretDeadSpaceFraction,
// InterpretEndTidalGradient, InterpretAlveolarDeadSpaceFraction,
// InterpretVentilatoryRatio, InterpretPaCO2Discrepancy) so that a caller
// that reports a rounded value can read that value, and the reading always
// matches what is shown. Values estimated rather than measured are labelled
// "estimated" in the assumptions.
//
// Assumptions never claim what kind of input the caller passed (expired or
// inspired, measured or set): they name what the published method used,
// and the caller records which kind it supplied.
//
// Derivations allocate nothing: constants, assumptions, flags and the basis
// operands are stored in fixed-size arrays inside the Result, and the
// Basis string is rendered only when asked for.
//
// # Units
//
// Every value crossing the package boundary has a named unit type: MmHg
// (mm[Hg]), KPa (kPa), MLPerMin (mL/min, VCO2 at STPD), LPerMin (L/min,
// ventilation at BTPS), ML (mL), PerMin (/min), Kg (kg), Cm (cm), Celsius
// (Cel), Years (a), Fraction (1). MmHg.KPa and KPa.MmHg convert with the
// UCUM factor 1 mm[Hg] = 133.322 Pa (NIST SP 811 lists 133.3224 Pa; the 3
// ppm difference is immaterial).
//
// A body temperature of 0 means "not measured": 37 Cel is used and the
// assumption recorded. Every other input must be given.
//
// # Formulas and sources
//
//   - Alveolar ventilation equation: PaCO2 = K x VCO2 / VA, with
//     K(T) = 0.760 x (273 + T)/273 mm[Hg].L/mL derived from the ideal gas
//     law (VCO2 STPD to VA BTPS; 0.863 at 37 Cel, as published, e.g. Wang et
//     al., Adv Physiol Educ 2020;44:145-152), or 0.101325 x (273 + T)/273 in
//     kPa. AlveolarConstant, PaCO2FromAlveolarVentilation(KPa),
//     AlveolarVentilationFromPaCO2(KPa).
//   - Bohr equation, Enghoff modification: VD/VT = (PaCO2 - PECO2) / PaCO2
//     (DeadSpaceEnghoff); with PECO2 = K x VCO2 / VE from measured VCO2 and
//     expired minute volume, VD/VT = 1 - K x VCO2 / (VE x PaCO2)
//     (MixedExpiredPCO2, DeadSpaceFromVCO2). A fraction below
//     DeadSpaceFractionFloor (0.15, below the anatomic dead space alone) is
//     flagged as a likely input error.
//   - Estimated dead space (Siddiki et al., Crit Care 2010, doi
//     10.1186/cc9206): VD/VT = 1 - 0.86 x VCO2est / (VE x PaCO2), with K =
//     0.86 as published (DeadSpaceEstimated). VCO2est = REE / (1.440 x
//     (3.941/RQ + 1.106)) from the Weir equation (Weir, J Physiol
//     1949;109:1-9) and the resting energy expenditure of Harris & Benedict
//     1919 or Roza & Shizgal 1984 (Am J Clin Nutr 1984;40:168-182); RQ 0.8
//     unless given (RestingEnergy, EstimateVCO2).
//   - VD = VD/VT x VT (DeadSpaceVolume); VA = VE x (1 - VD/VT)
//     (AlveolarVentilationFromDeadSpace).
//   - Predicted body weight, ARDS Network (NEJM 2000;342:1301-8), cm form:
//     men 50 + 0.91 x (H - 152.4), women 45.5 + 0.91 x (H - 152.4)
//     (PredictedBodyWeight).
//   - Predicted PaCO2: VA = (VT - VDanat - VDapp) x RR, PaCO2 = K x VCO2 /
//     VA, with anatomic dead space unless given from the AnatomicModel:
//     2.2 mL/kg PBW for the whole airway (Radford, J Appl Physiol 1955) or
//     0.948 mL/kg PBW, the intrathoracic airway, for a tracheal tube or
//     tracheostomy (Nunn, Campbell & Peckett, J Appl Physiol 1959;14:174-6),
//     and an apparatus dead space that must be declared, recorded as a
//     constant with its source (the patient's circuit or the site's
//     setting); with a measured
//     body temperature the prediction is given back at 37 Cel
//     (PredictedPaCO2).
//   - Temperature correction of blood PCO2: PaCO2(T) = PaCO2(37) x
//     10^(0.019 x (T - 37)), in vitro coefficient of fresh human blood (J
//     Appl Physiol, submitted 1964; 0.0185 in Bradley, Severinghaus &
//     Stupfel, J Appl Physiol 1956;9:201-4) (PaCO2AtBodyTemp,
//     PCO2TempFactor; the convention is TemperatureConvention). Measured minus predicted, described as material
//     beyond +/- 5 mm[Hg], a derived band without interpretation code
//     (PaCO2Discrepancy).
//   - Ventilatory ratio (Sinha et al., Br J Anaesth 2009;102:692-697):
//     VR = VE x PaCO2 / (PBW x 100 mL/kg/min x 37.5 mm[Hg]) (VentilatoryRatio);
//     compared in words with published group values, without code.
//   - Arterial to end-tidal gradient PaCO2 - PETCO2 (Nunn & Hill 1960:
//     normal 4.6 +/- 2.5 mm[Hg]) and alveolar dead-space fraction
//     (PaCO2 - PETCO2) / PaCO2 (Yehya et al. 2016), read against Tyburski
//     et al., J Trauma 2002;53:738 (<= 9 mm[Hg], <= 0.20)
//     (EndTidalGradient, AlveolarDeadSpaceFraction). A negative gradient is
//     flagged without code; beyond -MaxNegativeEndTidalGradient (5 mm[Hg])
//     it is refused.
//   - Ventilation for a target PaCO2 at constant VCO2 and dead space:
//     RR_new = RR x PaCO2 / target (RateForTarget); VT_new = VD + (VT - VD)
//     x PaCO2 / target (TidalVolumeForTarget). Flags outside 4-8 mL/kg PBW
//     and 8-35 /min. The target is the caller's, recorded as a constant;
//     FlagWithinGoalRange marks a value aimed at the midpoint of a goal
//     range that the measured PaCO2 already meets (the caller decides).
//   - Dead-space fraction readings: about 0.3 in healthy adults (Nunn &
//     Hill, J Appl Physiol 1960); 0.58 mean at ARDS onset (Nuckton et al.,
//     NEJM 2002;346:1281-6).
//
// # Valid ranges
//
// Each input has an exported plausible Range (PaCO2Range, PECO2Range,
// PETCO2Range, VCO2Range, MinuteVolumeRange, AlveolarVentilationRange,
// TidalVolumeRange, RespRateRange, BodyTempRange, WeightRange,
// HeightRange, AgeRange, PBWRange, RQRange, AnatomicDeadSpaceRange,
// ApparatusDeadSpaceRange, PhysiologicDeadSpaceRange, TargetPaCO2Range,
// PaCO2RangeKPa, DeadSpaceFractionRange) whose Why field gives the
// reasoning and its label ([published], [derived], [common practice],
// [memory]). Callers can refuse implausible input with Range.Check before
// deriving anything.
//
// # What is refused
//
// Every derivation returns an *InputError naming the offending input (or
// computed value), never a NaN, an infinity or a clamped value:
//
//   - ErrNotFinite: NaN or ±Inf.
//   - ErrNotPositive: zero or negative where only a positive value has meaning.
//   - ErrImplausible: outside the input's plausible Range, or a computed
//     value outside its range (the inputs are inconsistent).
//   - ErrOutOfMeaning: a fraction outside 0..1, a mixed-expired or
//     end-tidal PCO2 above PaCO2 where that gives a negative fraction, an
//     end-tidal PCO2 more than 5 mm[Hg] above PaCO2, a tidal volume not
//     above dead space, an unknown enumeration value.
//   - ErrNotGiven: sex or energy equation left at zero, apparatus dead
//     space not declared.
//
// The specimen (arterial blood only), freshness and pairing of inputs are
// checked by the caller (package fhirmap) before these functions are used.
package physio
