package fhirmap

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"reflect"
	"slices"
	"strconv"
	"strings"
	"unicode/utf8"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// Input bounds. A message larger than MaxResourceBytes, a Bundle with more
// than MaxBundleEntries entries or an NDJSON file with more than
// MaxFileLines lines is refused whole ("oversized", "too-many-entries").
const (
	MaxResourceBytes = 1 << 20 // 1 MiB per message, JSON file or NDJSON line
	MaxBundleEntries = 1000    // a blood gas panel plus a day of minute-by-minute ventilator values fits
	MaxFileLines     = 100_000 // NDJSON lines per file
)

// Decoded is what one message or file holds, normalised.
type Decoded struct {
	// Resources are the Observations, Patients and Goals that yielded at least one
	// Fact, each with its JSON as received.
	Resources []Resource
	// Facts are the values read, in the order of the input (entries, then
	// components).
	Facts []Fact
	// Ignored lists what was read but not used, and why. Nothing is dropped
	// silently: every resource or component is in Resources (through its
	// facts) or here.
	Ignored []Ignored
}

// Ignored is a resource, or a component of one, that was read but not used.
//
// Reason codes (stable; metrics count by them):
//
//	unsupported-resource  a Bundle entry of a type the service does not read (Device, Encounter, Specimen, ...)
//	message-header        the MessageHeader that starts a message Bundle
//	unsupported-request   a transaction or batch entry without a resource (DELETE, GET)
//	unknown-code          an Observation or component whose code is not in the code table
//	conflicting-codes     codings of one code that map to different quantities or origins
//	panel                 a panel Observation without values of its own (its members come as separate Observations)
//	data-absent           dataAbsentReason instead of a value
//	no-value              no value, and a status (registered, unknown) that allows none; a Patient without gender or birthDate
//	comparator            a quantity with a comparator (<, <=, >=, >, ad): a bound, not a measurement
//	unsupported-value     a coded value the service cannot use (gender other or unknown)
type Ignored struct {
	Reference string // "Observation/<id>", "Observation/<id>#<system>|<code>", a fullUrl, or "Bundle.entry[<n>]"
	Reason    string
}

// DecodeError is a refusal of a whole message or file. It never carries
// patient values or identifiers: Field is a path into the resource and
// Detail a fixed sentence, at most with a unit, code or field name quoted.
//
// Reason codes (stable; used for dead letters and metrics): malformed-json,
// wrong-resource-type, unknown-field, missing-field (status, code, subject,
// effective[x], id, value), duplicate-value, unsupported-extension,
// unknown-unit, ambiguous-value (a FiO2 neither clearly percent nor clearly
// fraction; a Goal's PaCO2 target that names no value: a comparator, one
// bound, low above high), not-finite, negative-value, bad-time, bad-reference, oversized,
// too-deep (nesting beyond MaxNestingDepth), too-many-entries, empty. Field
// is at most MaxFieldPath bytes.
type DecodeError struct {
	Entry  int    // index of the Bundle entry, -1 when not in a Bundle
	Line   int    // NDJSON line (1-based), 0 otherwise
	Field  string // FHIRPath-like, e.g. "Bundle.entry[3].resource.valueQuantity.unit"
	Reason string // stable code, see above
	Detail string // human-readable, no patient values or identifiers
}

func (e *DecodeError) Error() string {
	var b strings.Builder
	b.WriteString("fhir input refused: ")
	b.WriteString(e.Reason)
	if e.Line > 0 {
		fmt.Fprintf(&b, " at line %d", e.Line)
	}
	if e.Field != "" {
		b.WriteString(" at ")
		b.WriteString(e.Field)
	}
	if e.Detail != "" {
		b.WriteString(": ")
		b.WriteString(e.Detail)
	}
	return b.String()
}

// The model structs with the parts the FHIR library drops added back, and
// with required elements as pointers so that absence can be told from a
// zero value (the library turns a missing status into "registered").
type (
	obsJSON struct {
		fhir.OtherObservation
		ResourceType string                  `json:"resourceType"`
		Contained    []json.RawMessage       `json:"contained,omitempty"`
		Status       *fhir.ObservationStatus `json:"status,omitempty"`
		Code         *fhir.CodeableConcept   `json:"code,omitempty"`
	}
	patientJSON struct {
		fhir.OtherPatient
		ResourceType string            `json:"resourceType"`
		Contained    []json.RawMessage `json:"contained,omitempty"`
	}
	specimenJSON struct {
		fhir.OtherSpecimen
		ResourceType string            `json:"resourceType"`
		Contained    []json.RawMessage `json:"contained,omitempty"`
	}
	bundleJSON struct {
		fhir.OtherBundle
		ResourceType string           `json:"resourceType"`
		Type         *fhir.BundleType `json:"type,omitempty"`
	}
)

var (
	obsSchema      = schemaOf(reflect.TypeFor[obsJSON]())
	patientSchema  = schemaOf(reflect.TypeFor[patientJSON]())
	specimenSchema = schemaOf(reflect.TypeFor[specimenJSON]())
	bundleSchema   = schemaOf(reflect.TypeFor[bundleJSON]())
)

// Decode reads one FHIR R4 JSON resource: an Observation, a Patient, a Goal
// (a patient's target PaCO2), or a Bundle (transaction, batch, collection or
// message) holding them. codes
// nil means DefaultCodes(). On error the Decoded is empty: a message is
// taken whole or refused whole. The error is a *DecodeError.
func Decode(raw []byte, codes *CodeTable) (Decoded, error) {
	if codes == nil {
		codes = defaultTable
	}
	d := decoder{codes: codes}
	if err := d.message(raw); err != nil {
		return Decoded{}, err
	}
	return d.result(), nil
}

// DecodeFile reads a file: one JSON resource, or NDJSON (one resource per
// line), told apart by content: a file that is one JSON value is JSON,
// anything else is read line by line. Errors name the file and carry the
// NDJSON line in DecodeError.Line.
func DecodeFile(name string, raw []byte, codes *CodeTable) (Decoded, error) {
	if codes == nil {
		codes = defaultTable
	}
	trimmed := bytes.TrimSpace(raw)
	if len(trimmed) == 0 {
		return Decoded{}, fmt.Errorf("decode file %s: %w", name, &DecodeError{Entry: -1, Reason: "empty", Detail: "the file holds no resource"})
	}
	if json.Valid(trimmed) {
		out, err := Decode(trimmed, codes)
		if err != nil {
			return Decoded{}, fmt.Errorf("decode file %s: %w", name, err)
		}
		return out, nil
	}
	d := decoder{codes: codes}
	line, lines := 0, 0
	for rest := raw; len(rest) > 0; {
		var text []byte
		text, rest, _ = bytes.Cut(rest, []byte{'\n'})
		line++
		text = bytes.TrimSpace(text)
		if len(text) == 0 {
			continue
		}
		if lines++; lines > MaxFileLines {
			return Decoded{}, fmt.Errorf("decode file %s: %w", name, &DecodeError{Entry: -1, Line: line, Reason: "too-many-entries",
				Detail: fmt.Sprintf("more than %d NDJSON lines", MaxFileLines)})
		}
		if err := d.message(text); err != nil {
			err.Line = line
			return Decoded{}, fmt.Errorf("decode file %s: %w", name, err)
		}
	}
	if lines == 0 {
		return Decoded{}, fmt.Errorf("decode file %s: %w", name, &DecodeError{Entry: -1, Reason: "empty", Detail: "the file holds no resource"})
	}
	return d.result(), nil
}

// decoder accumulates the result of one message or file.
type decoder struct {
	codes *CodeTable
	out   Decoded
}

// result is d.out with Facts and Resources nil when empty, as append leaves
// them when nothing was added (bundle makes room ahead).
func (d *decoder) result() Decoded {
	if len(d.out.Facts) == 0 {
		d.out.Facts = nil
	}
	if len(d.out.Resources) == 0 {
		d.out.Resources = nil
	}
	return d.out
}

func refuse(entry int, field, reason, detail string) *DecodeError {
	return &DecodeError{Entry: entry, Field: field, Reason: reason, Detail: detail}
}

// message decodes one top-level resource.
func (d *decoder) message(raw []byte) *DecodeError {
	trimmed := bytes.TrimSpace(raw)
	switch {
	case len(trimmed) == 0:
		return refuse(-1, "", "empty", "the message is empty")
	case len(raw) > MaxResourceBytes:
		return refuse(-1, "", "oversized", fmt.Sprintf("larger than %d bytes", MaxResourceBytes))
	case !utf8.Valid(trimmed):
		// encoding/json would silently turn bad bytes into U+FFFD.
		return refuse(-1, "", "malformed-json", "invalid UTF-8")
	case trimmed[0] != '{' && json.Valid(trimmed):
		return refuse(-1, "", "malformed-json", "expected a JSON object")
	}
	rt := peekResourceType(trimmed)
	switch rt {
	case "Observation":
		return d.single(trimmed)
	case "Patient":
		p, err := decodePatient(trimmed, -1, "Patient")
		if err != nil {
			return err
		}
		return d.patientFacts(p, trimmed, -1, "Patient")
	case "Goal":
		g, err := decodeGoal(trimmed, -1, "Goal")
		if err != nil {
			return err
		}
		return d.goalFacts(g, trimmed, -1, "Goal", "", &resolver{})
	case "Bundle":
		return d.bundle(trimmed)
	}
	// Refusals below: report broken JSON as such first.
	if !json.Valid(trimmed) {
		return refuse(-1, "", "malformed-json", syntaxDetail(trimmed))
	}
	if rt == "" {
		return refuse(-1, "resourceType", "wrong-resource-type", "no resourceType")
	}
	return refuse(-1, "resourceType", "wrong-resource-type", "resourceType "+quoteShort(rt)+" is not accepted")
}

// syntaxDetail describes a JSON syntax error by position only.
func syntaxDetail(raw []byte) string {
	var v json.RawMessage
	err := json.Unmarshal(raw, &v)
	if se, ok := errors.AsType[*json.SyntaxError](err); ok {
		return fmt.Sprintf("invalid JSON near byte %d", se.Offset)
	}
	return "invalid JSON"
}

// strictUnmarshal checks raw against s and then fills v, a pointer to a
// zero value of s's struct type: in one pass (fillStrict) when it can, else,
// and for every refusal, with strictUnmarshalTwoPass.
func strictUnmarshal(raw []byte, s *jsonSchema, root string, entry int, v any) *DecodeError {
	if onePass && fillStrict(raw, s, v) {
		return nil
	}
	reflect.ValueOf(v).Elem().SetZero()
	return strictUnmarshalTwoPass(raw, s, root, entry, v)
}

// onePass is false only in tests that compare with the two-pass path.
var onePass = true

// strictUnmarshalTwoPass checks raw against s (checkStrict), then fills v
// with encoding/json; it gives every refusal of a resource's JSON.
func strictUnmarshalTwoPass(raw []byte, s *jsonSchema, root string, entry int, v any) *DecodeError {
	if de := checkStrict(raw, s, root); de != nil {
		// Too deep is said as such even where encoding/json would call it a
		// syntax error (it stops at 10,000 levels).
		if de.Reason != "too-deep" && !json.Valid(raw) {
			return refuse(entry, "", "malformed-json", syntaxDetail(raw))
		}
		de.Entry = entry
		return de
	}
	if err := json.Unmarshal(raw, v); err != nil {
		if _, ok := errors.AsType[*json.SyntaxError](err); ok {
			return refuse(entry, "", "malformed-json", syntaxDetail(raw))
		}
		field := root
		if te, ok := errors.AsType[*json.UnmarshalTypeError](err); ok && te.Field != "" {
			field = root + "." + te.Field
		}
		return refuse(entry, field, "malformed-json", "a value has the wrong JSON type")
	}
	return nil
}

func digest(raw []byte) string {
	sum := sha256.Sum256(raw)
	return hex.EncodeToString(sum[:])
}

func deref(s *string) string {
	if s == nil {
		return ""
	}
	return *s
}

// single decodes a lone Observation.
func (d *decoder) single(raw []byte) *DecodeError {
	e := &obsEntry{entry: -1, root: "Observation", raw: raw}
	if err := strictUnmarshal(raw, obsSchema, e.root, -1, &e.o); err != nil {
		return err
	}
	r := resolver{}
	return d.observationFacts(e, &r)
}

// decodePatient strictly decodes a Patient.
func decodePatient(raw []byte, entry int, root string) (*patientJSON, *DecodeError) {
	var p patientJSON
	if err := strictUnmarshal(raw, patientSchema, root, entry, &p); err != nil {
		return nil, err
	}
	if len(p.ModifierExtension) > 0 {
		return nil, refuse(entry, root+".modifierExtension", "unsupported-extension", "modifier extensions are not supported")
	}
	return &p, nil
}

// patientFacts turns a Patient into sex and birth-date facts.
func (d *decoder) patientFacts(p *patientJSON, raw []byte, entry int, root string) *DecodeError {
	id := deref(p.Id)
	if id == "" {
		return refuse(entry, root+".id", "missing-field", "a Patient needs an id")
	}
	if !validID(id) {
		return refuse(entry, root+".id", "bad-reference", "not a valid FHIR id")
	}
	ref := "Patient/" + id
	base := Fact{Resource: ref, Patient: ref, Status: StatusFinal, Digest: digest(raw)}
	if p.Meta != nil {
		base.VersionID = deref(p.Meta.VersionId)
		if lu := deref(p.Meta.LastUpdated); lu != "" {
			t, err := parseZonedTime(lu)
			if err != nil {
				return refuse(entry, root+".meta.lastUpdated", "bad-time", err.(*timeError).detail)
			}
			base.LastUpdated = t
		}
	}
	var facts []Fact
	if p.Gender != nil {
		switch g := p.Gender.Code(); g {
		case "male", "female":
			f := base
			f.Key, f.Quantity, f.Text = ref+"#"+string(QSex), QSex, g
			f.Code = Coding{Code: PatientGender, Display: "administrative gender"}
			facts = append(facts, f)
		default:
			d.out.Ignored = append(d.out.Ignored, Ignored{Reference: ref + "#" + string(QSex), Reason: "unsupported-value"})
		}
	}
	if bd := deref(p.BirthDate); bd != "" {
		if _, err := parseDate(bd); err != nil {
			return refuse(entry, root+".birthDate", "bad-time", err.(*timeError).detail)
		}
		f := base
		f.Key, f.Quantity, f.Text = ref+"#"+string(QBirthDate), QBirthDate, bd
		f.Code = Coding{Code: PatientBirthday, Display: "birth date"}
		facts = append(facts, f)
	}
	if len(facts) == 0 {
		if p.Gender == nil {
			d.out.Ignored = append(d.out.Ignored, Ignored{Reference: ref, Reason: "no-value"})
		}
		return nil
	}
	d.out.Facts = append(d.out.Facts, facts...)
	d.out.Resources = append(d.out.Resources, Resource{Type: "Patient", Reference: ref, VersionID: base.VersionID,
		Patient: ref, Digest: base.Digest, Raw: bytes.Clone(raw)})
	return nil
}

// bundle decodes a Bundle and its entries.
func (d *decoder) bundle(raw []byte) *DecodeError {
	var b bundleJSON
	if err := strictUnmarshal(raw, bundleSchema, "Bundle", -1, &b); err != nil {
		return err
	}
	if b.Type == nil {
		return refuse(-1, "Bundle.type", "missing-field", "a Bundle needs a type")
	}
	btype := b.Type.Code()
	switch btype {
	case "transaction", "batch", "collection", "message":
	default:
		return refuse(-1, "Bundle.type", "wrong-resource-type", "Bundle type "+quoteShort(btype)+" is not accepted")
	}
	if len(b.Entry) == 0 {
		return refuse(-1, "Bundle.entry", "empty", "the Bundle has no entries")
	}
	if len(b.Entry) > MaxBundleEntries {
		return refuse(-1, "Bundle.entry", "too-many-entries", fmt.Sprintf("more than %d entries", MaxBundleEntries))
	}

	r := resolver{byURL: map[string]int{}, versions: map[string][]int{}, byRef: map[string]int{}, types: make([]string, len(b.Entry)), ids: make([]string, len(b.Entry))}
	for i, en := range b.Entry {
		root := entryPath(i)
		if len(en.Resource) == 0 {
			if btype == "message" && i == 0 {
				return refuse(i, root+".resource", "wrong-resource-type", "a message Bundle starts with a MessageHeader")
			}
			if en.Request != nil {
				// Name the request's target when it is a plain relative
				// reference, so a reviewer sees what was to be deleted.
				name := root
				if u := en.Request.Url; u != "" && len(u) <= 200 && !strings.ContainsAny(u, "?# \t") {
					name = u
				}
				d.out.Ignored = append(d.out.Ignored, Ignored{Reference: name, Reason: "unsupported-request"})
				continue
			}
			return refuse(i, root+".resource", "missing-field", "an entry needs a resource")
		}
		res := bytes.TrimSpace(en.Resource)
		if res[0] != '{' {
			return refuse(i, root+".resource", "malformed-json", "expected a JSON object")
		}
		rt := peekResourceType(res)
		if rt == "" {
			return refuse(i, root+".resource.resourceType", "wrong-resource-type", "no resourceType")
		}
		if btype == "message" && i == 0 && rt != "MessageHeader" {
			return refuse(i, root+".resource.resourceType", "wrong-resource-type", "a message Bundle starts with a MessageHeader")
		}
		r.types[i] = rt
		r.ids[i] = peekTopString(res, "id")
		if u := deref(en.FullUrl); u != "" {
			if first, dup := r.byURL[u]; dup {
				// FHIR R4 invariant bdl-7: a fullUrl may repeat only for
				// entries with different meta.versionId (versions of one
				// resource). Current then picks the version to use.
				if why := r.sameResourceVersions(u, first, i, rt, res, b.Entry); why != "" {
					return refuse(i, root+".fullUrl", "bad-reference", why)
				}
			} else {
				r.byURL[u] = i
			}
			r.versions[u] = append(r.versions[u], i)
		}
		if r.ids[i] != "" {
			r.byRef[rt+"/"+r.ids[i]] = i
		}
	}

	// Decode what the service reads, strictly, before making any fact:
	// Observations may refer to Patients and Specimens anywhere in the Bundle.
	obs := make([]*obsEntry, len(b.Entry))
	patients := make([]*patientJSON, len(b.Entry))
	goals := make([]*goalJSON, len(b.Entry))
	r.specimens = map[int]*specimenJSON{}
	for i, en := range b.Entry {
		switch r.types[i] {
		case "":
			continue // a request without a resource, already recorded
		case "Observation":
			e := &obsEntry{entry: i, root: entryPath(i) + ".resource", raw: en.Resource, fullURL: deref(en.FullUrl)}
			if err := strictUnmarshal(en.Resource, obsSchema, e.root, i, &e.o); err != nil {
				return err
			}
			obs[i] = e
		case "Patient":
			p, err := decodePatient(en.Resource, i, entryPath(i)+".resource")
			if err != nil {
				return err
			}
			patients[i] = p
		case "Goal":
			g, err := decodeGoal(en.Resource, i, entryPath(i)+".resource")
			if err != nil {
				return err
			}
			goals[i] = g
		case "Specimen":
			var s specimenJSON
			if err := strictUnmarshal(en.Resource, specimenSchema, entryPath(i)+".resource", i, &s); err != nil {
				return err
			}
			r.specimens[i] = &s
		}
	}
	r.obs = obs

	// Room for the facts and resources the entries can give, so that the
	// results are not copied as they grow (result drops it when unused).
	nf, nr := 0, 0
	for i := range b.Entry {
		switch {
		case obs[i] != nil:
			nf, nr = nf+1+len(obs[i].o.Component), nr+1
		case patients[i] != nil:
			nf, nr = nf+2, nr+1
		case goals[i] != nil:
			nf, nr = nf+1, nr+1
		}
	}
	d.out.Facts = slices.Grow(d.out.Facts, nf)
	d.out.Resources = slices.Grow(d.out.Resources, nr)

	// Panels in the Bundle pass their specimen to their members.
	for _, e := range obs {
		if e == nil || e.o.Code == nil || len(e.o.HasMember) == 0 {
			continue
		}
		info, _, found, conflict := d.match(e.o.Code)
		if !found || conflict || !info.Panel {
			continue
		}
		claim, err := r.specimenClaim(e, e.o.Specimen)
		if err != nil {
			return err
		}
		for _, m := range e.o.HasMember {
			j, ok := r.find(deref(m.Reference))
			if !ok || obs[j] == nil {
				continue // the member arrives separately
			}
			for _, v := range r.allVersions(j, deref(m.Reference)) {
				if obs[v] != nil {
					obs[v].inherited = append(obs[v].inherited, info.Specimen, claim)
				}
			}
		}
	}

	for i, en := range b.Entry {
		switch {
		case obs[i] != nil:
			if err := d.observationFacts(obs[i], &r); err != nil {
				return err
			}
		case patients[i] != nil:
			if err := d.patientFacts(patients[i], en.Resource, i, entryPath(i)+".resource"); err != nil {
				return err
			}
		case goals[i] != nil:
			if err := d.goalFacts(goals[i], en.Resource, i, entryPath(i)+".resource", deref(en.FullUrl), &r); err != nil {
				return err
			}
		case r.types[i] == "MessageHeader":
			d.out.Ignored = append(d.out.Ignored, Ignored{Reference: r.name(i, deref(en.FullUrl)), Reason: "message-header"})
		case r.types[i] != "":
			d.out.Ignored = append(d.out.Ignored, Ignored{Reference: r.name(i, deref(en.FullUrl)), Reason: "unsupported-resource"})
		}
	}
	return nil
}

// resolver finds Bundle entries by reference.
type resolver struct {
	byURL     map[string]int   // fullUrl -> its first entry
	versions  map[string][]int // fullUrl -> every entry under it (versions, bdl-7)
	byRef     map[string]int   // "Type/id" -> entry
	types     []string
	ids       []string
	obs       []*obsEntry
	specimens map[int]*specimenJSON
}

// find resolves a reference to an entry of the Bundle.
func (r *resolver) find(ref string) (int, bool) {
	if ref == "" {
		return 0, false
	}
	if i, ok := r.byURL[ref]; ok {
		return i, true
	}
	if base, _, ok := strings.Cut(ref, "/_history/"); ok {
		ref = base
	}
	i, ok := r.byRef[ref]
	return i, ok
}

// allVersions returns every entry holding a version of the resource of
// entry i, found by ref: the entries sharing its fullUrl (bdl-7), or i alone.
func (r *resolver) allVersions(i int, ref string) []int {
	if vs := r.versions[ref]; len(vs) > 1 {
		return vs
	}
	return []int{i}
}

// sameResourceVersions checks that entry i may share fullUrl u with the
// entries already under it (first among them): FHIR R4 bdl-7 allows a
// repeated fullUrl only when the entries carry different meta.versionId.
// The entries must also be of one resource type and id, or they are not
// versions of one resource. It returns why not, or "".
func (r *resolver) sameResourceVersions(u string, first, i int, rt string, res []byte, entries []fhir.BundleEntry) string {
	if rt != r.types[first] || r.ids[i] != r.ids[first] {
		return "fullUrl appears twice in the Bundle for different resources"
	}
	v := peekVersionID(res)
	if v == "" {
		return "fullUrl appears twice in the Bundle without meta.versionId (FHIR R4 bdl-7)"
	}
	for _, j := range r.versions[u] {
		if peekVersionID(bytes.TrimSpace(entries[j].Resource)) == v {
			return "fullUrl appears twice in the Bundle with the same meta.versionId (FHIR R4 bdl-7)"
		}
	}
	return ""
}

// peekVersionID reads meta.versionId of a resource, or "" when it has none
// or is malformed (the strict decoder reports that).
func peekVersionID(res []byte) string {
	var m struct {
		Meta struct {
			VersionID string `json:"versionId"`
		} `json:"meta"`
	}
	if json.Unmarshal(res, &m) != nil {
		return ""
	}
	return m.Meta.VersionID
}

// name is the reference used for an entry in Ignored.
func (r *resolver) name(i int, fullURL string) string {
	switch {
	case r.ids[i] != "" && validID(r.ids[i]):
		return r.types[i] + "/" + r.ids[i]
	case fullURL != "":
		return fullURL
	}
	return entryPath(i)
}

// entryPath is "Bundle.entry[<i>]".
func entryPath(i int) string { return "Bundle.entry[" + strconv.Itoa(i) + "]" }

// patient resolves a subject reference to "Patient/<id>".
func (r *resolver) patient(ref string) (string, string) {
	if ref == "" {
		return "", "the subject has no literal reference"
	}
	if r.byURL != nil {
		if i, ok := r.find(ref); ok {
			if r.types[i] != "Patient" {
				return "", "the subject is not a Patient"
			}
			if !validID(r.ids[i]) {
				return "", "the subject's Patient entry has no valid id"
			}
			return "Patient/" + r.ids[i], ""
		}
	}
	if strings.HasPrefix(ref, "urn:") || strings.HasPrefix(ref, "#") {
		return "", "the subject reference does not resolve to a Patient entry"
	}
	rest, ok := strings.CutPrefix(ref, "Patient/")
	if !ok {
		return "", "the subject must reference a Patient as Patient/<id>"
	}
	id, hist, _ := strings.Cut(rest, "/_history/")
	if !validID(id) || strings.Contains(hist, "/") {
		return "", "the subject reference is not Patient/<id>"
	}
	return "Patient/" + id, ""
}

// specimenClaim says what an Observation's specimen reference states about
// the blood: arterial, venous or capillary when the Specimen's type carries
// the SNOMED CT code, SpecimenUnknown when it says nothing usable (no type,
// another code, only text, or a Specimen outside the message). The
// reference's display text is never trusted: free text such as
// "arterialised capillary" names capillary blood.
func (r *resolver) specimenClaim(e *obsEntry, ref *fhir.Reference) (Specimen, *DecodeError) {
	if ref == nil {
		return SpecimenUnknown, nil
	}
	target := deref(ref.Reference)
	field := e.root + ".specimen.reference"
	switch {
	case target == "":
		return SpecimenUnknown, nil
	case strings.HasPrefix(target, "#"):
		s, err := e.contained(target[1:])
		if err != nil {
			return "", err
		}
		if s == nil {
			return "", refuse(e.entry, field, "bad-reference", "no contained Specimen with this id")
		}
		return specimenType(s), nil
	}
	if r.byURL != nil {
		if i, ok := r.find(target); ok {
			s := r.specimens[i]
			if s == nil {
				return "", refuse(e.entry, field, "bad-reference", "the specimen reference points to an entry that is not a Specimen")
			}
			return specimenType(s), nil
		}
	}
	return SpecimenUnknown, nil
}

// specimenType reads the SNOMED CT specimen type.
func specimenType(s *specimenJSON) Specimen {
	if s.Type == nil {
		return SpecimenUnknown
	}
	claims := make([]Specimen, 0, len(s.Type.Coding))
	for _, c := range s.Type.Coding {
		if deref(c.System) != SNOMEDSystem {
			continue
		}
		switch deref(c.Code) {
		case SNOMEDArterialBlood:
			claims = append(claims, SpecimenArterial)
		case SNOMEDVenousBlood:
			claims = append(claims, SpecimenVenous)
		case SNOMEDCapillaryBlood:
			claims = append(claims, SpecimenCapillary)
		}
	}
	return combineSpecimen(SpecimenUnknown, claims...)
}

// specimenConflictPrefix starts the Detail of a blood value whose sources
// name different blood (its Specimen is then SpecimenUnknown), e.g.
// "specimen conflict: arterial (code), capillary (Specimen or panel)".
const specimenConflictPrefix = "specimen conflict: "

// combineSpecimenNote is combineSpecimen that also returns, when the sources
// contradict each other, a note naming each definite claim and where it came
// from, for Fact.Detail; "" otherwise.
func combineSpecimenNote(code Specimen, claims ...Specimen) (Specimen, string) {
	got := combineSpecimen(code, claims...)
	if got != SpecimenUnknown {
		return got, ""
	}
	var parts []string
	seen := map[Specimen]bool{}
	if definiteSpecimen(code) {
		parts = append(parts, string(code)+" (code)")
		seen[code] = true
	}
	for _, c := range claims {
		if definiteSpecimen(c) && !seen[c] {
			parts = append(parts, string(c)+" (Specimen or panel)")
			seen[c] = true
		}
	}
	if len(parts) < 2 {
		return got, ""
	}
	return got, specimenConflictPrefix + strings.Join(parts, ", ")
}

func definiteSpecimen(s Specimen) bool {
	return s != SpecimenNone && s != SpecimenUnknown
}

// combineSpecimen merges what the code and the other sources say about the
// blood. A value that is not from blood (SpecimenNone) stays so. Otherwise
// the definite claims (arterial, venous, capillary, mixed venous) are
// collected: none gives SpecimenUnknown, one gives that specimen, two that
// disagree give SpecimenUnknown, so that a contradiction is refused
// downstream rather than resolved by guess.
func combineSpecimen(code Specimen, claims ...Specimen) Specimen {
	if code == SpecimenNone {
		return SpecimenNone
	}
	got := SpecimenUnknown
	for _, c := range append([]Specimen{code}, claims...) {
		if c == SpecimenNone || c == SpecimenUnknown || c == "" {
			continue
		}
		if got == SpecimenUnknown {
			got = c
			continue
		}
		if c != got {
			return SpecimenUnknown
		}
	}
	return got
}
