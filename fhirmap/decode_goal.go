package fhirmap

import (
	"bytes"
	"encoding/json"
	"math"
	"reflect"
	"strconv"
	"strings"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// goalJSON is a FHIR R4 Goal with its required elements as pointers, so
// that absence can be told from a zero value (the library would read a
// missing lifecycleStatus as "proposed").
type goalJSON struct {
	fhir.OtherGoal
	ResourceType    string                    `json:"resourceType"`
	Contained       []json.RawMessage         `json:"contained,omitempty"`
	LifecycleStatus *fhir.GoalLifecycleStatus `json:"lifecycleStatus,omitempty"`
	Description     *fhir.CodeableConcept     `json:"description,omitempty"`
	Subject         *fhir.Reference           `json:"subject,omitempty"`
}

var goalSchema = schemaOf(reflect.TypeFor[goalJSON]())

// goalStatus maps a Goal's lifecycleStatus onto the status rules of facts:
// active and accepted goals are in force (final, usable); proposed, planned
// and on-hold goals are not in force yet or for now (registered: kept, not
// used); cancelled, completed and rejected goals withdraw an earlier version
// (cancelled: the site target applies again), and entered-in-error withdraws
// it as an error. A completed goal is withdrawn because it no longer steers
// care: FHIR R4 defines it as "the goal is no longer being sought".
func goalStatus(s fhir.GoalLifecycleStatus) Status {
	switch s {
	case fhir.GoalLifecycleStatusActive, fhir.GoalLifecycleStatusAccepted:
		return StatusFinal
	case fhir.GoalLifecycleStatusCancelled, fhir.GoalLifecycleStatusCompleted, fhir.GoalLifecycleStatusRejected:
		return StatusCancelled
	case fhir.GoalLifecycleStatusEnteredInError:
		return StatusEnteredInError
	}
	return StatusRegistered // proposed, planned, on-hold
}

// decodeGoal strictly decodes a Goal.
func decodeGoal(raw []byte, entry int, root string) (*goalJSON, *DecodeError) {
	var g goalJSON
	if err := strictUnmarshal(raw, goalSchema, root, entry, &g); err != nil {
		return nil, err
	}
	if len(g.ModifierExtension) > 0 {
		return nil, refuse(entry, root+".modifierExtension", "unsupported-extension", "modifier extensions are not supported")
	}
	for i := range g.Target {
		if len(g.Target[i].ModifierExtension) > 0 {
			return nil, refuse(entry, root+".target["+strconv.Itoa(i)+"].modifierExtension", "unsupported-extension", "modifier extensions are not supported")
		}
	}
	return &g, nil
}

// isPaCO2Measure reports whether a Goal target's measure is arterial PCO2
// measured at 37 Cel: LOINC 2019-8 or a site code that means the same
// (an alias mapping to 2019-8). Other PCO2 measures (venous, unspecified
// blood, temperature-adjusted) are not a PaCO2 target of these formulas.
func (d *decoder) isPaCO2Measure(cc *fhir.CodeableConcept) (Coding, bool) {
	info, coding, found, conflict := d.match(cc)
	if !found || conflict || info.Panel {
		return Coding{}, false
	}
	return coding, info.Quantity == QPCO2 && info.Specimen == SpecimenArterial && !info.TempCorrected
}

// goalFacts turns a Goal into one fact, QTargetPaCO2: the patient's own
// target PaCO2. A Goal without a PaCO2 target gives a fact that is never
// used (status registered, or its withdrawing status), so that a later
// version that dropped the PaCO2 target replaces one that had it; two PaCO2
// targets in one Goal are refused (duplicate-value). The target must be a detailQuantity or a detailRange
// with both bounds, in a pressure unit; a quantity with a comparator or a
// one-sided or inverted range names no target value and is refused
// (ambiguous-value), so that a patient's goal is never silently replaced by
// the site's target. A withdrawing status (cancelled, completed, rejected,
// entered-in-error) always yields a fact, with the value 0 when it is
// absent or unusable, as for Observations.
func (d *decoder) goalFacts(g *goalJSON, raw []byte, entry int, root, fullURL string, r *resolver) *DecodeError {
	ref := ""
	if id := deref(g.Id); id != "" {
		if !validID(id) {
			return refuse(entry, root+".id", "bad-reference", "not a valid FHIR id")
		}
		ref = "Goal/" + id
	} else if fullURL != "" {
		var why string
		if ref, why = resourceIdentity("Goal", fullURL); why != "" {
			return refuse(entry, strings.TrimSuffix(root, ".resource")+".fullUrl", "bad-reference", why)
		}
	}
	if ref == "" {
		return refuse(entry, root+".id", "missing-field", "a Goal needs an id (or, in a Bundle, a fullUrl)")
	}
	if g.LifecycleStatus == nil {
		return refuse(entry, root+".lifecycleStatus", "missing-field", "a Goal needs a lifecycleStatus")
	}
	if g.Description == nil {
		return refuse(entry, root+".description", "missing-field", "a Goal needs a description")
	}
	if g.Subject == nil {
		return refuse(entry, root+".subject", "missing-field", "a Goal needs a subject")
	}
	patient, why := r.patient(deref(g.Subject.Reference))
	if why != "" {
		return refuse(entry, root+".subject.reference", "bad-reference", why)
	}
	f := Fact{Key: ref, Resource: ref, Patient: patient, Digest: digest(raw), Status: goalStatus(*g.LifecycleStatus),
		Quantity: QTargetPaCO2, Unit: QTargetPaCO2.Unit()}
	if g.Meta != nil {
		f.VersionID = deref(g.Meta.VersionId)
		if lu := deref(g.Meta.LastUpdated); lu != "" {
			t, err := parseZonedTime(lu)
			if err != nil {
				return refuse(entry, root+".meta.lastUpdated", "bad-time", err.(*timeError).detail)
			}
			f.LastUpdated = t
		}
	}
	if sd := deref(g.StartDate); sd != "" {
		t, err := parseDate(sd)
		if err != nil {
			return refuse(entry, root+".startDate", "bad-time", err.(*timeError).detail)
		}
		// A date has no zone: the goal holds from its start in UTC. Before
		// it, the site's target applies (see Select).
		f.Effective = t.UTC()
	}
	if sd := deref(g.StatusDate); sd != "" {
		if _, err := parseDate(sd); err != nil {
			return refuse(entry, root+".statusDate", "bad-time", err.(*timeError).detail)
		}
	}

	target := -1
	for i := range g.Target {
		troot := root + ".target[" + strconv.Itoa(i) + "]"
		if dd := deref(g.Target[i].DueDate); dd != "" {
			if _, err := parseDate(dd); err != nil {
				return refuse(entry, troot+".dueDate", "bad-time", err.(*timeError).detail)
			}
		}
		coding, ok := d.isPaCO2Measure(g.Target[i].Measure)
		if !ok {
			continue
		}
		if target >= 0 {
			return refuse(entry, troot+".measure", "duplicate-value", "two PaCO2 targets in one Goal")
		}
		target, f.Code = i, coding
	}
	if target < 0 {
		// Not a PaCO2 goal, or no longer one: a version without a PaCO2
		// target must still replace an earlier version that had one, and the
		// decoder cannot know whether there was one. So the Goal becomes a
		// fact that is never used (registered, or withdrawn when its status
		// withdraws), which Current lets win over the earlier version.
		if !f.Status.Retracts() {
			f.Status = StatusRegistered
		}
		f.Code = Coding{Code: GoalNoPaCO2Target, Display: "no PaCO2 target"}
		f.Detail = "no PaCO2 target in this version"
	} else if err := d.goalTarget(&f, &g.Target[target], entry, root+".target["+strconv.Itoa(target)+"]"); err != nil {
		return err
	}
	d.out.Facts = append(d.out.Facts, f)
	d.out.Resources = append(d.out.Resources, Resource{Type: "Goal", Reference: ref, VersionID: f.VersionID,
		Patient: patient, Digest: f.Digest, Raw: bytes.Clone(raw)})
	return nil
}

// goalTarget reads the target value of a PaCO2 goal into f: Value in
// mm[Hg] (a range's midpoint, see Fact.Text for its bounds), SourceValue
// and SourceUnit as sent.
func (d *decoder) goalTarget(f *Fact, t *fhir.GoalTarget, entry int, root string) *DecodeError {
	retract := f.Status.Retracts()
	fail := func(de *DecodeError) *DecodeError {
		if retract {
			f.Value, f.SourceValue, f.Text, f.Detail = 0, 0, "", ""
			return nil // a withdrawal is kept even when its value is unusable
		}
		return de
	}
	switch {
	case t.DetailQuantity != nil:
		q := t.DetailQuantity
		if q.Comparator != nil {
			return fail(refuse(entry, root+".detailQuantity.comparator", "ambiguous-value",
				"a bound (comparator) names no target value; send the target as a value or as a range with both bounds"))
		}
		v, src, unit, de := goalQuantity(q, entry, root+".detailQuantity")
		if de != nil {
			return fail(de)
		}
		f.Value, f.SourceValue, f.SourceUnit, f.Detail = v, src, unit, "goal value"
		return nil
	case t.DetailRange != nil:
		rg := t.DetailRange
		if rg.Low == nil || rg.High == nil {
			return fail(refuse(entry, root+".detailRange", "ambiguous-value",
				"a one-sided range names no target value; send both low and high"))
		}
		lo, loSrc, loUnit, de := goalQuantity(rg.Low, entry, root+".detailRange.low")
		if de != nil {
			return fail(de)
		}
		hi, hiSrc, hiUnit, de := goalQuantity(rg.High, entry, root+".detailRange.high")
		if de != nil {
			return fail(de)
		}
		if lo > hi {
			return fail(refuse(entry, root+".detailRange", "ambiguous-value", "the range's low bound is above its high bound"))
		}
		f.Value = (lo + hi) / 2
		f.Text = strconv.FormatFloat(lo, 'g', -1, 64) + ".." + strconv.FormatFloat(hi, 'g', -1, 64)
		f.Detail = "midpoint of the goal range " + goalRangeText(lo, hi)
		if loUnit == hiUnit {
			f.SourceValue, f.SourceUnit = (loSrc+hiSrc)/2, loUnit
		} else {
			f.SourceValue, f.SourceUnit = f.Value, f.Unit
		}
		return nil
	case t.DetailString != nil || t.DetailBoolean != nil || t.DetailInteger != nil || t.DetailRatio != nil || t.DetailCodeableConcept != nil:
		return fail(refuse(entry, root+".detail[x]", "missing-field", "a PaCO2 target needs detailQuantity or detailRange; another detail type was given"))
	}
	return fail(refuse(entry, root+".detail[x]", "missing-field", "a PaCO2 target needs detailQuantity or detailRange"))
}

// goalQuantity normalises one pressure of a goal to mm[Hg] with the unit
// rules of Observations (UCUM code when the system is UCUM, else unit).
func goalQuantity(q *fhir.Quantity, entry int, root string) (v, src float64, unit string, de *DecodeError) {
	if q.Value == nil {
		return 0, 0, "", refuse(entry, root+".value", "missing-field", "the quantity has no value")
	}
	unit, unitField := deref(q.Unit), ".unit"
	if deref(q.System) == UCUMSystem && deref(q.Code) != "" {
		unit, unitField = *q.Code, ".code"
	}
	src, err := strconv.ParseFloat(string(*q.Value), 64)
	if err != nil {
		return 0, 0, "", refuse(entry, root+".value", "not-finite", "the value is out of range")
	}
	v, nerr := normalise(QTargetPaCO2, src, unit)
	if nerr != nil {
		ue := nerr.(*unitError)
		field := ".value"
		if ue.reason == "unknown-unit" {
			field = unitField
		}
		return 0, 0, "", refuse(entry, root+field, ue.reason, ue.detail)
	}
	return v, src, unit, nil
}

// goalRangeText shows a goal range for people, in mmHg to 0.1 (the
// precision a blood-gas analyser reports): "45-55 mmHg", "48.8-60 mmHg".
func goalRangeText(lo, hi float64) string {
	r := func(v float64) string { return strconv.FormatFloat(math.Round(v*10)/10, 'f', -1, 64) }
	return r(lo) + "-" + r(hi) + " mmHg"
}
