package fhirmap

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"html"
	"math"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"
	"github.com/ventderive/ventderive/physio"
)

// Code systems of FHIR R4 and HL7 terminology used in the output.
const (
	systemObsCategory      = "http://terminology.hl7.org/CodeSystem/observation-category"
	systemInterpretation   = "http://terminology.hl7.org/CodeSystem/v3-ObservationInterpretation"
	systemObservationValue = "http://terminology.hl7.org/CodeSystem/v3-ObservationValue"
	systemParticipantType  = "http://terminology.hl7.org/CodeSystem/provenance-participant-type"
	systemDataOperation    = "http://terminology.hl7.org/CodeSystem/v3-DataOperation"
)

// ReasonBasisWithdrawn is the retraction reason the service records when a
// value it published can no longer be derived at all (an input it rested on
// was withdrawn and nothing replaces it).
const ReasonBasisWithdrawn = "basis-withdrawn"

// ErrEncode is wrapped by every Encode* error: the derivation or refusal
// cannot be written as valid FHIR (unknown kind, missing identity, a value
// that is not finite, a version below 1).
var ErrEncode = errors.New("cannot encode")

// EncodeObservation writes one derivation as a FHIR R4 Observation (compact
// JSON, resourceType first):
//   - id d.ID, meta.versionId version (1 for the first), meta.tag the
//     service's "advisory" tag, meta.security the HL7 DEVAST label
//     (v3-ObservationValue, "device asserted");
//   - status d.Status; category observation-category "procedure" plus the
//     service's "derived-physiology"; code in Site.CodeSystemURL;
//   - subject, encounter and effectiveDateTime of the blood gas;
//   - valueQuantity with the UCUM system and code, rounded to the kind's
//     Decimals; interpretation when the kind has a reading (read on the
//     rounded value by Derive): the HL7 v3 code only where a published
//     threshold gives one, the text with its source always; method the
//     published method name and versions;
//     device Site.Device; derivedFrom every input Observation;
//   - a note with the advisory statement, the formula with the numbers, the
//     constants, the assumptions and fallbacks, each input with its time
//     offset, and the flags; a short generated narrative.
//
// A retraction (d.Status entered-in-error) keeps the id, carries no value
// and no interpretation, and a note names the withdrawn value and the
// reason (d.Retracted). It returns an error wrapping ErrEncode for an
// unknown kind, an empty ID, patient or effective time, a version below 1
// or a value that is not finite.
func EncodeObservation(d Derivation, version int, site Site) ([]byte, error) {
	obs, err := observation(d, version, site)
	if err != nil {
		return nil, err
	}
	return marshal(obs)
}

func observation(d Derivation, version int, site Site) (fhir.Observation, error) {
	k, ok := LookupKind(d.Kind)
	switch {
	case !ok:
		return fhir.Observation{}, fmt.Errorf("observation kind %q: %w: not in the catalogue", d.Kind, ErrEncode)
	case !validID(d.ID):
		return fhir.Observation{}, fmt.Errorf("observation id %q: %w: not a FHIR id", d.ID, ErrEncode)
	case version < 1:
		return fhir.Observation{}, fmt.Errorf("observation version %d: %w: versions start at 1", version, ErrEncode)
	case d.Patient == "":
		return fhir.Observation{}, fmt.Errorf("observation subject: %w: no patient", ErrEncode)
	case d.Effective.IsZero():
		return fhir.Observation{}, fmt.Errorf("observation effective: %w: no blood-gas time", ErrEncode)
	}
	status, err := observationStatus(d.Status)
	if err != nil {
		return fhir.Observation{}, err
	}
	retracted := d.Status == StatusEnteredInError
	if !retracted && (math.IsNaN(d.Result.Value) || math.IsInf(d.Result.Value, 0)) {
		return fhir.Observation{}, fmt.Errorf("observation value: %w: not finite", ErrEncode)
	}
	if d.Result.Unit != "" && d.Result.Unit != k.Unit {
		return fhir.Observation{}, fmt.Errorf("observation unit %q: %w: kind %s is in %q", d.Result.Unit, ErrEncode, k.Code, k.Unit)
	}

	obs := fhir.Observation{
		Id: ptr(d.ID),
		Meta: &fhir.Meta{
			VersionId: ptr(strconv.Itoa(version)),
			Tag:       []fhir.Coding{{System: ptr(site.CodeSystemURL), Code: ptr(codeAdvisoryTag), Display: ptr(advisoryTagDisplay)}},
			Security:  []fhir.Coding{{System: ptr(systemObservationValue), Code: ptr("DEVAST"), Display: ptr("device asserted")}},
		},
		Status: status,
		Category: []fhir.CodeableConcept{
			{Coding: []fhir.Coding{{System: ptr(systemObsCategory), Code: ptr("procedure"), Display: ptr("Procedure")}}},
			{Coding: []fhir.Coding{{System: ptr(site.CodeSystemURL), Code: ptr(codeDerivedCategory), Display: ptr(derivedCategoryDisplay)}}},
		},
		Code: fhir.CodeableConcept{
			Coding: []fhir.Coding{{System: ptr(site.CodeSystemURL), Code: ptr(k.Code), Display: ptr(k.Display)}},
			Text:   ptr(k.Display),
		},
		Subject:           &fhir.Reference{Reference: ptr(d.Patient)},
		EffectiveDateTime: ptr(fhirTime(d.Effective)),
		Device:            &fhir.Reference{Reference: ptr(site.Device), Display: ptr(site.DeviceDisplay)},
	}
	if d.Encounter != "" {
		obs.Encounter = &fhir.Reference{Reference: ptr(d.Encounter)}
	}
	if d.Result.Method != "" {
		text := d.Result.Method
		if d.Result.MethodVersion != "" {
			text += ", method version " + d.Result.MethodVersion
		}
		obs.Method = &fhir.CodeableConcept{Text: ptr(text + "; " + d.Algorithm)}
	}
	if !retracted {
		v := json.Number(FormatValue(k.Code, d.Result.Value))
		obs.ValueQuantity = &fhir.Quantity{Value: &v, Unit: ptr(k.Unit), System: ptr(UCUMSystem), Code: ptr(k.Unit)}
		if in := d.Result.Interpretation; in.Code != "" || in.Text != "" {
			cc := fhir.CodeableConcept{Text: ptr(interpretationText(in))}
			if in.Code != "" {
				cc.Coding = []fhir.Coding{{System: ptr(systemInterpretation), Code: ptr(in.Code), Display: interpretationDisplay(in.Code)}}
			}
			obs.Interpretation = []fhir.CodeableConcept{cc}
		}
	}
	seen := map[string]bool{}
	for _, in := range d.Inputs {
		r := in.Fact.Resource
		if !isObservationRef(r) || seen[r] {
			continue // derivedFrom may not point at a Patient; Provenance lists it
		}
		seen[r] = true
		obs.DerivedFrom = append(obs.DerivedFrom, fhir.Reference{Reference: ptr(r)})
	}
	notes := basisNotes(d, k, version)
	for _, n := range notes {
		obs.Note = append(obs.Note, fhir.Annotation{Text: n})
	}
	obs.Text = &fhir.Narrative{Status: fhir.NarrativeStatusGenerated, Div: narrative(d, k, obs.ValueQuantity)}
	return obs, nil
}

// BasisNotes returns the lines of the basis of a derivation, as written to
// Observation.note for its first version: the advisory statement, the
// formula with the numbers, intermediate steps, constants with their
// sources, assumptions and fallbacks, the inputs with their time offsets, and
// the flags. For a retraction the first line says what was withdrawn and
// why. It returns nil for a kind not in the catalogue.
func BasisNotes(d Derivation) []string {
	k, ok := LookupKind(d.Kind)
	if !ok {
		return nil
	}
	return basisNotes(d, k, 1)
}

// basisNotes renders everything needed to redo the derivation by hand.
func basisNotes(d Derivation, k KindInfo, version int) []string {
	var notes []string
	if d.Status == StatusEnteredInError {
		what := "the advisory value"
		if d.Result.Unit != "" && !math.IsNaN(d.Result.Value) && !math.IsInf(d.Result.Value, 0) {
			what += " " + FormatValue(k.Code, d.Result.Value)
			if u := physio.DisplayUnit(k.Unit); u != "" {
				what += " " + u
			}
		}
		if version > 1 {
			what += " published as version " + strconv.Itoa(version-1)
		}
		notes = append(notes, fmt.Sprintf("Entered in error: %s is withdrawn (%s: %s). Do not use it.",
			what, d.Retracted, ReasonMeaning(d.Retracted)))
	}
	notes = append(notes, "Advisory value computed by software ("+d.Algorithm+") from the data listed here; not an order. Verify at the bedside before acting on it.")
	basis := "Formula: " + k.Formula + "."
	if b := d.Result.Basis(); b != "" {
		basis += " Worked: " + b + "."
	}
	notes = append(notes, basis)
	if len(d.Steps) > 0 {
		parts := make([]string, 0, len(d.Steps))
		for _, st := range d.Steps {
			if b := st.Basis(); b != "" {
				parts = append(parts, st.Method+": "+b)
			}
		}
		if len(parts) > 0 {
			notes = append(notes, "Intermediate steps: "+strings.Join(parts, "; ")+".")
		}
	}
	if cs := allConstants(d); len(cs) > 0 {
		parts := make([]string, len(cs))
		for i, c := range cs {
			parts[i] = c.Name + " = " + physio.DisplayNumber(c.Value)
			if u := physio.DisplayUnit(c.Unit); u != "" {
				parts[i] += " " + u
			}
			if c.Source != "" {
				parts[i] += " (" + c.Source + ")"
			}
		}
		notes = append(notes, "Constants: "+strings.Join(parts, "; ")+".")
	}
	var assumptions []string
	for _, st := range d.Steps {
		assumptions = appendNew(assumptions, st.Assumptions()...)
	}
	assumptions = appendNew(assumptions, d.Result.Assumptions()...)
	for _, in := range d.Inputs {
		if in.Fallback != "" {
			assumptions = append(assumptions, in.Fallback)
		}
	}
	if a := targetAssumption(d); a != "" {
		assumptions = append(assumptions, a)
	}
	if len(assumptions) > 0 {
		notes = append(notes, "Assumptions: "+strings.Join(assumptions, "; ")+".")
	}
	if len(d.Inputs) > 0 {
		parts := make([]string, len(d.Inputs))
		for i, in := range d.Inputs {
			parts[i] = describeInput(in, d.Effective)
		}
		notes = append(notes, "Inputs: "+strings.Join(parts, "; ")+".")
	}
	if fl := d.Result.Flags(); len(fl) > 0 {
		notes = append(notes, "Flags: "+strings.Join(fl, "; ")+".")
	}
	return notes
}

// targetAssumption states, for the for-target kinds, whose target the
// advice aims at: the patient's PaCO2 Goal (an input, named with its
// version and, for a range, its bounds), else Site.TargetPaCO2mmHg (physio
// records the target as the constant "target PaCO2").
func targetAssumption(d Derivation) string {
	if d.Kind != KindRateForTarget && d.Kind != KindTidalVolumeForTarget {
		return ""
	}
	for _, in := range d.Inputs {
		if in.Role != RoleTarget {
			continue
		}
		what := in.Fact.Resource
		if in.Fact.VersionID != "" {
			what += ", version " + in.Fact.VersionID
		}
		if lo, hi, ok := GoalRange(in.Fact); ok {
			return "target PaCO2 " + physio.DisplayNumber(in.Fact.Value) + " mmHg is the patient's own goal (" + what + "): the midpoint of its range " +
				goalRangeText(lo, hi) + ", which leaves equal margin to both bounds; it overrides the site's target"
		}
		return "target PaCO2 " + physio.DisplayNumber(in.Fact.Value) + " mmHg is the patient's own goal (" + what + "); it overrides the site's target"
	}
	for _, c := range d.Result.Constants() {
		if c.Name == "target PaCO2" {
			return "target PaCO2 " + physio.DisplayNumber(c.Value) + " mmHg is the site's configured target: no PaCO2 Goal of the patient is in force; patients with chronic hypercapnia or on a permissive-hypercapnia strategy need their own target"
		}
	}
	return ""
}

// appendNew appends the strings of add not yet in list.
func appendNew(list []string, add ...string) []string {
	for _, a := range add {
		if !slices.Contains(list, a) {
			list = append(list, a)
		}
	}
	return list
}

// allConstants returns the constants of the steps and of the result, each
// (name, value, source) once, in order of use.
func allConstants(d Derivation) []physio.Constant {
	var out []physio.Constant
	add := func(cs []physio.Constant) {
		for _, c := range cs {
			if !slices.Contains(out, c) {
				out = append(out, c)
			}
		}
	}
	for _, st := range d.Steps {
		add(st.Constants())
	}
	add(d.Result.Constants())
	return out
}

// roleLabel names a role for a reader.
func roleLabel(r Role) string {
	switch r {
	case RoleBloodGas:
		return "PaCO2"
	case RolePECO2:
		return "PECO2"
	case RoleVCO2:
		return "VCO2"
	case RolePETCO2:
		return "PETCO2"
	case RoleBirthDate:
		return "age"
	case RoleBicarbonate:
		return "bicarbonate"
	case RoleTarget:
		return "target PaCO2"
	}
	return strings.ReplaceAll(string(r), "-", " ")
}

// describeInput renders one input: what, value, where from, status, when.
// A birth date is shown as the age at the blood gas, not as the date.
func describeInput(in Input, bloodGasTime time.Time) string {
	f := in.Fact
	var b strings.Builder
	b.WriteString(roleLabel(in.Role))
	b.WriteByte(' ')
	switch f.Quantity {
	case QBirthDate:
		if age, note, err := ageAt(f.Text, bloodGasTime); err == nil {
			b.WriteString(num(age) + " a")
			if note != "" {
				b.WriteString(" (" + note + ")")
			}
		} else {
			b.WriteString("unknown")
		}
	case QSex, QAirway:
		b.WriteString(f.Text)
	default:
		b.WriteString(num(f.Value))
		if u := physio.DisplayUnit(f.Unit); u != "" {
			b.WriteString(" " + u)
		}
		if f.SourceUnit != "" && f.SourceUnit != f.Unit {
			b.WriteString(" (sent as " + num(f.SourceValue) + " " + physio.DisplayUnit(f.SourceUnit) + ")")
		}
	}
	var attrs []string
	if f.Specimen != SpecimenNone {
		attrs = append(attrs, string(f.Specimen))
	}
	if f.Detail != "" {
		attrs = append(attrs, f.Detail)
	}
	if f.Origin != "" {
		attrs = append(attrs, string(f.Origin))
	}
	attrs = append(attrs, string(f.Status), f.Key)
	if f.VersionID != "" {
		attrs = append(attrs, "version "+f.VersionID)
	}
	b.WriteString(" [" + strings.Join(attrs, ", ") + "]")
	switch {
	case in.Role == RoleBloodGas:
		b.WriteString(" at " + fhirTime(f.Effective))
	case in.Role == RoleTarget && !f.Effective.IsZero():
		// A goal's time is its startDate: when it came into force, not a reading.
		b.WriteString(", in force from " + f.Effective.UTC().Format("2006-01-02"))
	case !f.Effective.IsZero():
		b.WriteString(", " + describeOffset(in.Offset))
	}
	return b.String()
}

// describeOffset renders an offset from the blood gas in words.
func describeOffset(off time.Duration) string {
	if off == 0 {
		return "at the blood-gas time"
	}
	side := "after"
	if off < 0 {
		side = "before"
	}
	return formatDuration(off.Abs()) + " " + side + " the blood gas"
}

// formatDuration renders a positive duration for a reader: "45 s",
// "5 min 30 s", "2 h 05 min", "3 d 4 h".
func formatDuration(d time.Duration) string {
	d = d.Round(time.Second)
	switch {
	case d < time.Minute:
		return fmt.Sprintf("%d s", d/time.Second)
	case d < time.Hour:
		m, s := d/time.Minute, (d%time.Minute)/time.Second
		if s == 0 {
			return fmt.Sprintf("%d min", m)
		}
		return fmt.Sprintf("%d min %d s", m, s)
	case d < 48*time.Hour:
		h, m := d/time.Hour, (d%time.Hour)/time.Minute
		return fmt.Sprintf("%d h %02d min", h, m)
	}
	days, h := d/(24*time.Hour), (d%(24*time.Hour))/time.Hour
	return fmt.Sprintf("%d d %d h", days, h)
}

// narrative is the short generated XHTML of an Observation.
func narrative(d Derivation, k KindInfo, q *fhir.Quantity) string {
	var b strings.Builder
	b.WriteString(`<div xmlns="http://www.w3.org/1999/xhtml"><p><b>Advisory</b>: not an order; verify at the bedside.</p><p>`)
	b.WriteString(html.EscapeString(k.Display))
	b.WriteString(": ")
	if q != nil && q.Value != nil {
		b.WriteString(html.EscapeString(strings.TrimSpace(q.Value.String() + " " + physio.DisplayUnit(k.Unit))))
	} else {
		b.WriteString("no value")
	}
	b.WriteString(" (" + html.EscapeString(string(d.Status)) + ")")
	b.WriteString("</p>")
	if d.Status == StatusEnteredInError {
		b.WriteString("<p>Entered in error: " + html.EscapeString(d.Retracted) + ". Do not use this value.</p>")
	} else if basis := d.Result.Basis(); basis != "" {
		b.WriteString("<p>" + html.EscapeString(basis) + "</p>")
	}
	b.WriteString("</div>")
	return b.String()
}

func observationStatus(s Status) (fhir.ObservationStatus, error) {
	switch s {
	case StatusRegistered:
		return fhir.ObservationStatusRegistered, nil
	case StatusPreliminary:
		return fhir.ObservationStatusPreliminary, nil
	case StatusFinal:
		return fhir.ObservationStatusFinal, nil
	case StatusAmended:
		return fhir.ObservationStatusAmended, nil
	case StatusCorrected:
		return fhir.ObservationStatusCorrected, nil
	case StatusCancelled:
		return fhir.ObservationStatusCancelled, nil
	case StatusEnteredInError:
		return fhir.ObservationStatusEnteredInError, nil
	case StatusUnknown:
		return fhir.ObservationStatusUnknown, nil
	}
	return 0, fmt.Errorf("observation status %q: %w: not a FHIR R4 status", s, ErrEncode)
}

// interpretationText is the interpretation's text with its source.
func interpretationText(in physio.Interpretation) string {
	text := in.Text
	if in.Source != "" {
		text += " (" + in.Source + ")"
	}
	return text
}

// InterpretationLine renders the interpretation of a derivation for a
// reader: "[H] <text> (<source>)", "[-] <text> (<source>)" when no
// published threshold gives a code, or "" when the kind has no reading.
func InterpretationLine(d Derivation) string {
	in := d.Result.Interpretation
	if in.Code == "" && in.Text == "" {
		return ""
	}
	code := in.Code
	if code == "" {
		code = "-"
	}
	return "[" + code + "] " + interpretationText(in)
}

// interpretationDisplay is the display of the HL7 v3 ObservationInterpretation codes physio may set.
func interpretationDisplay(code string) *string {
	d, ok := map[string]string{
		"N": "Normal", "A": "Abnormal", "H": "High", "L": "Low", "HH": "Critical high",
		"LL": "Critical low", "AA": "Critical abnormal", "HU": "Significantly high", "LU": "Significantly low",
	}[code]
	if !ok {
		return nil
	}
	return &d
}

// EncodeProvenance writes the FHIR R4 Provenance of one version of a
// derivation: id ProvenanceID(d.Key, version); target the versioned
// Observation reference; recorded; policy Site.AlgorithmURL + "/" +
// d.Algorithm; activity v3-DataOperation CREATE (version 1), UPDATE (later
// versions) or NULLIFY (a retraction); agent the service's Device with type
// "assembler"; an entity per input (role "derivation", versioned reference
// when the input had a versionId) and, from version 2 on, the superseded
// Observation version (role "revision", or "removal" for a retraction).
// Errors wrap ErrEncode as EncodeObservation's do, and a zero recorded time
// is refused.
func EncodeProvenance(d Derivation, version int, recorded time.Time, site Site) ([]byte, error) {
	p, err := provenance(d, version, recorded, site)
	if err != nil {
		return nil, err
	}
	return marshal(p)
}

func provenance(d Derivation, version int, recorded time.Time, site Site) (fhir.Provenance, error) {
	switch {
	case !validID(d.ID):
		return fhir.Provenance{}, fmt.Errorf("provenance target id %q: %w: not a FHIR id", d.ID, ErrEncode)
	case version < 1:
		return fhir.Provenance{}, fmt.Errorf("provenance version %d: %w: versions start at 1", version, ErrEncode)
	case recorded.IsZero():
		return fhir.Provenance{}, fmt.Errorf("provenance recorded: %w: no time", ErrEncode)
	case d.Algorithm == "":
		return fhir.Provenance{}, fmt.Errorf("provenance policy: %w: no algorithm version", ErrEncode)
	}
	activity := fhir.Coding{System: ptr(systemDataOperation), Code: ptr("CREATE"), Display: ptr("create")}
	switch {
	case d.Status == StatusEnteredInError:
		activity.Code, activity.Display = ptr("NULLIFY"), ptr("nullify")
	case version > 1:
		activity.Code, activity.Display = ptr("UPDATE"), ptr("revise")
	}
	p := fhir.Provenance{
		Id:       ptr(ProvenanceID(d.Key, version)),
		Target:   []fhir.Reference{{Reference: ptr(observationRef(d.ID, version))}},
		Recorded: fhirInstant(recorded),
		Policy:   []string{strings.TrimSuffix(site.AlgorithmURL, "/") + "/" + d.Algorithm},
		Activity: &fhir.CodeableConcept{Coding: []fhir.Coding{activity}},
		Agent: []fhir.ProvenanceAgent{{
			Type: &fhir.CodeableConcept{Coding: []fhir.Coding{{System: ptr(systemParticipantType), Code: ptr("assembler"), Display: ptr("Assembler")}}},
			Who:  fhir.Reference{Reference: ptr(site.Device), Display: ptr(site.DeviceDisplay)},
		}},
	}
	for _, in := range d.Inputs {
		if in.Fact.Resource == "" {
			continue
		}
		ref := in.Fact.Resource
		if in.Fact.VersionID != "" && validID(in.Fact.VersionID) {
			ref += "/_history/" + in.Fact.VersionID
		}
		p.Entity = append(p.Entity, fhir.ProvenanceEntity{
			Role: fhir.ProvenanceEntityRoleDerivation,
			What: fhir.Reference{Reference: ptr(ref), Display: ptr(roleLabel(in.Role))},
		})
	}
	if version > 1 {
		role := fhir.ProvenanceEntityRoleRevision
		if d.Status == StatusEnteredInError {
			role = fhir.ProvenanceEntityRoleRemoval
		}
		p.Entity = append(p.Entity, fhir.ProvenanceEntity{
			Role: role,
			What: fhir.Reference{Reference: ptr(observationRef(d.ID, version-1)), Display: ptr("superseded version")},
		})
	}
	return p, nil
}

// isObservationRef reports whether an input's resource reference names an
// Observation: relative "Observation/<id>", or an absolute URL (kept from a
// Bundle fullUrl) whose path holds "/Observation/".
func isObservationRef(r string) bool {
	if strings.HasPrefix(r, "Observation/") {
		return true
	}
	return (strings.HasPrefix(r, "http://") || strings.HasPrefix(r, "https://")) && strings.Contains(r, "/Observation/")
}

func observationRef(id string, version int) string {
	return "Observation/" + id + "/_history/" + strconv.Itoa(version)
}

// EncodeOutcome writes the refusals as one FHIR R4 OperationOutcome: an
// issue per refusal, in the given order, with severity "information" (a
// refusal is an expected result, not a failure of the service), code
// "incomplete" when data are missing (reasons "no-...") and "business-rule"
// otherwise ("processing" for a site configuration gap), details.text
// "<kind> not derived: <reason>: <detail>", diagnostics naming the blood gas
// and its time, and an expression locating the blood-gas Observation.
// Site configuration gaps (apparatus dead space, target PaCO2) use
// "processing". With
// no refusals the outcome holds one "informational" issue saying so. The id
// is a version 5 UUID of the refusals' keys and digests.
func EncodeOutcome(refusals []Refusal) ([]byte, error) {
	return marshal(outcome(refusals))
}

func outcome(refusals []Refusal) fhir.OperationOutcome {
	var name strings.Builder
	name.WriteString("outcome")
	for _, r := range refusals {
		name.WriteString("|" + r.Key + "|" + r.Digest)
	}
	oo := fhir.OperationOutcome{Id: ptr(uuidOf(name.String()))}
	for _, r := range refusals {
		code := fhir.IssueTypeBusinessRule
		switch {
		case strings.HasPrefix(r.Reason, "no-"):
			code = fhir.IssueTypeIncomplete
		case r.Reason == ReasonApparatusNotSet || r.Reason == ReasonTargetNotSet:
			code = fhir.IssueTypeProcessing
		}
		text := r.Kind + " not derived: " + r.Reason
		if r.Detail != "" {
			text += ": " + r.Detail
		} else if m := ReasonMeaning(r.Reason); m != "" {
			text += ": " + m
		}
		diag := "blood gas " + r.BloodGas
		if !r.Effective.IsZero() {
			diag += " at " + fhirTime(r.Effective)
		}
		issue := fhir.OperationOutcomeIssue{
			Severity:    fhir.IssueSeverityInformation,
			Code:        code,
			Details:     &fhir.CodeableConcept{Text: ptr(text)},
			Diagnostics: ptr(diag),
		}
		if e := bloodGasExpression(r.BloodGas); e != "" {
			issue.Expression = []string{e}
		}
		oo.Issue = append(oo.Issue, issue)
	}
	if len(oo.Issue) == 0 {
		oo.Issue = []fhir.OperationOutcomeIssue{{
			Severity: fhir.IssueSeverityInformation,
			Code:     fhir.IssueTypeInformational,
			Details:  &fhir.CodeableConcept{Text: ptr("no derivation was refused")},
		}}
	}
	return oo
}

// bloodGasExpression returns a FHIRPath expression locating the blood-gas
// Observation of a fact key ("Observation/<id>" or
// "Observation/<id>#<system>|<code>"), or "" for another kind of key.
func bloodGasExpression(key string) string {
	ref, comp, _ := strings.Cut(key, "#")
	typ, id, ok := strings.Cut(ref, "/")
	if !ok || typ != "Observation" || !validID(id) {
		return ""
	}
	e := "Observation.where(id = '" + id + "')"
	if sys, code, ok := strings.Cut(comp, "|"); ok && validFHIRPathLiteral(sys) && validFHIRPathLiteral(code) {
		e += ".component.where(code.coding.where(system = '" + sys + "' and code = '" + code + "').exists())"
	}
	return e
}

func validFHIRPathLiteral(s string) bool {
	return s != "" && !strings.ContainsAny(s, `'\`)
}

// ReasonMeaning returns the meaning of a refusal or retraction reason code,
// or "" for an unknown code.
func ReasonMeaning(code string) string {
	if code == ReasonBasisWithdrawn {
		return "an input the value rested on was withdrawn and nothing replaces it"
	}
	for _, r := range Reasons {
		if r.Code == code {
			return r.Meaning
		}
	}
	return ""
}

// EncodeBundle writes a FHIR R4 Bundle of type collection holding, for each
// derivation, its Observation followed by its Provenance, and then, when
// there are refusals, one OperationOutcome listing them. versions[i] is the
// version of ds[i]; a nil versions means version 1 for all. Every entry's
// fullUrl is "urn:uuid:<id>"; the Bundle id is a version 5 UUID of the
// contents and its timestamp is recorded, so the same input gives the same
// bytes. Errors are those of the other Encode functions, and a versions
// slice of another length than ds.
func EncodeBundle(ds []Derivation, versions []int, refusals []Refusal, recorded time.Time, site Site) ([]byte, error) {
	if versions != nil && len(versions) != len(ds) {
		return nil, fmt.Errorf("bundle: %w: %d versions for %d derivations", ErrEncode, len(versions), len(ds))
	}
	if recorded.IsZero() {
		return nil, fmt.Errorf("bundle timestamp: %w: no time", ErrEncode)
	}
	var name strings.Builder
	name.WriteString("bundle")
	b := fhir.Bundle{Type: fhir.BundleTypeCollection, Timestamp: ptr(fhirInstant(recorded))}
	for i, d := range ds {
		version := 1
		if versions != nil {
			version = versions[i]
		}
		obs, err := observation(d, version, site)
		if err != nil {
			return nil, fmt.Errorf("bundle entry %d: %w", len(b.Entry), err)
		}
		prov, err := provenance(d, version, recorded, site)
		if err != nil {
			return nil, fmt.Errorf("bundle entry %d: %w", len(b.Entry)+1, err)
		}
		for _, e := range []struct {
			id  string
			res any
		}{{*obs.Id, obs}, {*prov.Id, prov}} {
			raw, err := marshal(e.res)
			if err != nil {
				return nil, fmt.Errorf("bundle entry %d: %w", len(b.Entry), err)
			}
			b.Entry = append(b.Entry, fhir.BundleEntry{FullUrl: ptr("urn:uuid:" + e.id), Resource: raw})
		}
		name.WriteString("|" + d.Key + "|" + strconv.Itoa(version) + "|" + d.Digest)
	}
	if len(refusals) > 0 {
		oo := outcome(refusals)
		raw, err := marshal(oo)
		if err != nil {
			return nil, fmt.Errorf("bundle outcome: %w", err)
		}
		b.Entry = append(b.Entry, fhir.BundleEntry{FullUrl: ptr("urn:uuid:" + *oo.Id), Resource: raw})
		name.WriteString("|" + *oo.Id)
	}
	name.WriteString("|" + fhirInstant(recorded))
	b.Id = ptr(uuidOf(name.String()))
	return marshal(b)
}

// marshal writes v as compact JSON without HTML escaping, so that narrative
// XHTML and "<" in notes stay readable. The samply models marshal through
// json.Marshal internally, which escapes <, > and & as \u003c, \u003e and
// \u0026; unescapeHTML turns those escapes back into the characters, which
// JSON allows unescaped inside strings.
func marshal(v any) ([]byte, error) {
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	enc.SetEscapeHTML(false)
	if err := enc.Encode(v); err != nil {
		return nil, fmt.Errorf("marshal json: %w", err)
	}
	return resourceTypeFirst(unescapeHTML(bytes.TrimSuffix(buf.Bytes(), []byte("\n")))), nil
}

// resourceTypeFirst moves the samply models' trailing "resourceType" member
// to the front, where FHIR JSON writers conventionally put it and readers
// look first. JSON member order carries no meaning, so this changes nothing
// but readability.
func resourceTypeFirst(b []byte) []byte {
	i := bytes.LastIndex(b, []byte(`,"resourceType":"`))
	if i < 0 || len(b) < 2 || b[0] != '{' || b[len(b)-1] != '}' {
		return b
	}
	member := b[i+1 : len(b)-1]
	if bytes.ContainsAny(member[len(`"resourceType":"`):len(member)-1], `"\,{}`) {
		return b // not a plain trailing member
	}
	out := make([]byte, 0, len(b))
	out = append(out, '{')
	out = append(out, member...)
	out = append(out, ',')
	out = append(out, b[1:i]...)
	return append(out, '}')
}

// unescapeHTML replaces the escapes \u003c, \u003e and \u0026 by <, > and &.
// A backslash occurs only inside JSON strings, and each escape sequence is
// consumed whole, so an escaped backslash followed by "u003c" is left alone.
func unescapeHTML(b []byte) []byte {
	if !bytes.Contains(b, []byte(`\u00`)) {
		return b
	}
	out := make([]byte, 0, len(b))
	for i := 0; i < len(b); i++ {
		if b[i] != '\\' || i+1 >= len(b) {
			out = append(out, b[i])
			continue
		}
		if b[i+1] == 'u' && i+6 <= len(b) {
			switch string(b[i+2 : i+6]) {
			case "003c":
				out = append(out, '<')
				i += 5
				continue
			case "003e":
				out = append(out, '>')
				i += 5
				continue
			case "0026":
				out = append(out, '&')
				i += 5
				continue
			}
		}
		out = append(out, b[i], b[i+1])
		i++
	}
	return out
}

// fhirTime renders a dateTime in UTC with the seconds, as FHIR requires
// when a time is given.
func fhirTime(t time.Time) string { return t.UTC().Format(time.RFC3339Nano) }

// fhirInstant renders an instant in UTC to the millisecond.
func fhirInstant(t time.Time) string {
	return t.UTC().Truncate(time.Millisecond).Format(time.RFC3339Nano)
}

// num renders a number for a reader: at most 3 decimals, no trailing zeros.
func num(v float64) string {
	r := math.Round(v*1000) / 1000
	if r == 0 {
		r = 0
	}
	return strconv.FormatFloat(r, 'f', -1, 64)
}

func ptr[T any](v T) *T { return &v }
