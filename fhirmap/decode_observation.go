package fhirmap

import (
	"bytes"
	"strconv"
	"strings"
	"time"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// obsEntry is one Observation being decoded.
type obsEntry struct {
	entry   int    // Bundle entry, -1 alone
	root    string // path of the resource, "Observation" or "Bundle.entry[n].resource"
	raw     []byte // as received
	fullURL string
	o       obsJSON
	// inherited are specimen claims from panels in the same Bundle that
	// list this Observation in hasMember.
	inherited []Specimen

	containedByID map[string]*specimenJSON // contained Specimens by id, built on first use
}

// contained returns the contained Specimen with the given id, nil if the
// Observation contains none with that id.
func (e *obsEntry) contained(id string) (*specimenJSON, *DecodeError) {
	if e.containedByID == nil {
		e.containedByID = map[string]*specimenJSON{}
		for i, raw := range e.o.Contained {
			root := e.root + ".contained[" + strconv.Itoa(i) + "]"
			res := bytes.TrimSpace(raw)
			if len(res) == 0 || res[0] != '{' {
				return nil, refuse(e.entry, root, "malformed-json", "expected a JSON object")
			}
			if peekResourceType(res) != "Specimen" {
				continue // other contained resources are kept in the raw JSON, not read
			}
			var s specimenJSON
			if err := strictUnmarshal(res, specimenSchema, root, e.entry, &s); err != nil {
				return nil, err
			}
			if cid := deref(s.Id); cid != "" {
				e.containedByID[cid] = &s
			}
		}
	}
	return e.containedByID[id], nil
}

// match finds the code table entry of a CodeableConcept: the first coding
// in the table. found is false when no coding is in the table; conflict is
// true when two codings in the table disagree on quantity, origin, detail,
// temperature correction or panel-ness (their specimens are merged by
// combineSpecimen).
func (d *decoder) match(cc *fhir.CodeableConcept) (info CodeInfo, coding Coding, found, conflict bool) {
	if cc == nil {
		return
	}
	for _, c := range cc.Coding {
		ci, ok := d.codes.Lookup(deref(c.System), deref(c.Code))
		if !ok {
			continue
		}
		if !found {
			info, found = ci, true
			coding = Coding{System: deref(c.System), Code: deref(c.Code), Display: deref(c.Display)}
			continue
		}
		if refinesBodyTemp(info, ci) {
			// A body temperature coded both generically (8310-5, as the
			// FHIR vital-signs profile requires) and by site: the site wins.
			if ci.Detail != "" {
				info.Detail = ci.Detail
			}
			continue
		}
		if ci.Quantity != info.Quantity || ci.Origin != info.Origin || ci.Detail != info.Detail ||
			ci.TempCorrected != info.TempCorrected || ci.Panel != info.Panel {
			conflict = true
		}
		info.Specimen = combineSpecimen(info.Specimen, ci.Specimen)
	}
	return
}

// temperatureBodySites maps the SNOMED CT body structures of the MII-ICU
// temperature profiles (Observation.bodySite) to the site kind of a body
// temperature whose code does not name its site.
var temperatureBodySites = map[string]string{
	"34402009": "core",       // rectum structure
	"32849002": "core",       // esophageal structure
	"71836000": "core",       // nasopharyngeal structure
	"76784001": "core",       // vaginal structure
	"45206002": "peripheral", // nasal structure
}

// bodySiteDetail returns "core" or "peripheral" for a coded bodySite the
// table knows, else "" (site not stated).
func bodySiteDetail(cc *fhir.CodeableConcept) string {
	if cc == nil {
		return ""
	}
	for _, c := range cc.Coding {
		if deref(c.System) == SNOMEDSystem {
			if d, ok := temperatureBodySites[deref(c.Code)]; ok {
				return d
			}
		}
	}
	return ""
}

// refinesBodyTemp reports whether two codings of one body temperature
// differ only in that one names the site and the other does not.
func refinesBodyTemp(a, b CodeInfo) bool {
	return a.Quantity == QBodyTemp && b.Quantity == QBodyTemp && a.Origin == b.Origin &&
		(a.Detail == "" || b.Detail == "" || a.Detail == b.Detail)
}

// firstCoding names an unknown code for Ignored.
func firstCoding(cc *fhir.CodeableConcept) string {
	if cc == nil || len(cc.Coding) == 0 {
		return "?"
	}
	c := cc.Coding[0]
	return safeName([]byte(deref(c.System))) + "|" + safeName([]byte(deref(c.Code)))
}

// values are the value[x] elements of an Observation or a component.
type values struct {
	quantity   *fhir.Quantity
	concept    *fhir.CodeableConcept
	absent     *fhir.CodeableConcept
	otherValue bool // some other value[x] (string, integer, range, ...)
}

func obsValues(o *obsJSON) values {
	return values{quantity: o.ValueQuantity, concept: o.ValueCodeableConcept, absent: o.DataAbsentReason,
		otherValue: o.ValueString != nil || o.ValueBoolean != nil || o.ValueInteger != nil || o.ValueRange != nil ||
			o.ValueRatio != nil || o.ValueSampledData != nil || o.ValueTime != nil || o.ValueDateTime != nil || o.ValuePeriod != nil}
}

func componentValues(c *fhir.ObservationComponent) values {
	return values{quantity: c.ValueQuantity, concept: c.ValueCodeableConcept, absent: c.DataAbsentReason,
		otherValue: c.ValueString != nil || c.ValueBoolean != nil || c.ValueInteger != nil || c.ValueRange != nil ||
			c.ValueRatio != nil || c.ValueSampledData != nil || c.ValueTime != nil || c.ValueDateTime != nil || c.ValuePeriod != nil}
}

// observationFacts turns one decoded Observation into facts, or into
// Ignored entries, or refuses it.
func (d *decoder) observationFacts(e *obsEntry, r *resolver) *DecodeError {
	o := &e.o
	if o.Status == nil {
		return refuse(e.entry, e.root+".status", "missing-field", "an Observation needs a status")
	}
	if o.Code == nil || (len(o.Code.Coding) == 0 && o.Code.Text == nil) {
		return refuse(e.entry, e.root+".code", "missing-field", "an Observation needs a code")
	}
	if len(o.ModifierExtension) > 0 {
		return refuse(e.entry, e.root+".modifierExtension", "unsupported-extension", "modifier extensions are not supported")
	}
	for i := range o.Component {
		if len(o.Component[i].ModifierExtension) > 0 {
			return refuse(e.entry, e.root+".component["+strconv.Itoa(i)+"].modifierExtension", "unsupported-extension", "modifier extensions are not supported")
		}
	}

	info, coding, found, conflict := d.match(o.Code)
	if found && info.Quantity == QBodyTemp && info.Detail == "" {
		info.Detail = bodySiteDetail(o.BodySite)
	}
	type compMatch struct {
		info            CodeInfo
		coding          Coding
		found, conflict bool
	}
	comps := make([]compMatch, len(o.Component))
	anyComponent := false
	for i := range o.Component {
		c := &comps[i]
		c.info, c.coding, c.found, c.conflict = d.match(&o.Component[i].Code)
		anyComponent = anyComponent || c.found
	}

	// Identity, before anything is recorded under it.
	ref := ""
	if id := deref(o.Id); id != "" {
		if !validID(id) {
			return refuse(e.entry, e.root+".id", "bad-reference", "not a valid FHIR id")
		}
		ref = "Observation/" + id
	} else if e.fullURL != "" {
		var why string
		if ref, why = fullURLIdentity(e.fullURL); why != "" {
			return refuse(e.entry, strings.TrimSuffix(e.root, ".resource")+".fullUrl", "bad-reference", why)
		}
	}
	if !found && !anyComponent {
		d.out.Ignored = append(d.out.Ignored, Ignored{Reference: orPath(ref, e), Reason: "unknown-code"})
		return nil
	}
	if ref == "" {
		return refuse(e.entry, e.root+".id", "missing-field", "an Observation needs an id (or, in a Bundle, a fullUrl)")
	}

	base := Fact{Resource: ref, Digest: digest(e.raw), Status: Status(o.Status.Code())}
	if o.Subject == nil {
		return refuse(e.entry, e.root+".subject", "missing-field", "an Observation needs a subject")
	}
	patient, why := r.patient(deref(o.Subject.Reference))
	if why != "" {
		return refuse(e.entry, e.root+".subject.reference", "bad-reference", why)
	}
	base.Patient = patient
	eff, err := effective(e)
	if err != nil {
		return err
	}
	base.Effective = eff
	if o.Meta != nil {
		base.VersionID = deref(o.Meta.VersionId)
		if lu := deref(o.Meta.LastUpdated); lu != "" {
			t, err := parseZonedTime(lu)
			if err != nil {
				return refuse(e.entry, e.root+".meta.lastUpdated", "bad-time", err.(*timeError).detail)
			}
			base.LastUpdated = t
		}
	}
	if is := deref(o.Issued); is != "" {
		t, err := parseZonedTime(is)
		if err != nil {
			return refuse(e.entry, e.root+".issued", "bad-time", err.(*timeError).detail)
		}
		base.Issued = t
	}
	if o.Encounter != nil {
		enc := deref(o.Encounter.Reference)
		if r.byURL != nil {
			if i, ok := r.find(enc); ok && r.types[i] == "Encounter" && validID(r.ids[i]) {
				enc = "Encounter/" + r.ids[i]
			}
		}
		base.Encounter = enc
	}
	claim, err := r.specimenClaim(e, o.Specimen)
	if err != nil {
		return err
	}
	claims := append([]Specimen{claim}, e.inherited...)

	before := len(d.out.Facts)
	switch {
	case found && conflict:
		d.out.Ignored = append(d.out.Ignored, Ignored{Reference: ref, Reason: "conflicting-codes"})
	case found && info.Panel:
		if len(o.Component) == 0 {
			d.out.Ignored = append(d.out.Ignored, Ignored{Reference: ref, Reason: "panel"})
		}
	case found:
		spec, note := combineSpecimenNote(info.Specimen, claims...)
		if err := d.value(base, ref, info, coding, spec, note, obsValues(o), e.entry, e.root); err != nil {
			return err
		}
	case len(o.Component) == 0:
		d.out.Ignored = append(d.out.Ignored, Ignored{Reference: ref, Reason: "unknown-code"})
	}

	// Components: a panel code passes its specimen on.
	var panelClaim Specimen = SpecimenUnknown
	if found && !conflict && info.Panel {
		panelClaim = info.Specimen
	}
	for i := range o.Component {
		c := &o.Component[i]
		croot := e.root + ".component[" + strconv.Itoa(i) + "]"
		cinfo, ccoding, cfound, cconflict := comps[i].info, comps[i].coding, comps[i].found, comps[i].conflict
		if !cfound {
			d.out.Ignored = append(d.out.Ignored, Ignored{Reference: ref + "#" + firstCoding(&c.Code), Reason: "unknown-code"})
			continue
		}
		key := ref + "#" + ccoding.System + "|" + ccoding.Code
		for j := range i {
			if comps[j].found && comps[j].coding.System == ccoding.System && comps[j].coding.Code == ccoding.Code {
				return refuse(e.entry, croot+".code", "duplicate-value", "two components with the same code")
			}
		}
		if cconflict || cinfo.Panel {
			d.out.Ignored = append(d.out.Ignored, Ignored{Reference: key, Reason: "conflicting-codes"})
			continue
		}
		spec, note := combineSpecimenNote(cinfo.Specimen, append([]Specimen{panelClaim}, claims...)...)
		if err := d.value(base, key, cinfo, ccoding, spec, note, componentValues(c), e.entry, croot); err != nil {
			return err
		}
	}

	if len(d.out.Facts) > before {
		d.out.Resources = append(d.out.Resources, Resource{Type: "Observation", Reference: ref, VersionID: base.VersionID,
			Patient: base.Patient, Digest: base.Digest, Raw: bytes.Clone(e.raw)})
	}
	return nil
}

// validURN reports whether s is a urn:uuid:<uuid> or urn:oid:<oid> (FHIR R4
// Bundle.entry.fullUrl for a resource without a RESTful identity): the only
// fullUrls used as a reference, the same forms the store's CHECK on
// input_resource.reference accepts (migrations 0002 and 0003), so the
// decoder refuses what the constraint would have refused, and no failing
// row reaches the server log.
func validURN(s string) bool {
	if u, ok := strings.CutPrefix(s, "urn:uuid:"); ok {
		if len(u) != 36 {
			return false
		}
		for i, c := range u {
			switch i {
			case 8, 13, 18, 23:
				if c != '-' {
					return false
				}
			default:
				if !(c >= '0' && c <= '9' || c >= 'a' && c <= 'f' || c >= 'A' && c <= 'F') {
					return false
				}
			}
		}
		return true
	}
	o, ok := strings.CutPrefix(s, "urn:oid:")
	if !ok || len(o) < 3 || o[0] < '0' || o[0] > '2' || o[1] != '.' || len(o) > 200 {
		return false
	}
	for _, arc := range strings.Split(o[2:], ".") {
		if arc == "" || len(arc) > 1 && arc[0] == '0' || strings.Trim(arc, "0123456789") != "" {
			return false
		}
	}
	return true
}

func orPath(ref string, e *obsEntry) string {
	if ref != "" {
		return ref
	}
	if e.entry >= 0 {
		return "Bundle.entry[" + strconv.Itoa(e.entry) + "]"
	}
	return "Observation"
}

// effective reads effective[x]: dateTime, instant, or a period's start (its
// end when it has no start). A timing, a date without time or a time
// without zone is refused ("bad-time"); none at all is "missing-field".
func effective(e *obsEntry) (time.Time, *DecodeError) {
	o := &e.o
	var s, field string
	switch {
	case o.EffectiveDateTime != nil:
		s, field = *o.EffectiveDateTime, ".effectiveDateTime"
	case o.EffectiveInstant != nil:
		s, field = *o.EffectiveInstant, ".effectiveInstant"
	case o.EffectivePeriod != nil:
		s, field = deref(o.EffectivePeriod.Start), ".effectivePeriod.start"
		if s == "" {
			s, field = deref(o.EffectivePeriod.End), ".effectivePeriod.end"
		}
		if s == "" {
			return time.Time{}, refuse(e.entry, e.root+".effectivePeriod", "missing-field", "the period has neither start nor end")
		}
	case o.EffectiveTiming != nil:
		return time.Time{}, refuse(e.entry, e.root+".effectiveTiming", "bad-time", "effectiveTiming is not supported")
	default:
		return time.Time{}, refuse(e.entry, e.root+".effective[x]", "missing-field", "an Observation needs an effective time")
	}
	t, err := parseZonedTime(s)
	if err != nil {
		return time.Time{}, refuse(e.entry, e.root+field, "bad-time", err.(*timeError).detail)
	}
	return t, nil
}

// value makes the fact of one value (the Observation's own or a
// component's) and appends it, or records why it is ignored, or refuses.
// A retracting status (cancelled, entered-in-error) always yields a fact,
// with Value 0 when the value is absent or unusable: a retraction must not
// be lost because the erroneous value was also malformed.
func (d *decoder) value(base Fact, key string, info CodeInfo, coding Coding, spec Specimen, specNote string, v values, entry int, root string) *DecodeError {
	f := base
	f.Key, f.Quantity, f.Origin, f.Detail = key, info.Quantity, info.Origin, info.Detail
	if f.Detail == "" {
		f.Detail = specNote // blood values have no other detail
	}
	f.Specimen, f.TempCorrected, f.Code = spec, info.TempCorrected, coding
	f.Unit = info.Quantity.Unit()
	retract := f.Status.Retracts()
	ignore := func(reason string) *DecodeError {
		if retract {
			d.out.Facts = append(d.out.Facts, f)
			return nil
		}
		d.out.Ignored = append(d.out.Ignored, Ignored{Reference: key, Reason: reason})
		return nil
	}
	missing := func(field, detail string) *DecodeError {
		if retract {
			d.out.Facts = append(d.out.Facts, f)
			return nil
		}
		if f.Status == StatusRegistered || f.Status == StatusUnknown {
			d.out.Ignored = append(d.out.Ignored, Ignored{Reference: key, Reason: "no-value"})
			return nil
		}
		return refuse(entry, root+field, "missing-field", detail)
	}

	if info.Quantity.coded() {
		switch {
		case v.concept != nil:
		case v.absent != nil:
			return ignore("data-absent")
		default:
			return missing(".valueCodeableConcept", "a coded value is required for this code")
		}
		if info.Quantity == QAirway {
			m, reason := d.codes.airwayModel(v.concept)
			if reason != "" {
				return ignore(reason)
			}
			f.Text = m.String()
			d.out.Facts = append(d.out.Facts, f)
			return nil
		}
		for _, c := range v.concept.Coding {
			if deref(c.System) != GenderSystem {
				continue
			}
			if g := deref(c.Code); g == "male" || g == "female" {
				f.Text = g
				d.out.Facts = append(d.out.Facts, f)
				return nil
			}
		}
		return ignore("unsupported-value")
	}

	q := v.quantity
	switch {
	case q != nil:
	case v.absent != nil:
		return ignore("data-absent")
	case v.otherValue || v.concept != nil:
		return missing(".valueQuantity", "a quantity is required for this code; another value type was given")
	default:
		return missing(".valueQuantity", "a value is required")
	}
	if q.Comparator != nil {
		return ignore("comparator")
	}
	if q.Value == nil {
		return missing(".valueQuantity.value", "the quantity has no value")
	}
	unit, unitField := deref(q.Unit), ".valueQuantity.unit"
	if deref(q.System) == UCUMSystem && deref(q.Code) != "" {
		unit, unitField = *q.Code, ".valueQuantity.code"
	}
	f.SourceUnit = unit
	src, perr := strconv.ParseFloat(string(*q.Value), 64)
	if perr != nil {
		if retract {
			d.out.Facts = append(d.out.Facts, f)
			return nil
		}
		return refuse(entry, root+".valueQuantity.value", "not-finite", "the value is out of range")
	}
	f.SourceValue = src
	val, nerr := normalise(info.Quantity, src, unit)
	if nerr != nil {
		if retract {
			f.SourceValue = 0
			d.out.Facts = append(d.out.Facts, f)
			return nil
		}
		ue := nerr.(*unitError)
		field := ".valueQuantity.value"
		if ue.reason == "unknown-unit" {
			field = unitField
		}
		return refuse(entry, root+field, ue.reason, ue.detail)
	}
	f.Value = val
	d.out.Facts = append(d.out.Facts, f)
	return nil
}

// fullURLIdentity is the identity of a Bundle Observation that has no id:
// "Observation/<uuid>" for a fullUrl urn:uuid:<uuid> (lower case: RFC 4122
// UUIDs compare case-insensitively) and "Observation/<oid>" for urn:oid:<oid>,
// so that derivedFrom, the Provenance and the store all name it as a FHIR
// relative reference the service holds (a urn:uuid resolves only inside its
// Bundle); a relative Observation/<id> is kept as it is. Any other fullUrl,
// an absolute http(s) URL included, gives why it cannot identify the
// Observation.
func fullURLIdentity(u string) (ref, why string) { return resourceIdentity("Observation", u) }

// resourceIdentity is fullURLIdentity for a resource of type rt
// ("Observation", "Goal").
func resourceIdentity(rt, u string) (ref, why string) {
	lower := strings.ToLower(u)
	for _, p := range []string{"urn:uuid:", "urn:oid:"} {
		if rest, ok := strings.CutPrefix(lower, p); ok {
			if !validURN(lower) {
				return "", "the fullUrl is not of the form urn:uuid:<uuid> or urn:oid:<oid>"
			}
			if !validID(rest) {
				return "", "the fullUrl " + p + " part is not usable as a FHIR id"
			}
			return rt + "/" + rest, ""
		}
	}
	// An absolute http(s) fullUrl is valid FHIR but is not kept as an
	// identity: the store keys every input by "Type/<id>" or a urn, and a URL
	// would reach its reference constraint (whose error PostgreSQL logs with
	// the row). Refused here instead, with the reason.
	// A relative "Observation/<id>" is not a valid fullUrl, but it names
	// the resource unambiguously: kept, as before.
	if id, ok := strings.CutPrefix(u, rt+"/"); ok && validID(id) {
		return u, ""
	}
	article := "a"
	if strings.ContainsRune("AEIOU", rune(rt[0])) {
		article = "an"
	}
	return "", article + " " + rt + " without an id needs a fullUrl of the form urn:uuid:<uuid>, urn:oid:<oid> or " + rt + "/<id>"
}
