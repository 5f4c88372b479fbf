package fhirmap

import (
	"errors"
	"fmt"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/ventderive/ventderive/physio"
)

// DeriveAll derives every kind for every blood gas in facts: it reduces facts
// to their current versions (Current), then pairs and derives each PCO2 fact
// of any specimen, so that venous, capillary and unspecified gases produce
// refusals with their reason rather than silence. Results are sorted by Key.
// facts may hold several patients.
func DeriveAll(facts []Fact, site Site) ([]Derivation, []Refusal) {
	current := Current(facts)
	var (
		ds []Derivation
		rs []Refusal
	)
	for _, f := range current {
		if f.Quantity != QPCO2 {
			continue
		}
		d, r := Derive(Select(f, current, site), site)
		ds = append(ds, d...)
		rs = append(rs, r...)
	}
	slices.SortFunc(ds, func(a, b Derivation) int { return strings.Compare(a.Key, b.Key) })
	slices.SortFunc(rs, func(a, b Refusal) int { return strings.Compare(a.Key, b.Key) })
	return ds, rs
}

// DeriveBloodGas recomputes the derivations of one blood gas (its fact Key)
// from a patient's snapshot, for the service. facts are reduced to their
// current versions first (Current is idempotent). It returns nothing when no
// current PCO2 fact has that key: the caller asked about a fact it does not
// hold.
func DeriveBloodGas(key string, facts []Fact, site Site) ([]Derivation, []Refusal) {
	current := Current(facts)
	for _, f := range current {
		if f.Key == key && f.Quantity == QPCO2 {
			return Derive(Select(f, current, site), site)
		}
	}
	return nil, nil
}

// Derive computes every kind of Catalogue from one selection: a Derivation
// for each kind whose inputs are present, plausible and consistent, and a
// Refusal with a stable reason for each other kind. Every derivation and
// refusal is sealed (Digest set). When the selection itself was refused
// (sel.Reason), every kind is refused with that reason.
//
// A derivation's status is preliminary when any input it used is
// preliminary, final otherwise; the service turns it into amended or
// corrected when it supersedes a published version.
//
// Rules beyond physio's: the interpretation is read on the value as
// published (rounded to the kind's Decimals); the dead-space fractions,
// dead-space volume, alveolar ventilation, the ventilatory ratio and the
// tidal volume for the target refuse a set minute volume
// ("no-minute-volume": a setting is not a measurement of ventilation); the
// for-target kinds aim at the patient's PaCO2 Goal in force, else at
// Site.TargetPaCO2mmHg, and are refused with "target-paco2-not-configured"
// with neither; predicted PaCO2 uses the apparatus dead space recorded for
// the patient's circuit, else the site's; the site's RQ is passed as "not
// given" when it is the default, so that the basis says 0.8 is assumed.
func Derive(sel Selection, site Site) ([]Derivation, []Refusal) {
	if len(sel.Inputs) == 0 || sel.Inputs[0].Role != RoleBloodGas {
		// Not made by Select: refuse rather than guess.
		sel.Inputs = []Input{{Role: RoleBloodGas, Fact: sel.BloodGas}}
		sel.Reason, sel.Detail = ReasonNotBloodGas, "the selection holds no blood gas; build it with Select"
	}
	x := deriver{sel: sel, site: site}
	var (
		ds []Derivation
		rs []Refusal
	)
	for _, k := range Catalogue {
		if sel.Reason != "" {
			rs = append(rs, x.refusal(k.Code, sel.Reason, sel.Detail, sel.Inputs[:1]))
			continue
		}
		d, r, ok := x.derive(k.Code)
		if ok {
			ds = append(ds, d)
		} else {
			rs = append(rs, r)
		}
	}
	return ds, rs
}

// deriver holds one selection while its kinds are derived.
type deriver struct {
	sel  Selection
	site Site
}

// stop is a refusal reason found while gathering inputs.
type stop struct {
	reason, detail string
}

// gather collects the inputs of a kind. It remembers what it found (for
// Refusal.Considered) and the first reason to stop.
type gather struct {
	x     *deriver
	used  []Input
	steps []physio.Result
	stop  *stop
}

func (x *deriver) start() *gather {
	g := &gather{x: x}
	g.used = append(g.used, x.sel.Inputs[0])
	return g
}

// missingReason is the refusal reason of a role with no input.
var missingReason = map[Role]string{
	RolePECO2:        ReasonNoPECO2,
	RoleVCO2:         ReasonNoVCO2,
	RoleMinuteVolume: ReasonNoMinuteVolume,
	RoleTidalVolume:  ReasonNoTidalVolume,
	RoleRespRate:     ReasonNoRespRate,
	RolePETCO2:       ReasonNoETCO2,
	RoleSex:          ReasonNoSex,
	RoleBirthDate:    ReasonNoAge,
	RoleHeight:       ReasonNoHeight,
	RoleWeight:       ReasonNoWeight,
}

// plausible is the published plausible range of each numeric role.
var plausible = map[Role]physio.Range{
	RolePECO2:        physio.PECO2Range,
	RoleVCO2:         physio.VCO2Range,
	RoleMinuteVolume: physio.MinuteVolumeRange,
	RoleTidalVolume:  physio.TidalVolumeRange,
	RoleRespRate:     physio.RespRateRange,
	RolePETCO2:       physio.PETCO2Range,
	RoleBodyTemp:     physio.BodyTempRange,
	RoleHeight:       physio.HeightRange,
	RoleWeight:       physio.WeightRange,
	RoleTarget:       physio.TargetPaCO2Range,
	RoleApparatusVD:  physio.ApparatusDeadSpaceRange,
}

// need returns the input of role r, recording it as used, or records the
// reason to stop. After a stop it only records what else is present.
func (g *gather) need(r Role) (Input, bool) {
	in, ok := g.x.sel.Input(r)
	if !ok {
		if g.stop == nil {
			g.stop = g.x.missing(r)
		}
		return Input{}, false
	}
	g.used = append(g.used, in)
	if g.stop != nil {
		return in, false
	}
	if rg, ok := plausible[r]; ok {
		if err := rg.Check(roleLabel(r), in.Fact.Value); err != nil {
			g.stop = &stop{ReasonImplausible, errorDetail(err) + source(in)}
			return in, false
		}
	}
	return in, true
}

// source names where an input came from for a refusal detail: the
// Observation key of a reading, nothing for a patient-level fact, whose key
// holds the patient reference (details carry no patient identifiers).
func source(in Input) string {
	if strings.HasPrefix(in.Fact.Key, "Patient/") || in.Fact.Patient != "" && strings.HasPrefix(in.Fact.Key, in.Fact.Patient) {
		return ""
	}
	return " (" + in.Fact.Key + ")"
}

// optional returns the input of role r when present and plausible; an
// implausible one stops the derivation (it is not silently dropped).
func (g *gather) optional(r Role) (Input, bool) {
	if _, ok := g.x.sel.Input(r); !ok {
		return Input{}, false
	}
	return g.need(r)
}

// missing explains a role with no input: "no-ventilator-data-in-window"
// when the window holds no ventilator reading at all.
func (x *deriver) missing(r Role) *stop {
	w := x.sel.Window
	span := fmt.Sprintf("%s before to %s after the blood gas", formatDuration(w.Before), formatDuration(w.After))
	rule, _ := ruleForRole(r)
	if rule != nil && rule.ventilator && x.sel.Ventilator == 0 {
		d := "no usable ventilator reading of this patient from " + span
		if x.sel.HasOutside {
			d += "; the nearest is " + describeOffset(x.sel.NearestOutside)
		}
		if x.sel.OtherEncounter > 0 {
			d += fmt.Sprintf("; %d reading(s) of another encounter ignored", x.sel.OtherEncounter)
		}
		if x.sel.NotUsable > 0 {
			d += fmt.Sprintf("; %d reading(s) with an unusable status ignored", x.sel.NotUsable)
		}
		return &stop{ReasonNoVentilatorData, d}
	}
	reason := missingReason[r]
	if rule != nil && rule.patient {
		return &stop{reason, "no " + roleLabel(r) + " of the patient"}
	}
	what := roleLabel(r)
	if rule != nil && len(rule.labels) > 0 {
		what = rule.labels[0]
		if len(rule.labels) > 1 {
			what = roleLabel(r) + " (measured or set)"
		}
	}
	return &stop{reason, "no " + what + " from " + span}
}

func ruleForRole(r Role) (*roleRule, bool) {
	for _, q := range []Quantity{QMinuteVol, QTidalVol, QRespRate, QPETCO2, QVCO2, QPECO2, QBodyTemp, QSex, QBirthDate, QHeight, QWeight} {
		if rule, _ := ruleFor(q); rule.role == r {
			return rule, true
		}
	}
	return nil, false
}

// fail records a physio error as the reason to stop.
func (g *gather) fail(err error) {
	if g.stop != nil {
		return
	}
	reason := ReasonImplausible
	switch {
	case errors.Is(err, physio.ErrBeyondModel):
		reason = ReasonBeyondModel
	case errors.Is(err, physio.ErrOutOfMeaning) || errors.Is(err, physio.ErrNotGiven):
		reason = ReasonInconsistent
	}
	g.stop = &stop{reason, errorDetail(err)}
}

// sex reads the sex input as a physio.Sex.
func (g *gather) sex() physio.Sex {
	in, ok := g.need(RoleSex)
	if !ok {
		return physio.SexUnknown
	}
	switch in.Fact.Text {
	case "male":
		return physio.Male
	case "female":
		return physio.Female
	}
	g.stop = &stop{ReasonNoSex, fmt.Sprintf("sex recorded as %q; the sex-specific equations need male or female", in.Fact.Text)}
	return physio.SexUnknown
}

// pbw computes the predicted body weight as a step.
func (g *gather) pbw() physio.Kg {
	sex := g.sex()
	h, ok := g.need(RoleHeight)
	if !ok || g.stop != nil {
		return 0
	}
	r, err := physio.PredictedBodyWeight(sex, physio.Cm(h.Fact.Value))
	if err != nil {
		g.fail(err)
		return 0
	}
	g.steps = append(g.steps, r)
	return physio.Kg(r.Value)
}

// age returns the age in years at the blood gas from the birth date.
func (g *gather) age() physio.Years {
	in, ok := g.need(RoleBirthDate)
	if !ok {
		return 0
	}
	a, _, err := ageAt(in.Fact.Text, g.x.sel.BloodGas.Effective)
	if err != nil {
		g.stop = &stop{ReasonNoAge, "birth date not readable: " + err.Error()}
		return 0
	}
	if err := physio.AgeRange.Check("age", a); err != nil {
		g.stop = &stop{ReasonImplausible, errorDetail(err) + source(in)}
		return 0
	}
	return physio.Years(a)
}

// bodyTemp returns the measured body temperature, or 0 (37 Cel assumed by physio).
func (g *gather) bodyTemp() physio.Celsius {
	if in, ok := g.optional(RoleBodyTemp); ok {
		return physio.Celsius(in.Fact.Value)
	}
	return 0
}

// paco2AtBodyTemp returns the blood gas's PaCO2 at the measured body
// temperature (physio.TemperatureConvention), recording the correction as a
// step, or the PaCO2 as measured at 37 Cel when no temperature was measured
// (the caller's result then says so: noteUncorrected).
func (g *gather) paco2AtBodyTemp() physio.MmHg {
	paco2 := physio.MmHg(g.x.sel.BloodGas.Value)
	t := g.bodyTemp()
	if t == 0 || g.stop != nil {
		return paco2
	}
	r, err := physio.PaCO2AtBodyTemp(paco2, t)
	if err != nil {
		g.fail(err)
		return paco2
	}
	g.steps = append(g.steps, r)
	return physio.MmHg(r.Value)
}

// noteUncorrected records on res that the PaCO2 was used as measured at 37
// Cel because no body temperature was measured in the window.
func (g *gather) noteUncorrected(res *physio.Result) {
	if _, ok := g.x.sel.Input(RoleBodyTemp); !ok {
		res.NoteUncorrectedPaCO2()
	}
}

// measuredVDVT computes the measured dead-space fraction as a step:
// Bohr-Enghoff from PECO2 when it was measured, else from VCO2 and the
// minute volume.
func (g *gather) measuredVDVT() physio.Fraction {
	if _, ok := g.x.sel.Input(RolePECO2); ok {
		pe, ok := g.need(RolePECO2)
		paco2 := g.paco2AtBodyTemp()
		if !ok || g.stop != nil {
			return 0
		}
		return g.step(physio.DeadSpaceEnghoff(paco2, physio.MmHg(pe.Fact.Value)))
	}
	if _, ok := g.x.sel.Input(RoleVCO2); !ok {
		if g.stop == nil {
			g.stop = g.x.missing(RoleVCO2)
			if g.stop.reason == ReasonNoVCO2 {
				g.stop.detail += "; no mixed-expired PCO2 either"
			}
		}
		return 0
	}
	v, _ := g.need(RoleVCO2)
	ve, _ := g.measuredVE()
	t := g.bodyTemp()
	paco2 := g.paco2AtBodyTemp()
	if g.stop != nil {
		return 0
	}
	return g.step(physio.DeadSpaceFromVCO2(paco2, physio.MLPerMin(v.Fact.Value), physio.LPerMin(ve.Fact.Value), t))
}

// measuredVE returns the minute volume for a kind that needs a measurement
// of ventilation (the dead-space fractions, alveolar ventilation, the
// ventilatory ratio): a set minute volume, which Select takes only when no
// measured one is in the window, stops the kind with "no-minute-volume". A
// measured inspired volume is accepted, its fallback recorded by Select.
func (g *gather) measuredVE() (Input, bool) {
	in, ok := g.need(RoleMinuteVolume)
	if ok && isSetting(in.Fact) {
		w := g.x.sel.Window
		g.stop = &stop{ReasonNoMinuteVolume, fmt.Sprintf("only a set minute volume (%s) from %s before to %s after the blood gas; a setting is not a measurement of ventilation",
			in.Fact.Key, formatDuration(w.Before), formatDuration(w.After))}
		return in, false
	}
	return in, ok
}

// step records an intermediate result and returns its value.
func (g *gather) step(r physio.Result, err error) physio.Fraction {
	if err != nil {
		g.fail(err)
		return 0
	}
	g.steps = append(g.steps, r)
	return physio.Fraction(r.Value)
}

// derive computes one kind.
func (x *deriver) derive(kind string) (Derivation, Refusal, bool) {
	g := x.start()
	paco2 := physio.MmHg(x.sel.BloodGas.Value)
	var (
		res physio.Result
		err error
	)
	switch kind {
	case KindDeadSpaceEnghoff:
		pe, _ := g.need(RolePECO2)
		pT := g.paco2AtBodyTemp()
		if g.stop == nil {
			res, err = physio.DeadSpaceEnghoff(pT, physio.MmHg(pe.Fact.Value))
		}
	case KindDeadSpaceVCO2:
		v, _ := g.need(RoleVCO2)
		ve, _ := g.measuredVE()
		t := g.bodyTemp()
		pT := g.paco2AtBodyTemp()
		if g.stop == nil {
			res, err = physio.DeadSpaceFromVCO2(pT, physio.MLPerMin(v.Fact.Value), physio.LPerMin(ve.Fact.Value), t)
		}
	case KindDeadSpaceEstimated:
		ve, _ := g.measuredVE()
		sex := g.sex()
		age := g.age()
		h, _ := g.need(RoleHeight)
		w, _ := g.need(RoleWeight)
		if g.stop == nil {
			res, err = physio.DeadSpaceEstimated(paco2, physio.LPerMin(ve.Fact.Value), physio.EnergyInput{
				Sex: sex, Age: age, Weight: physio.Kg(w.Fact.Value), Height: physio.Cm(h.Fact.Value),
				Equation: x.site.Energy, RQ: x.rq(),
			})
			if err == nil && x.hasMeasuredFraction() {
				res.MarkMeasuredFractionExists()
			}
		}
	case KindDeadSpaceVolume:
		vdvt := g.measuredVDVT()
		vt, _ := g.need(RoleTidalVolume)
		if g.stop == nil {
			res, err = physio.DeadSpaceVolume(vdvt, physio.ML(vt.Fact.Value))
		}
	case KindAlveolarVentilation:
		vdvt := g.measuredVDVT()
		ve, _ := g.measuredVE()
		if g.stop == nil {
			res, err = physio.AlveolarVentilationFromDeadSpace(physio.LPerMin(ve.Fact.Value), vdvt)
		}
	case KindPredictedPaCO2, KindPaCO2Discrepancy:
		pred := x.predicted(g)
		if g.stop == nil && kind == KindPredictedPaCO2 {
			res = pred
		} else if g.stop == nil {
			g.steps = append(g.steps, pred)
			res, err = physio.PaCO2Discrepancy(paco2, physio.MmHg(pred.Value), physio.VCO2Measured)
		}
	case KindVentilatoryRatio:
		ve, _ := g.measuredVE()
		pbw := g.pbw()
		pT := g.paco2AtBodyTemp()
		if g.stop == nil {
			res, err = physio.VentilatoryRatio(physio.LPerMin(ve.Fact.Value), pT, pbw)
		}
	case KindPaCO2PETCO2Gradient:
		et, _ := g.need(RolePETCO2)
		pT := g.paco2AtBodyTemp()
		if g.stop == nil {
			res, err = physio.EndTidalGradient(pT, physio.MmHg(et.Fact.Value))
		}
	case KindAlveolarDeadSpace:
		et, _ := g.need(RolePETCO2)
		pT := g.paco2AtBodyTemp()
		if g.stop == nil {
			res, err = physio.AlveolarDeadSpaceFraction(pT, physio.MmHg(et.Fact.Value))
		}
	case KindRateForTarget:
		rr, _ := g.need(RoleRespRate)
		vt, _ := g.need(RoleTidalVolume)
		pbw := g.pbw()
		target := x.target(g)
		if g.stop == nil {
			res, err = physio.RateForTarget(physio.PerMin(rr.Fact.Value), paco2, target, physio.ML(vt.Fact.Value), pbw)
			x.cautionChronicHypercapnia(g, &res, paco2, err)
			x.flagWithinGoalRange(&res, paco2, err)
		}
	case KindTidalVolumeForTarget:
		vdvt := g.measuredVDVT()
		vt, _ := g.need(RoleTidalVolume)
		pbw := g.pbw()
		target := x.target(g)
		if g.stop == nil {
			var vd physio.Result
			vd, err = physio.DeadSpaceVolume(vdvt, physio.ML(vt.Fact.Value))
			if err == nil {
				g.steps = append(g.steps, vd)
				res, err = physio.TidalVolumeForTarget(physio.ML(vt.Fact.Value), physio.ML(vd.Value), paco2, target, pbw)
				x.cautionChronicHypercapnia(g, &res, paco2, err)
				x.flagWithinGoalRange(&res, paco2, err)
			}
		}
	default:
		// Kinds come from Catalogue; another is a programming error.
		panic("fhirmap: derive: unknown kind " + kind)
	}
	if err != nil {
		g.fail(err)
	}
	if g.stop != nil {
		return Derivation{}, x.refusal(kind, g.stop.reason, g.stop.detail, g.used), false
	}
	if temperatureDependent[kind] {
		g.noteUncorrected(&res)
	}
	return x.derivation(kind, res, g), Refusal{}, true
}

// temperatureDependent lists the kinds that combine the measured PaCO2 with
// a gas-phase quantity and so follow physio.TemperatureConvention: without
// a measured body temperature their basis says the PaCO2 was used
// uncorrected. The estimated dead-space fraction follows its published
// method (K 0.86, PaCO2 as reported); predicted PaCO2 uses no measured
// PaCO2 (its K(T) step records the temperature assumed) and measured minus
// predicted compares both at 37 Cel; the two for-target values use the
// ratio PaCO2 / target, which the correction does not change (both read at
// 37 Cel), and the tidal volume for target takes its dead space from a
// corrected fraction.
var temperatureDependent = map[string]bool{
	KindDeadSpaceEnghoff: true, KindDeadSpaceVCO2: true, KindDeadSpaceVolume: true, KindAlveolarVentilation: true,
	KindVentilatoryRatio: true, KindPaCO2PETCO2Gradient: true, KindAlveolarDeadSpace: true, KindTidalVolumeForTarget: true,
}

// hasMeasuredFraction reports whether a measured dead-space fraction
// (Bohr-Enghoff from PECO2, or from measured VCO2) is derived for the same
// blood gas. The estimated fraction is then still published, so that
// its trend does not break when measurement starts or stops, but flagged
// and told that the measured value is the one to read: two fractions of one
// blood gas that disagree must not leave the reader to pick.
func (x *deriver) hasMeasuredFraction() bool {
	for _, k := range []string{KindDeadSpaceEnghoff, KindDeadSpaceVCO2} {
		if _, _, ok := x.derive(k); ok {
			return true
		}
	}
	return false
}

// cautionChronicHypercapnia reads the bicarbonate and base excess of the
// blood gas's own sample and, when they show metabolic compensation of a
// raised PaCO2 (physio.ChronicHypercapnia), cautions a value for a target
// that a normal target may be harmful. The values read become inputs of the
// derivation (basis, derivedFrom, Provenance) whether or not they caution.
func (x *deriver) cautionChronicHypercapnia(g *gather, res *physio.Result, paco2 physio.MmHg, err error) {
	if err != nil {
		return
	}
	hco3, haveHCO3 := x.sel.Input(RoleBicarbonate)
	be, haveBE := x.sel.Input(RoleBaseExcess)
	if haveHCO3 {
		g.used = append(g.used, hco3)
	}
	if haveBE {
		g.used = append(g.used, be)
	}
	if physio.ChronicHypercapnia(paco2, physio.MmolPerL(hco3.Fact.Value), haveHCO3, physio.MmolPerL(be.Fact.Value), haveBE) {
		res.CautionChronicHypercapnia()
	}
}

// target returns the target PaCO2 of a for-target kind: the patient's own
// goal when a PaCO2 Goal is in force for the blood gas (it is then an input,
// checked against physio.TargetPaCO2Range: an implausible goal refuses the
// value, it never falls back to the site's target), else the site's target
// (Site.TargetPaCO2mmHg). With neither, the kind stops with
// "target-paco2-not-configured": none is assumed.
func (x *deriver) target(g *gather) physio.MmHg {
	if _, ok := x.sel.Input(RoleTarget); ok {
		in, ok := g.need(RoleTarget)
		if !ok {
			return 0
		}
		return physio.MmHg(in.Fact.Value)
	}
	if g.stop == nil && x.site.TargetPaCO2mmHg == 0 {
		g.stop = &stop{ReasonTargetNotSet, "the site has not configured a target PaCO2 and no PaCO2 Goal of the patient is in force; none is assumed (a usual adult target does not fit chronic hypercapnia or a permissive-hypercapnia strategy)"}
	}
	return physio.MmHg(x.site.TargetPaCO2mmHg)
}

// flagWithinGoalRange flags a value for a target that aims at the midpoint
// of the patient's goal range while the measured PaCO2 already lies within
// the range: the goal is met, so the value is not a needed change.
func (x *deriver) flagWithinGoalRange(res *physio.Result, paco2 physio.MmHg, err error) {
	in, ok := x.sel.Input(RoleTarget)
	if err != nil || !ok {
		return
	}
	if lo, hi, ok := GoalRange(in.Fact); ok && float64(paco2) >= lo && float64(paco2) <= hi {
		res.FlagWithinGoalRange()
	}
}

// GoalRange returns the bounds in mm[Hg] of a target fact that came from a
// goal range (Fact.Text "<low>..<high>"); ok is false for a single target
// value.
func GoalRange(f Fact) (lo, hi float64, ok bool) {
	if f.Quantity != QTargetPaCO2 {
		return 0, 0, false
	}
	a, b, found := strings.Cut(f.Text, "..")
	if !found {
		return 0, 0, false
	}
	lo, err1 := strconv.ParseFloat(a, 64)
	hi, err2 := strconv.ParseFloat(b, 64)
	return lo, hi, err1 == nil && err2 == nil
}

// rq is the respiratory quotient passed to physio: 0 when the site keeps the
// default, so that the basis says 0.8 is assumed, not measured; the site's
// value otherwise, recorded as configured.
func (x *deriver) rq() float64 {
	if x.site.RQ == DefaultRQ {
		return 0
	}
	return x.site.RQ
}

// predicted computes the predicted PaCO2 (with its PBW step) or records why not.
func (x *deriver) predicted(g *gather) physio.Result {
	v, _ := g.need(RoleVCO2)
	vt, _ := g.need(RoleTidalVolume)
	rr, _ := g.need(RoleRespRate)
	pbw := g.pbw()
	t := g.bodyTemp()
	app, fromPatient := x.apparatus(g)
	model, airwayFromPatient := x.airway(g)
	if g.stop != nil {
		return physio.Result{}
	}
	r, err := physio.PredictedPaCO2(physio.PredictedInput{
		VCO2: physio.MLPerMin(v.Fact.Value), VT: physio.ML(vt.Fact.Value), RR: physio.PerMin(rr.Fact.Value),
		PBW: pbw, Anatomic: model, AnatomicFromPatient: airwayFromPatient,
		ApparatusVD: app, ApparatusVDKnown: true, ApparatusVDFromPatient: fromPatient, BodyTemp: t,
	})
	if err != nil {
		g.fail(err)
		return physio.Result{}
	}
	return r
}

// apparatus returns the apparatus dead space of a predicted PaCO2: the one
// recorded for the patient's circuit when Select found one (an input,
// checked against physio.ApparatusDeadSpaceRange: an implausible one refuses
// the value, it never falls back to the site's setting), else the site's
// setting. With neither, it stops with "apparatus-dead-space-not-configured":
// it is never assumed to be zero.
func (x *deriver) apparatus(g *gather) (physio.ML, bool) {
	if _, ok := x.sel.Input(RoleApparatusVD); ok {
		in, ok := g.need(RoleApparatusVD)
		if !ok {
			return 0, true
		}
		return physio.ML(in.Fact.Value), true
	}
	if g.stop == nil && !x.site.ApparatusDeadSpaceConfigured {
		g.stop = &stop{ReasonApparatusNotSet, "the site has not configured its apparatus dead space (HME, closed suction, extensions) and none is recorded for the patient's circuit; it is never assumed to be zero"}
	}
	return physio.ML(x.site.ApparatusDeadSpaceML), false
}

// airway returns the anatomic dead space model of a predicted PaCO2: the
// patient's airway as recorded when Select found one (an input of the
// value), else the site's setting (Site.AnatomicDeadSpace). An airway fact
// whose text is not a model name (it cannot come from Decode) stops with
// "inconsistent-inputs" rather than falling back to the site's setting.
func (x *deriver) airway(g *gather) (physio.AnatomicModel, bool) {
	if _, ok := x.sel.Input(RoleAirway); !ok {
		return x.site.AnatomicDeadSpace, false
	}
	in, ok := g.need(RoleAirway)
	if !ok {
		return x.site.AnatomicDeadSpace, true
	}
	m, ok := physio.ParseAnatomicModel(in.Fact.Text)
	if !ok && g.stop == nil {
		g.stop = &stop{ReasonInconsistent, fmt.Sprintf("airway recorded as %q; artificial-airway or whole-airway is needed", in.Fact.Text)}
	}
	return m, true
}

// publishedInterpretation reads the value of a kind as it is published,
// rounded to the kind's Decimals (FormatValue), with physio's reading of
// that quantity, so that the interpretation never contradicts the number
// shown (9.004 is published 9.0 and read "at or below 9"). ok is false for
// kinds without a reading.
func publishedInterpretation(kind string, v float64, flags []string) (physio.Interpretation, bool) {
	p, err := strconv.ParseFloat(FormatValue(kind, v), 64)
	if err != nil {
		return physio.Interpretation{}, false
	}
	switch kind {
	case KindDeadSpaceEnghoff, KindDeadSpaceVCO2:
		return physio.InterpretDeadSpaceFraction(p), true
	case KindDeadSpaceEstimated:
		// The flag says whether a measured fraction of the same blood gas
		// exists (MarkMeasuredFractionExists); the reading must agree.
		return physio.InterpretEstimatedDeadSpaceFraction(p, slices.Contains(flags, physio.FlagMeasuredFractionExists)), true
	case KindPaCO2PETCO2Gradient:
		return physio.InterpretEndTidalGradient(physio.MmHg(p)), true
	case KindAlveolarDeadSpace:
		return physio.InterpretAlveolarDeadSpaceFraction(p), true
	case KindVentilatoryRatio:
		return physio.InterpretVentilatoryRatio(p), true
	case KindPaCO2Discrepancy:
		// predicted (and so the discrepancy) needs a measured VCO2 input.
		return physio.InterpretPaCO2Discrepancy(physio.MmHg(p), physio.VCO2Measured), true
	}
	return physio.Interpretation{}, false
}

// MaxInputSpan is the longest time between the blood gas and the ventilator
// readings of one value (any two of them) before the value is flagged
// physio.FlagInputsApart. Why 15 min: PaO2 settles within about 10 min of
// a ventilator change (Cakar et al., Intensive Care Med 2001;27:655-9
// [published]), while PaCO2 settles more slowly because the body's CO2
// stores are large [common practice]; readings further apart than that
// may straddle a change, and the default pairing window (30 min before to
// 10 min after) allows up to 40 min between two inputs. The limit flags;
// it does not refuse, since a steady patient's readings stay valid longer.
const MaxInputSpan = 15 * time.Minute

// inputSpan returns the time between the earliest and the latest of the
// blood gas and the window inputs (patient-level and same-sample inputs do
// not count: they are not readings of the moment).
func inputSpan(used []Input) time.Duration {
	var lo, hi time.Duration
	for _, in := range used {
		switch in.Role {
		case RoleSex, RoleBirthDate, RoleHeight, RoleWeight, RoleBicarbonate, RoleBaseExcess, RoleTarget, RoleApparatusVD, RoleAirway, RoleBodyTemp:
			// Body temperature has its own, wider window: it changes
			// slowly and is charted hourly or less often.
			continue
		}
		lo, hi = min(lo, in.Offset), max(hi, in.Offset)
	}
	return hi - lo
}

// derivation builds and seals the Derivation of a computed result. The
// interpretation is read again on the published (rounded) value.
func (x *deriver) derivation(kind string, res physio.Result, g *gather) Derivation {
	if inputSpan(g.used) > MaxInputSpan {
		res.FlagInputsApart()
	}
	if in, ok := publishedInterpretation(kind, res.Value, res.Flags()); ok {
		res.Interpretation = in
	}
	bg := x.sel.BloodGas
	status := StatusFinal
	for _, in := range g.used {
		if in.Fact.Status == StatusPreliminary {
			status = StatusPreliminary
		}
	}
	key := DerivationKey(bg.Patient, bg.Key, kind)
	d := Derivation{
		Key:       key,
		ID:        DerivationID(key),
		Kind:      kind,
		Patient:   bg.Patient,
		Encounter: bg.Encounter,
		Effective: bg.Effective,
		BloodGas:  bg.Key,
		Result:    res,
		Inputs:    sortedInputs(g.used),
		Status:    status,
		Algorithm: Algorithm,
		Steps:     g.steps,
	}
	d.Seal()
	return d
}

// refusal builds and seals a Refusal.
func (x *deriver) refusal(kind, reason, detail string, considered []Input) Refusal {
	bg := x.sel.BloodGas
	r := Refusal{
		Key:        DerivationKey(bg.Patient, bg.Key, kind),
		Kind:       kind,
		Patient:    bg.Patient,
		BloodGas:   bg.Key,
		Effective:  bg.Effective,
		Reason:     reason,
		Detail:     detail,
		Considered: sortedInputs(considered),
	}
	r.Seal()
	return r
}

// sortedInputs returns the inputs in role order, each role once.
func sortedInputs(in []Input) []Input {
	out := make([]Input, 0, len(in))
	for _, r := range roleOrderArray {
		for _, i := range in {
			if i.Role == r {
				out = append(out, i)
				break
			}
		}
	}
	return out
}

// ageAt returns the age in completed years at time at of a FHIR date
// (YYYY, YYYY-MM or YYYY-MM-DD). A partial date is taken at its middle
// (1 July, or the 15th), which note says; the age may then be off by one
// year.
func ageAt(date string, at time.Time) (years float64, note string, err error) {
	var b time.Time
	switch len(date) {
	case len("2006-01-02"):
		b, err = time.Parse("2006-01-02", date)
	case len("2006-01"):
		b, err = time.Parse("2006-01", date)
		b = b.AddDate(0, 0, 14)
		note = "birth date given to the month: the 15th assumed"
	case len("2006"):
		b, err = time.Parse("2006", date)
		b = b.AddDate(0, 6, 0)
		note = "birth date given to the year: 1 July assumed"
	default:
		return 0, "", fmt.Errorf("date %q: not YYYY, YYYY-MM or YYYY-MM-DD", date)
	}
	if err != nil {
		return 0, "", fmt.Errorf("date %q: %w", date, err)
	}
	at = at.UTC()
	if at.Before(b) {
		return 0, "", fmt.Errorf("date %q: after the blood gas", date)
	}
	y := at.Year() - b.Year()
	if at.Month() < b.Month() || at.Month() == b.Month() && at.Day() < b.Day() {
		y--
	}
	return float64(y), note, nil
}
