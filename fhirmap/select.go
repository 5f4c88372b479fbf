package fhirmap

import (
	"fmt"
	"strings"
	"time"

	"github.com/ventderive/ventderive/physio"
)

// Roles of the inputs of a derivation. They name what an input was used
// for; the same roles appear in Provenance, in the basis note and in the
// digest.
const (
	RoleBloodGas     Role = "paco2"         // the arterial PCO2 the derivation is made for
	RolePECO2        Role = "peco2"         // mixed-expired PCO2, measured
	RoleVCO2         Role = "vco2"          // CO2 production, measured
	RoleMinuteVolume Role = "minute-volume" // expired > inspired > set
	RoleTidalVolume  Role = "tidal-volume"  // measured expired > other measured > set
	RoleRespRate     Role = "resp-rate"     // total > unspecified > mechanical > set
	RolePETCO2       Role = "petco2"        // end-tidal PCO2, measured > calculated
	RoleBodyTemp     Role = "body-temp"     // for K(T) and PaCO2 at body temperature; own window; core > unstated > peripheral; 37 Cel when absent
	RoleSex          Role = "sex"           // patient-level
	RoleBirthDate    Role = "birth-date"    // patient-level
	RoleHeight       Role = "height"        // patient-level
	RoleWeight       Role = "weight"        // patient-level, actual body weight
	RoleBicarbonate  Role = "hco3"          // same blood sample: arterial bicarbonate
	RoleBaseExcess   Role = "base-excess"   // same blood sample: arterial base excess
)

// Roles of standing inputs: they hold from their time until replaced (see
// roleRule.standing).
const (
	RoleTarget      Role = "target-paco2"         // the patient's own target PaCO2 (a FHIR Goal in force)
	RoleApparatusVD Role = "apparatus-dead-space" // the patient's circuit, recorded by Observation
	RoleAirway      Role = "airway"               // the patient's airway (tube, tracheostomy or none), recorded by Observation
)

// SameSampleTolerance is how far from the blood gas's time a bicarbonate or
// base excess may lie and still be read as from the same sample, when it is
// not in the same resource: the values of one sample share its collection
// time [common practice]; a minute allows for senders that round.
const SameSampleTolerance = time.Minute

// ReasonNotBloodGas refuses a Select call whose blood gas is not a PCO2
// fact: a caller's mistake, reported rather than panicking.
const ReasonNotBloodGas = "not-a-blood-gas"

// Selection is the outcome of pairing one blood gas with the data around
// it. It is a value: the same blood gas, facts and site always give the
// same Selection.
type Selection struct {
	// BloodGas is the PCO2 fact the selection was made for.
	BloodGas Fact
	// Window is the pairing window used (Site.Window).
	Window Window
	// Reason is set when the blood gas itself cannot be used (a non-arterial
	// specimen, entered in error, an implausible PaCO2...): every kind is
	// then refused with it, and Detail says why in words.
	Reason string
	Detail string
	// Inputs holds the chosen fact of each role, the blood gas first, in a
	// fixed role order; a role with no eligible fact is absent. Each input
	// records its offset from the blood gas and, when it is not the
	// preferred kind, the fallback taken.
	Inputs []Input
	// Ventilator counts the usable ventilator readings of the patient in
	// the window (same encounter). Zero means "no-ventilator-data-in-window".
	Ventilator int
	// NearestOutside is the offset of the nearest usable ventilator reading
	// outside the window (stale or too late), valid when HasOutside.
	NearestOutside time.Duration
	HasOutside     bool
	// OtherEncounter counts readings in the window ignored because they
	// belong to another encounter; NotUsable those ignored for their status
	// (registered, cancelled, entered-in-error, unknown).
	OtherEncounter int
	NotUsable      int
}

// Input returns the input chosen for role r.
func (s Selection) Input(r Role) (Input, bool) {
	for _, in := range s.Inputs {
		if in.Role == r {
			return in, true
		}
	}
	return Input{}, false
}

// roleRule says which facts may fill a role and how they rank.
type roleRule struct {
	role Role
	// patient marks a patient-level role: any time, any encounter; the
	// latest at or before the blood gas wins, else the earliest after it.
	patient bool
	// ventilator marks readings that count as ventilator data in the window.
	ventilator bool
	// sameSample marks a value of the blood gas's own sample (see
	// sameSample): no window, no ranking beyond nearness.
	sameSample bool
	// standing marks a fact that holds from its time until a later one
	// replaces it (a goal, the circuit's dead space): the latest at or
	// before the blood gas (plus allowance) wins, never a later one; a zero
	// Effective counts as before. sameEncounter keeps it to the blood gas's
	// encounter when both name one.
	standing      bool
	allowance     func(Site) time.Duration
	sameEncounter bool
	// ownWindow marks body temperature, paired within
	// Site.TemperatureWindow instead of Site.Window.
	ownWindow bool
	// rank returns the preference of a fact (0 best) or false when the fact
	// cannot fill the role at all.
	rank func(Fact) (int, bool)
	// labels names each rank, for the fallback text.
	labels []string
	// detailLabels names a fact more precisely than its rank's label when
	// several kinds share a rank (delivered and total tidal volume).
	detailLabels map[string]string
}

// label names the kind of f at rank, for the fallback text.
func (r *roleRule) label(f Fact, rank int) string {
	if l, ok := r.detailLabels[f.Detail]; ok {
		return l
	}
	return r.labels[rank]
}

var (
	ruleMinuteVolume = roleRule{role: RoleMinuteVolume, ventilator: true,
		rank: func(f Fact) (int, bool) {
			switch {
			case isSetting(f):
				return 3, true
			case f.Detail == "expired":
				return 0, true
			case f.Detail == "inspired":
				return 2, true
			case f.Detail == "spontaneous":
				return 0, false // a part of the minute volume only
			}
			return 1, true
		},
		labels: []string{"measured expired minute volume", "measured minute volume (direction not stated)",
			"measured inspired minute volume", "minute volume setting"}}
	ruleTidalVolume = roleRule{role: RoleTidalVolume, ventilator: true,
		rank: func(f Fact) (int, bool) {
			switch {
			case isSetting(f):
				return 2, true
			case f.Detail == "expired":
				return 0, true
			}
			return 1, true
		},
		labels: []string{"measured expired tidal volume", "measured tidal volume (kind not stated)", "tidal volume setting"},
		detailLabels: map[string]string{
			"delivered": "measured delivered tidal volume",
			"total":     "measured total (spontaneous + mechanical) tidal volume",
		}}
	ruleRespRate = roleRule{role: RoleRespRate, ventilator: true,
		rank: func(f Fact) (int, bool) {
			switch {
			case isSetting(f):
				return 3, true
			case f.Detail == "total":
				return 0, true
			case f.Detail == "mechanical":
				return 2, true
			case f.Detail == "spontaneous":
				return 0, false // spontaneous breaths alone are not the rate
			}
			return 1, true
		},
		labels: []string{"measured total breath rate", "measured breath rate (kind not stated)",
			"measured mechanical breath rate", "breath rate setting"}}
	rulePETCO2 = roleRule{role: RolePETCO2, ventilator: true,
		rank: func(f Fact) (int, bool) {
			switch {
			case isSetting(f):
				return 0, false
			case f.Origin == OriginCalculated:
				return 1, true
			}
			return 0, true
		},
		labels: []string{"measured end-tidal PCO2", "calculated end-tidal PCO2"}}
	ruleVCO2 = roleRule{role: RoleVCO2, ventilator: true,
		rank:   measuredOnly,
		labels: []string{"measured VCO2"}}
	rulePECO2 = roleRule{role: RolePECO2, ventilator: true,
		rank:   measuredOnly,
		labels: []string{"measured mixed-expired PCO2"}}
	// Body temperature has its own window (Site.TemperatureWindow): it is
	// charted hourly or less often. A core site beats a site not stated,
	// which beats a peripheral one.
	ruleBodyTemp = roleRule{role: RoleBodyTemp, ownWindow: true,
		rank: func(f Fact) (int, bool) {
			switch {
			case isSetting(f):
				return 0, false
			case f.Detail == "core":
				return 0, true
			case f.Detail == "peripheral":
				return 2, true
			}
			return 1, true
		},
		labels: []string{"measured core body temperature", "measured body temperature (site not stated)", "measured peripheral body temperature"}}
	ruleSex    = roleRule{role: RoleSex, patient: true}
	ruleBirth  = roleRule{role: RoleBirthDate, patient: true}
	ruleHeight = roleRule{role: RoleHeight, patient: true}
	ruleWeight = roleRule{role: RoleWeight, patient: true}
	// Bicarbonate and base excess come from the blood gas itself (the same
	// resource, or an arterial value at the same time), never from the
	// pairing window: they describe that sample.
	ruleBicarbonate = roleRule{role: RoleBicarbonate, sameSample: true, labels: []string{"arterial bicarbonate of the same sample"}}
	ruleBaseExcess  = roleRule{role: RoleBaseExcess, sameSample: true, labels: []string{"arterial base excess of the same sample"}}
	// A patient's goal holds from its startDate; one starting after the
	// blood gas does not apply to it.
	ruleTarget = roleRule{role: RoleTarget, standing: true, labels: []string{"the patient's PaCO2 goal"}}
	// The circuit's apparatus dead space holds until the circuit changes
	// (a new Observation); one recorded up to the window's After allowance
	// after the blood gas counts, for the same clock and charting
	// differences as ventilator readings, and only in the same encounter.
	ruleApparatus = roleRule{role: RoleApparatusVD, standing: true, sameEncounter: true,
		allowance: func(s Site) time.Duration { return s.Window.After },
		labels:    []string{"apparatus dead space recorded for the patient's circuit"}}
	// The patient's airway holds until it changes (intubation,
	// tracheostomy, extubation: a new Observation), in the same encounter.
	// Unlike the circuit's dead space it has no allowance after the blood
	// gas: the airway changes at a moment, and one recorded after the gas
	// may describe a change made after it (a gas drawn on the mask just
	// before intubation is a whole-airway gas).
	ruleAirway = roleRule{role: RoleAirway, standing: true, sameEncounter: true,
		labels: []string{"the patient's airway as recorded"}}
	// ruleVentOther marks ventilator readings that no derivation uses but
	// that show the ventilator feed was present.
	ruleVentOther = roleRule{ventilator: true}
)

func measuredOnly(f Fact) (int, bool) { return 0, !isSetting(f) }

// isSetting reports whether a fact is a ventilator setting rather than a
// measurement (the decoder marks settings by Origin and by Detail "set").
func isSetting(f Fact) bool { return f.Origin == OriginSetting || f.Detail == "set" }

// ruleFor returns the rule of a fact's quantity.
func ruleFor(q Quantity) (*roleRule, bool) {
	switch q {
	case QMinuteVol:
		return &ruleMinuteVolume, true
	case QTidalVol:
		return &ruleTidalVolume, true
	case QRespRate:
		return &ruleRespRate, true
	case QPETCO2:
		return &rulePETCO2, true
	case QVCO2:
		return &ruleVCO2, true
	case QPECO2:
		return &rulePECO2, true
	case QBodyTemp:
		return &ruleBodyTemp, true
	case QSex:
		return &ruleSex, true
	case QBirthDate:
		return &ruleBirth, true
	case QHeight:
		return &ruleHeight, true
	case QWeight:
		return &ruleWeight, true
	case QBicarbonate:
		return &ruleBicarbonate, true
	case QBaseExcess:
		return &ruleBaseExcess, true
	case QTargetPaCO2:
		return &ruleTarget, true
	case QApparatusVD:
		return &ruleApparatus, true
	case QAirway:
		return &ruleAirway, true
	case QPEEP, QPlateau, QMeanAirway, QFETCO2:
		return &ruleVentOther, true
	}
	return nil, false
}

type candidate struct {
	fact   Fact
	offset time.Duration
	rank   int
	rule   *roleRule
}

// better reports whether a beats b for a window role: better rank, then
// nearer in time, then earlier, then the smaller Key.
func (a candidate) better(b candidate) bool {
	if a.rank != b.rank {
		return a.rank < b.rank
	}
	da, db := a.offset.Abs(), b.offset.Abs()
	if da != db {
		return da < db
	}
	if c := a.fact.Effective.Compare(b.fact.Effective); c != 0 {
		return c < 0
	}
	return a.fact.Key < b.fact.Key
}

// patientBetter reports whether a beats b for a patient-level role of a
// blood gas taken at at: a fact at or before the blood gas (a zero
// Effective, as for facts from a Patient resource, counts as before) beats
// one after it; among facts before, the later wins; among facts after, the
// earlier wins (the nearest to the blood gas either way); then the smaller
// Key. A weight or height recorded after the blood gas is used only when
// none was recorded before it.
func (a candidate) patientBetter(b candidate, at time.Time) bool {
	aBefore := a.fact.Effective.IsZero() || !a.fact.Effective.After(at)
	bBefore := b.fact.Effective.IsZero() || !b.fact.Effective.After(at)
	if aBefore != bBefore {
		return aBefore
	}
	if c := a.fact.Effective.Compare(b.fact.Effective); c != 0 {
		return (c > 0) == aBefore
	}
	return a.fact.Key < b.fact.Key
}

// standingBetter reports whether a beats b for a standing role: the later
// start wins (zero counts as earliest), then the later meta.lastUpdated,
// then the smaller Key.
func (a candidate) standingBetter(b candidate) bool {
	if c := a.fact.Effective.Compare(b.fact.Effective); c != 0 {
		return c > 0
	}
	if c := a.fact.LastUpdated.Compare(b.fact.LastUpdated); c != 0 {
		return c > 0
	}
	return a.fact.Key < b.fact.Key
}

// Select pairs one blood gas with the ventilator and patient data around it.
// It is the one selection rule of the service: the offline command and the
// pipeline both call it. facts are a patient's normalised current facts
// (Current); facts of other patients are ignored, so a mixed slice is fine.
//
// The rules, in order:
//   - the blood gas must be a usable (preliminary, final, amended, corrected)
//     arterial PCO2 measured at 37 Cel with a plausible value; otherwise
//     Selection.Reason says why and no input is selected;
//   - only facts with Status.Usable(), of the same Patient, are considered;
//     ventilator readings must also lie in site.Window around the blood
//     gas, body temperatures in site.TemperatureWindow (both ends included),
//     and belong to the
//     blood gas's Encounter when both name one (another encounter's readings
//     are mismatched data, counted in OtherEncounter);
//   - per role, the preferred kind wins (measured over set: expired minute
//     volume > unspecified > inspired > setting; expired tidal volume >
//     delivered > setting; total breath rate > unspecified > mechanical >
//     setting; measured end-tidal PCO2 > calculated; core body temperature
//     > site not stated > peripheral), then the nearest in
//     time, then the earlier, then the smaller Key; a fallback is recorded
//     in Input.Fallback;
//   - patient-level facts (sex, birth date, height, weight) come from any
//     time and encounter: the latest at or before the blood gas (a fact with
//     a zero Effective, from a Patient resource, counts as before), else the
//     earliest after it, then the smaller Key;
//   - standing facts (the patient's PaCO2 goal, the apparatus dead space of
//     the patient's circuit, the patient's airway) hold until replaced: the
//     latest at or before the blood gas (a goal from its startDate; a
//     circuit's dead space up to Window.After after the gas, in the same
//     encounter; an airway at or before the gas, in the same encounter) wins,
//     then the later meta.lastUpdated, then the smaller Key; one starting
//     later never applies.
func Select(bloodGas Fact, facts []Fact, site Site) Selection {
	sel := Selection{BloodGas: bloodGas, Window: site.Window}
	sel.Inputs = append(sel.Inputs, Input{Role: RoleBloodGas, Fact: bloodGas})
	if reason, detail := bloodGasRefusal(bloodGas); reason != "" {
		sel.Reason, sel.Detail = reason, detail
		return sel
	}

	var (
		best [len(roleOrderArray)]candidate
		has  [len(roleOrderArray)]bool
	)
	for _, f := range facts {
		if f.Key == bloodGas.Key || f.Patient != bloodGas.Patient {
			continue
		}
		rule, ok := ruleFor(f.Quantity)
		if !ok {
			continue
		}
		off := f.Effective.Sub(bloodGas.Effective)
		if rule.sameSample {
			if f.Status.Usable() && sameSample(f, bloodGas, off) {
				c := candidate{fact: f, offset: off, rule: rule}
				if i := roleIndex(rule.role); !has[i] || c.better(best[i]) {
					best[i], has[i] = c, true
				}
			}
			continue
		}
		if rule.standing {
			if !f.Status.Usable() || rule.sameEncounter && bloodGas.Encounter != "" && f.Encounter != "" && f.Encounter != bloodGas.Encounter {
				continue
			}
			var allow time.Duration
			if rule.allowance != nil {
				allow = rule.allowance(site)
			}
			if !f.Effective.IsZero() && f.Effective.After(bloodGas.Effective.Add(allow)) {
				continue
			}
			c := candidate{fact: f, offset: off, rule: rule}
			if f.Effective.IsZero() {
				c.offset = 0
			}
			if i := roleIndex(rule.role); !has[i] || c.standingBetter(best[i]) {
				best[i], has[i] = c, true
			}
			continue
		}
		win := site.Window
		if rule.ownWindow {
			win = site.TemperatureWindow
		}
		inWindow := off >= -win.Before && off <= win.After
		if !f.Status.Usable() {
			if inWindow && !rule.patient {
				sel.NotUsable++
			}
			continue
		}
		if rule.patient {
			c := candidate{fact: f, offset: off, rule: rule}
			if i := roleIndex(rule.role); !has[i] || c.patientBetter(best[i], bloodGas.Effective) {
				best[i], has[i] = c, true
			}
			continue
		}
		if bloodGas.Encounter != "" && f.Encounter != "" && f.Encounter != bloodGas.Encounter {
			if inWindow {
				sel.OtherEncounter++
			}
			continue
		}
		if !inWindow {
			if rule.ventilator && (!sel.HasOutside || off.Abs() < sel.NearestOutside.Abs() ||
				off.Abs() == sel.NearestOutside.Abs() && off < sel.NearestOutside) {
				sel.NearestOutside, sel.HasOutside = off, true
			}
			continue
		}
		if rule.ventilator {
			sel.Ventilator++
		}
		if rule.role == "" || rule.rank == nil {
			continue
		}
		rank, ok := rule.rank(f)
		if !ok {
			continue
		}
		c := candidate{fact: f, offset: off, rank: rank, rule: rule}
		if i := roleIndex(rule.role); !has[i] || c.better(best[i]) {
			best[i], has[i] = c, true
		}
	}
	for i, c := range best {
		if !has[i] {
			continue
		}
		in := Input{Role: c.rule.role, Fact: c.fact, Offset: c.offset}
		if c.rank > 0 {
			in.Fallback = fmt.Sprintf("%s used: no %s in the window", c.rule.label(c.fact, c.rank), c.rule.labels[0])
		}
		sel.Inputs = append(sel.Inputs, in)
	}
	return sel
}

// roleOrderArray is the order of Selection.Inputs and Derivation.Inputs.
var roleOrderArray = [...]Role{
	RoleBloodGas, RolePECO2, RoleVCO2, RoleMinuteVolume, RoleTidalVolume, RoleRespRate,
	RolePETCO2, RoleBodyTemp, RoleSex, RoleBirthDate, RoleHeight, RoleWeight,
	RoleBicarbonate, RoleBaseExcess, RoleTarget, RoleApparatusVD, RoleAirway,
}

// sameSample reports whether f (a bicarbonate or base excess) belongs to
// the sample of bloodGas: the same resource (a panel's components), or an
// arterial value of the same encounter within SameSampleTolerance.
func sameSample(f, bloodGas Fact, off time.Duration) bool {
	if f.Resource != "" && f.Resource == bloodGas.Resource {
		return true
	}
	if f.Specimen != SpecimenArterial || off.Abs() > SameSampleTolerance {
		return false
	}
	return bloodGas.Encounter == "" || f.Encounter == "" || f.Encounter == bloodGas.Encounter
}

func roleIndex(r Role) int {
	for i, o := range roleOrderArray {
		if o == r {
			return i
		}
	}
	panic("fhirmap: role without a place in roleOrderArray: " + string(r))
}

// bloodGasRefusal returns the reason a PCO2 fact cannot anchor any
// derivation, or "" when it can.
func bloodGasRefusal(bg Fact) (reason, detail string) {
	if bg.Quantity != QPCO2 {
		return ReasonNotBloodGas, fmt.Sprintf("the fact is a %s value, not a blood PCO2", bg.Quantity)
	}
	switch {
	case bg.Status == StatusEnteredInError:
		return ReasonEnteredInError, "the blood gas was entered in error"
	case !bg.Status.Usable():
		return ReasonBloodGasNotUsable, fmt.Sprintf("the blood gas has status %q: no result to use", bg.Status)
	}
	switch bg.Specimen {
	case SpecimenArterial:
	case SpecimenVenous:
		return ReasonVenous, "venous PCO2 (code " + bg.Code.Code + "): dead-space and CO2-elimination formulas need arterial blood"
	case SpecimenCapillary:
		return ReasonCapillary, "capillary PCO2 (code " + bg.Code.Code + "): dead-space and CO2-elimination formulas need arterial blood"
	case SpecimenMixedVenous:
		return ReasonMixedVenous, "mixed venous PCO2 (code " + bg.Code.Code + "): dead-space and CO2-elimination formulas need arterial blood"
	default:
		if claims, ok := strings.CutPrefix(bg.Detail, specimenConflictPrefix); ok {
			return ReasonUnknownSpecimen, "PCO2 (code " + bg.Code.Code + ") whose sources name different blood: " + claims + "; a contradiction is refused, never resolved by guess"
		}
		return ReasonUnknownSpecimen, "PCO2 of unspecified blood (code " + bg.Code.Code + ") and no coded arterial Specimen on the Observation"
	}
	if bg.TempCorrected {
		return ReasonTemperatureAdjusted, "PaCO2 adjusted to the patient's temperature (code " + bg.Code.Code + "); the formulas use PaCO2 measured at 37 °C"
	}
	if err := physio.PaCO2Range.Check("PaCO2", bg.Value); err != nil {
		return ReasonImplausible, errorDetail(err)
	}
	return "", ""
}

// errorDetail renders a physio error without its package prefix, for a
// refusal detail.
func errorDetail(err error) string {
	return strings.TrimPrefix(err.Error(), "physio: ")
}
