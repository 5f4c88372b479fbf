package physio

// MmolPerL is a concentration in millimoles per litre, UCUM mmol/L
// (bicarbonate, base excess).
type MmolPerL float64

// Thresholds of the chronic-hypercapnia caution on the values for a target
// PaCO2.
const (
	// HypercapniaPaCO2 is the upper end of the healthy PaCO2 range, 45 mmHg
	// [published textbooks; physiology.md s1].
	HypercapniaPaCO2 MmHg = 45
	// CompensatedHCO3 is the bicarbonate above which a raised PaCO2 has been
	// met by renal (metabolic) compensation, in mmol/L. Why: acute
	// respiratory acidosis raises bicarbonate by about 1 mmol/L per 10 mmHg
	// of PaCO2 above 40 by buffering alone, chronic by about 3.5-4 mmol/L
	// per 10 mmHg through renal retention, which takes 3-5 days [published:
	// Brandis, Acid-Base Physiology, section 4.5 (anaesthesiamcq.com);
	// Boston rules as reprinted in acid-base references]. From a normal 24
	// mmol/L, acute buffering reaches 30 mmol/L only at a PaCO2 of 100 mmHg
	// [derived], and acute buffering is reported not to raise it above
	// about 30 [published, secondary: acid-base compensation references];
	// so 30 separates compensation from buffering over the clinical range.
	CompensatedHCO3 MmolPerL = 30
	// CompensatedBaseExcess is the base excess above which, when no
	// bicarbonate is sent, a raised PaCO2 is read as compensated: the upper
	// end of the normal -2 to +2 mmol/L [common practice].
	CompensatedBaseExcess MmolPerL = 2

	// FlagChronicHypercapnia is the caution on both values for a target
	// PaCO2 when the blood gas shows metabolic compensation of a raised
	// PaCO2.
	FlagChronicHypercapnia = "PaCO2 above 45 mmHg with bicarbonate above 30 mmol/L (or, without bicarbonate, base excess above +2 mmol/L): metabolic compensation points to chronic hypercapnia; lowering PaCO2 to a normal target may cause a metabolic alkalosis and be harmful: the patient's own target applies"
)

// ChronicHypercapnia reports whether a blood gas shows metabolic
// compensation of a raised PaCO2: paco2 above HypercapniaPaCO2 and
// bicarbonate above CompensatedHCO3, or, when no bicarbonate was sent
// (haveHCO3 false), base excess above CompensatedBaseExcess. With neither
// sent it reports false: no compensation is shown, none is assumed.
func ChronicHypercapnia(paco2 MmHg, hco3 MmolPerL, haveHCO3 bool, be MmolPerL, haveBE bool) bool {
	if paco2 <= HypercapniaPaCO2 {
		return false
	}
	if haveHCO3 {
		return hco3 > CompensatedHCO3
	}
	return haveBE && be > CompensatedBaseExcess
}

// CautionChronicHypercapnia adds FlagChronicHypercapnia to a value for a
// target PaCO2 (RateForTarget, TidalVolumeForTarget); the caller decides
// with ChronicHypercapnia from the same blood gas. On another result it
// does nothing.
func (r *Result) CautionChronicHypercapnia() {
	if r.Method != methodRateForTarget && r.Method != methodVTForTarget {
		return
	}
	r.flag(FlagChronicHypercapnia)
}
