package fhirmap

// Codes of the derived values in the service's CodeSystem (Site.CodeSystemURL).
// No LOINC code exists for them (checked; see the code reference). The codes
// are stable across releases: a code is never reused for another meaning.
const (
	KindDeadSpaceEnghoff      = "deadspace-fraction-enghoff"
	KindDeadSpaceVCO2         = "deadspace-fraction-vco2"
	KindDeadSpaceEstimated    = "deadspace-fraction-estimated"
	KindDeadSpaceVolume       = "deadspace-volume"
	KindAlveolarVentilation   = "alveolar-ventilation"
	KindPredictedPaCO2        = "paco2-predicted"
	KindPaCO2Discrepancy      = "paco2-measured-minus-predicted"
	KindVentilatoryRatio      = "ventilatory-ratio"
	KindPaCO2PETCO2Gradient   = "paco2-petco2-gradient"
	KindAlveolarDeadSpace     = "alveolar-deadspace-fraction"
	KindRateForTarget         = "resp-rate-for-target-paco2"
	KindTidalVolumeForTarget  = "tidal-volume-for-target-paco2"
	codeAdvisoryTag           = "advisory"
	codeDerivedCategory       = "derived-physiology"
	advisoryTagDisplay        = "Advisory: not an order; verify at the bedside"
	derivedCategoryDisplay    = "Derived ventilation physiology (computed, advisory)"
	codeSystemVersion         = "2" // 2: the airway-model input codes
	codeSystemDate            = "2026-12-02"
	codeSystemID              = "ventderive-derived"
	codeSystemName            = "VentderiveDerived"
	codeSystemTitle           = "ventderive derived ventilation physiology"
	codeSystemPublisherString = "ventderive"
)

// KindInfo describes one derived value: its code and meaning, its UCUM unit,
// its formula with the published source, and when it is refused. The
// CodeSystem, the README table and the tests are built from Catalogue.
type KindInfo struct {
	Code       string
	Display    string
	Definition string // one or two sentences for CodeSystem.concept.definition
	Unit       string // UCUM code of the value
	// Decimals is the output precision: valueQuantity.value and the digest
	// use the value rounded to this many decimals.
	Decimals int
	Formula  string
	Source   string // published source, with the reference label
	Refused  string // the refusal reasons specific to the kind, in the order checked
}

// Catalogue lists every derived value the service makes, in the order
// derivations are attempted and reported.
var Catalogue = []KindInfo{
	{
		Code:       KindDeadSpaceEnghoff,
		Display:    "Physiologic dead-space fraction (VD/VT), Bohr-Enghoff, measured mixed-expired PCO2",
		Definition: "Fraction of each tidal breath that does not take part in CO2 elimination, from arterial PCO2 and the mixed-expired PCO2 measured by volumetric capnography or expired-gas collection.",
		Unit:       "1", Decimals: 3,
		Formula: "VD/VT = (PaCO2 - PECO2) / PaCO2; PaCO2 at the measured body temperature T: PaCO2(37 °C) x 10^(0.019 x (T - 37)) (as measured at 37 °C when T is not measured)",
		Source:  "Enghoff modification of the Bohr equation [published; e.g. Crit Care 2016, doi 10.1186/s13054-016-1311-8]; PCO2 temperature coefficient 0.019, J Appl Physiol (submitted 1964) [published]",
		Refused: "no-peco2; implausible-input; inconsistent-inputs (PECO2 not below PaCO2)",
	},
	{
		Code:       KindDeadSpaceVCO2,
		Display:    "Physiologic dead-space fraction (VD/VT) from measured VCO2 and measured minute volume",
		Definition: "Dead-space fraction by the Enghoff equation with the mixed-expired PCO2 computed from measured CO2 production and measured minute ventilation (expired preferred; steady state, no inspired CO2).",
		Unit:       "1", Decimals: 3,
		Formula: "VD/VT = 1 - K(T) x VCO2 / (VE x PaCO2), K(T) = 0.760 x (273 + T)/273 mmHg.L/mL at the measured body temperature T (37 °C when not measured: K = 0.863); PaCO2 at the measured body temperature T: PaCO2(37 °C) x 10^(0.019 x (T - 37)) (as measured at 37 °C when T is not measured)",
		Source:  "Enghoff [published] with the alveolar ventilation equation, K from the ideal gas law (VCO2 STPD to VE BTPS at body temperature) [derived]; PCO2 temperature coefficient 0.019, J Appl Physiol (submitted 1964) [published]",
		Refused: "no-vco2; no-minute-volume (none measured: a set minute volume is not used); implausible-input; inconsistent-inputs",
	},
	{
		Code:       KindDeadSpaceEstimated,
		Display:    "Estimated dead-space fraction (VD/VT), VCO2 estimated from resting energy expenditure",
		Definition: "Dead-space fraction with CO2 production estimated, not measured: resting energy expenditure from an energy equation, converted to VCO2 with the Weir equation and an assumed respiratory quotient. Always an estimate, flagged when a measured dead-space fraction is derived for the same blood gas; read against no threshold (its source gives none, and those of measured dead space do not apply).",
		Unit:       "1", Decimals: 3,
		Formula: "VD/VT = 1 - 0.86 x VCO2est / (VE x PaCO2); VCO2est = REE / (1.440 x (3.941/RQ + 1.106)), REE by Harris-Benedict 1919 (the worked basis names the equation used)",
		Source:  "Siddiki et al., Crit Care 2010, doi 10.1186/cc9206 [published]; Weir, J Physiol 1949;109:1-9 [published]; Harris & Benedict 1919 [published]",
		Refused: "no-minute-volume (none measured: a set minute volume is not used); no-sex; no-age; no-height; no-weight; implausible-input; inconsistent-inputs",
	},
	{
		Code:       KindDeadSpaceVolume,
		Display:    "Physiologic dead-space volume per breath (VD)",
		Definition: "Volume of each breath that does not take part in CO2 elimination: the measured dead-space fraction (Bohr-Enghoff from PECO2 when measured, else from VCO2) times the tidal volume.",
		Unit:       "mL", Decimals: 0,
		Formula: "VD = VD/VT x VT (VD/VT with PaCO2 at the measured body temperature)",
		Source:  "Enghoff [published]; product with VT [derived]",
		Refused: "no-vco2 (neither PECO2 nor VCO2 measured); no-minute-volume (for the VCO2 form: none measured, a set minute volume is not used); no-tidal-volume; implausible-input; inconsistent-inputs",
	},
	{
		Code:       KindAlveolarVentilation,
		Display:    "Alveolar ventilation (VA)",
		Definition: "Part of the minute ventilation that reaches gas-exchanging alveoli: measured minute ventilation times one minus the measured dead-space fraction.",
		Unit:       "L/min", Decimals: 2,
		Formula: "VA = VE x (1 - VD/VT) (VD/VT with PaCO2 at the measured body temperature)",
		Source:  "alveolar ventilation equation [published: standard respiratory physiology texts; e.g. Wang et al., Adv Physiol Educ 2020;44:145-152]",
		Refused: "no-vco2 (neither PECO2 nor VCO2 measured); no-minute-volume (none measured: a set minute volume is not used); implausible-input; inconsistent-inputs",
	},
	{
		Code:       KindPredictedPaCO2,
		Display:    "Predicted PaCO2 from measured VCO2, tidal volume and rate (measured preferred, settings as fallback) and predicted dead space",
		Definition: "PaCO2 expected from the alveolar ventilation equation if dead space were only anatomic (by the patient's recorded airway, else the site's model: 0.948 mL/kg predicted body weight of intrathoracic airway for a tracheal tube or tracheostomy, the site default, or 2.2 mL/kg for the whole airway) plus the configured apparatus dead space, at the measured tidal volume and breath rate (or the settings, recorded as a fallback); computed at the measured body temperature and given at 37 °C, as the blood gas is reported.",
		Unit:       "mm[Hg]", Decimals: 1,
		Formula: "PaCO2pred = K(T) x VCO2 / ((VT - VDanat - VDapp) x RR / 1000) x 10^(0.019 x (37 - T)); VDanat = 0.948 mL/kg x PBW (tracheal tube or tracheostomy) or 2.2 mL/kg x PBW (whole airway), by the patient's recorded airway, else the site's model; PBW (ARDS Network) from height and sex; T the measured body temperature (37 °C when not measured)",
		Source:  "alveolar ventilation equation [published]; Nunn, Campbell & Peckett, J Appl Physiol 1959;14:174-6 (intrathoracic 0.43 mL/lb) [published]; Radford, J Appl Physiol 1955 [published]; ARDS Network, NEJM 2000;342:1301-8 [published]; PCO2 temperature coefficient 0.019, J Appl Physiol (submitted 1964) [published]",
		Refused: "no-vco2; no-tidal-volume; no-resp-rate; no-sex; no-height; apparatus-dead-space-not-configured (neither recorded for the patient's circuit nor set by the site); implausible-input (including a recorded apparatus dead space outside 0-500 mL); inconsistent-inputs (VT not above dead space)",
	},
	{
		Code:       KindPaCO2Discrepancy,
		Display:    "Measured minus predicted PaCO2",
		Definition: "Arterial PCO2 minus the predicted PaCO2 (made with a measured VCO2): a large positive difference means more dead space than the prediction assumes (alveolar dead space) or an input error; a large negative one is physiologically implausible (physiologic dead space cannot be smaller than anatomic plus apparatus dead space) and is flagged as a likely input error or an overestimated anatomic dead space.",
		Unit:       "mm[Hg]", Decimals: 1,
		Formula: "PaCO2 - PaCO2pred, both at 37 °C as the blood gas is reported",
		Source:  "difference of the measured value and the alveolar-ventilation prediction [derived]",
		Refused: "as paco2-predicted",
	},
	{
		Code:       KindVentilatoryRatio,
		Display:    "Ventilatory ratio (VR)",
		Definition: "Ratio of the measured minute ventilation and PaCO2 product to the predicted product (100 mL/kg/min predicted body weight, PaCO2 37.5 mmHg); near 1 in healthy lungs.",
		Unit:       "1", Decimals: 2,
		Formula: "VR = (VE[mL/min] x PaCO2) / (PBW x 100 mL/kg/min x 37.5 mmHg); PaCO2 at the measured body temperature T: PaCO2(37 °C) x 10^(0.019 x (T - 37)) (as measured at 37 °C when T is not measured)",
		Source:  "Sinha et al., Br J Anaesth 2009;102:692-697 [published]; mmHg form, Sinha et al., AJRCCM 2019 [published]; PCO2 temperature coefficient 0.019, J Appl Physiol (submitted 1964) [published]",
		Refused: "no-minute-volume (none measured: a set minute volume is not used); no-sex; no-height; implausible-input",
	},
	{
		Code:       KindPaCO2PETCO2Gradient,
		Display:    "Arterial to end-tidal PCO2 gradient (Pa-ETCO2)",
		Definition: "Arterial PCO2 minus end-tidal PCO2; widens with alveolar dead space.",
		Unit:       "mm[Hg]", Decimals: 1,
		Formula: "Pa-ETCO2 = PaCO2 - PETCO2; PaCO2 at the measured body temperature T: PaCO2(37 °C) x 10^(0.019 x (T - 37)) (as measured at 37 °C when T is not measured)",
		Source:  "Nunn & Hill, J Appl Physiol 1960 [published]; Tyburski et al., J Trauma 2002;53:738 [published]; PCO2 temperature coefficient 0.019, J Appl Physiol (submitted 1964) [published]",
		Refused: "no-etco2; implausible-input; inconsistent-inputs (PETCO2 more than 5 mmHg above PaCO2)",
	},
	{
		Code:       KindAlveolarDeadSpace,
		Display:    "Alveolar dead-space fraction (AVDSF)",
		Definition: "Arterial to end-tidal PCO2 gradient as a fraction of arterial PCO2.",
		Unit:       "1", Decimals: 3,
		Formula: "AVDSF = (PaCO2 - PETCO2) / PaCO2; PaCO2 at the measured body temperature T: PaCO2(37 °C) x 10^(0.019 x (T - 37)) (as measured at 37 °C when T is not measured)",
		Source:  "Yehya et al., Pediatr Crit Care Med 2016 [published]; Tyburski et al., J Trauma 2002;53:738 [published]; PCO2 temperature coefficient 0.019, J Appl Physiol (submitted 1964) [published]",
		Refused: "no-etco2; implausible-input; inconsistent-inputs (PETCO2 above PaCO2)",
	},
	{
		Code:       KindRateForTarget,
		Display:    "Breath rate for the target PaCO2 at the same tidal volume (advisory)",
		Definition: "Breath rate at which, with unchanged tidal volume, dead space and CO2 production, PaCO2 would reach the patient's own target (a FHIR Goal in force; a range's midpoint), else the site's configured target. Advisory arithmetic, not an order.",
		Unit:       "/min", Decimals: 1,
		Formula: "RRnew = RR x PaCO2 / PaCO2target; PaCO2 and the target both as measured at 37 °C, so the temperature correction cancels from their ratio",
		Source:  "inverse proportion of PaCO2 and alveolar ventilation at constant VCO2 [derived from the alveolar ventilation equation]",
		Refused: "no-resp-rate; no-tidal-volume, no-sex, no-height (to flag the tidal volume per kg predicted body weight); target-paco2-not-configured (no Goal in force and no site target); implausible-input (including a goal outside 20-100 mmHg); target-answer-beyond-model (the answer outside 2-80 /min)",
	},
	{
		Code:       KindTidalVolumeForTarget,
		Display:    "Tidal volume for the target PaCO2 at the same breath rate (advisory)",
		Definition: "Tidal volume at which, with unchanged breath rate, physiologic dead-space volume and CO2 production, PaCO2 would reach the patient's own target (a FHIR Goal in force; a range's midpoint), else the site's configured target. Advisory arithmetic, not an order.",
		Unit:       "mL", Decimals: 0,
		Formula: "VTnew = VD + (VT - VD) x PaCO2 / PaCO2target, VD the measured physiologic dead-space volume (VD/VT with PaCO2 at the measured body temperature); PaCO2 and the target both as measured at 37 °C, so the temperature correction cancels from their ratio",
		Source:  "alveolar ventilation equation at constant VCO2 and dead-space volume [derived]",
		Refused: "no-vco2 (neither PECO2 nor VCO2 measured); no-minute-volume (for the VCO2 form: none measured, a set minute volume is not used); no-tidal-volume; no-sex, no-height (to flag the answer per kg predicted body weight); target-paco2-not-configured (no Goal in force and no site target); implausible-input (including a goal outside 20-100 mmHg); inconsistent-inputs; target-answer-beyond-model (the answer outside 50-2000 mL)",
	},
}

// LookupKind returns the catalogue entry of a kind code.
func LookupKind(code string) (KindInfo, bool) {
	for _, k := range Catalogue {
		if k.Code == code {
			return k, true
		}
	}
	return KindInfo{}, false
}

// KindUnit returns the UCUM unit of a kind code, or "" for an unknown code.
func KindUnit(code string) string {
	k, _ := LookupKind(code)
	return k.Unit
}

// Refusal reason codes. They are stable: stores, metrics and reviewers
// count by them.
const (
	// Blood-gas level: every kind of the blood gas is refused.
	ReasonVenous              = "venous-specimen"
	ReasonCapillary           = "capillary-specimen"
	ReasonMixedVenous         = "mixed-venous-specimen"
	ReasonUnknownSpecimen     = "unknown-specimen"
	ReasonEnteredInError      = "blood-gas-entered-in-error"
	ReasonBloodGasNotUsable   = "blood-gas-status-not-usable"
	ReasonTemperatureAdjusted = "temperature-corrected-paco2"

	// Kind level.
	ReasonNoVentilatorData = "no-ventilator-data-in-window"
	ReasonNoMinuteVolume   = "no-minute-volume"
	ReasonNoVCO2           = "no-vco2"
	ReasonNoPECO2          = "no-peco2"
	ReasonNoETCO2          = "no-etco2"
	ReasonNoTidalVolume    = "no-tidal-volume"
	ReasonNoRespRate       = "no-resp-rate"
	ReasonNoHeight         = "no-height"
	ReasonNoSex            = "no-sex"
	ReasonNoAge            = "no-age"
	ReasonNoWeight         = "no-weight"
	ReasonImplausible      = "implausible-input"
	ReasonInconsistent     = "inconsistent-inputs"
	ReasonApparatusNotSet  = "apparatus-dead-space-not-configured"
	ReasonTargetNotSet     = "target-paco2-not-configured"
	ReasonBeyondModel      = "target-answer-beyond-model"
)

// ReasonInfo describes one refusal reason.
type ReasonInfo struct {
	Code    string
	Meaning string
}

// Reasons lists every refusal reason with its meaning, for the README and
// the OperationOutcome texts.
var Reasons = []ReasonInfo{
	{ReasonVenous, "the PCO2 was measured in venous blood; dead-space formulas need arterial blood"},
	{ReasonCapillary, "the PCO2 was measured in capillary blood; dead-space formulas need arterial blood"},
	{ReasonMixedVenous, "the PCO2 was measured in mixed venous blood; dead-space formulas need arterial blood"},
	{ReasonUnknownSpecimen, "the PCO2 code does not name the blood and no coded Specimen says arterial, or the code, the Specimen and the panel name different blood (the detail says which)"},
	{ReasonEnteredInError, "the blood gas was entered in error; values derived from it are withdrawn"},
	{ReasonBloodGasNotUsable, "the blood gas status is registered, cancelled or unknown: there is no result to use"},
	{ReasonTemperatureAdjusted, "the PaCO2 was adjusted to the patient's temperature; the formulas use PaCO2 measured at 37 °C"},
	{ReasonNoVentilatorData, "no usable ventilator reading of the patient (same encounter) lies in the pairing window"},
	{ReasonNoMinuteVolume, "no measured minute volume (expired, unstated or inspired) in the pairing window; a set minute volume is not a measurement of ventilation and is not used"},
	{ReasonNoVCO2, "no measured CO2 production (VCO2), and for dead-space volume no mixed-expired PCO2 either, in the pairing window"},
	{ReasonNoPECO2, "no measured mixed-expired PCO2 in the pairing window"},
	{ReasonNoETCO2, "no end-tidal PCO2 in the pairing window"},
	{ReasonNoTidalVolume, "no tidal volume (measured or set) in the pairing window"},
	{ReasonNoRespRate, "no total or mechanical breath rate (measured or set) in the pairing window"},
	{ReasonNoHeight, "no body height of the patient: predicted body weight needs it"},
	{ReasonNoSex, "no sex (male or female) of the patient: the sex-specific equations need it"},
	{ReasonNoAge, "no birth date of the patient: the energy equation needs the age"},
	{ReasonNoWeight, "no body weight of the patient: the energy equation needs it"},
	{ReasonImplausible, "an input lies outside its published plausible range (the detail names it)"},
	{ReasonInconsistent, "the inputs contradict each other (e.g. mixed-expired PCO2 not below PaCO2, end-tidal PCO2 more than 5 mmHg above PaCO2; the detail says which)"},
	{ReasonApparatusNotSet, "the site has not configured its apparatus dead space and none is recorded for the patient's circuit; it is never assumed to be zero"},
	{ReasonBeyondModel, "the breath rate or tidal volume for the target lies outside the range in which the alveolar ventilation equation describes conventional ventilation (rate 2-80 /min, tidal volume 50-2000 mL): the target cannot be reached by that change alone"},
	{ReasonTargetNotSet, "the patient has no PaCO2 Goal in force and the site has not configured a target PaCO2; none is assumed, since a usual adult target does not fit chronic hypercapnia or permissive hypercapnia"},
}
