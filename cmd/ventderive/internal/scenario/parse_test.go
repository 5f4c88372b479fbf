package scenario

import (
	"bytes"
	"encoding/json"
	"fmt"
	"strconv"
	"testing"
	"time"

	"github.com/samply/golang-fhir-models/fhir-models/fhir"
)

// The tests read the generated messages back with a general-purpose FHIR R4
// model library (samply golang-fhir-models) in strict mode, independently of
// the generator's own JSON types.

// value is one coded value of one Observation (or one panel component).
type value struct {
	msg       int       // index into Scenario.Messages
	at        time.Time // message time
	bundle    string    // enclosing Bundle type, "" for a bare resource
	id        string    // Observation id
	version   string    // meta.versionId
	status    string
	patient   string // subject reference
	effective time.Time
	codes     []fhir.Coding
	num       float64
	unit      string // UCUM code
	component bool   // a component of a panel
	hasMember int    // hasMember count of the Observation
}

// has reports whether the value carries system|code among its codings.
func (v value) has(system, code string) bool {
	for _, c := range v.codes {
		if c.System != nil && c.Code != nil && *c.System == system && *c.Code == code {
			return true
		}
	}
	return false
}

// strictUnmarshal decodes b into v, refusing unknown fields and trailing data.
// The model structs have no resourceType field (their MarshalJSON adds it),
// so it is checked by the caller and removed here.
func strictUnmarshal(b []byte, v any) error {
	var fields map[string]json.RawMessage
	if err := json.Unmarshal(b, &fields); err != nil {
		return err
	}
	delete(fields, "resourceType")
	b, err := json.Marshal(fields)
	if err != nil {
		return err
	}
	d := json.NewDecoder(bytes.NewReader(b))
	d.DisallowUnknownFields()
	if err := d.Decode(v); err != nil {
		return err
	}
	if d.More() {
		return fmt.Errorf("trailing data")
	}
	return nil
}

// parsed is the whole scenario read back.
type parsed struct {
	values   []value
	patients map[string]fhir.Patient
	bundles  map[string]int // Bundle type -> count
}

// parseAll reads every well-formed message back. It fails the test on any
// message that is not valid FHIR R4 of an expected shape.
func parseAll(t *testing.T, sc Scenario) parsed {
	t.Helper()
	p := parsed{patients: map[string]fhir.Patient{}, bundles: map[string]int{}}
	for i, m := range sc.Messages {
		if m.Malformed {
			continue
		}
		if err := p.resource(i, m, "", m.Payload); err != nil {
			t.Fatalf("message %d (%s, %s): %v", i, m.Subject, m.At.Format(time.RFC3339), err)
		}
	}
	return p
}

func (p *parsed) resource(i int, m Message, bundleType string, raw []byte) error {
	var head struct {
		ResourceType string `json:"resourceType"`
	}
	if err := json.Unmarshal(raw, &head); err != nil {
		return fmt.Errorf("not JSON: %w", err)
	}
	switch head.ResourceType {
	case "Bundle":
		if bundleType != "" {
			return fmt.Errorf("nested Bundle")
		}
		var b fhir.Bundle
		if err := strictUnmarshal(raw, &b); err != nil {
			return fmt.Errorf("bundle: %w", err)
		}
		bt := b.Type.Code()
		p.bundles[bt]++
		if b.Id == nil || len(b.Entry) == 0 {
			return fmt.Errorf("bundle without id or entries")
		}
		for j, e := range b.Entry {
			if e.FullUrl == nil || len(e.Resource) == 0 {
				return fmt.Errorf("entry %d without fullUrl or resource", j)
			}
			switch bt {
			case "transaction":
				if e.Request == nil || e.Request.Url == "" {
					return fmt.Errorf("transaction entry %d without request", j)
				}
			case "message":
				var h struct {
					ResourceType string `json:"resourceType"`
				}
				_ = json.Unmarshal(e.Resource, &h)
				if (j == 0) != (h.ResourceType == "MessageHeader") {
					// FHIR R4 Bundle invariant bdl-12: a message starts with its MessageHeader.
					return fmt.Errorf("message entry %d is %s", j, h.ResourceType)
				}
				if j == 0 {
					var mh fhir.MessageHeader
					if err := strictUnmarshal(e.Resource, &mh); err != nil {
						return fmt.Errorf("message header: %w", err)
					}
					continue
				}
			default:
				return fmt.Errorf("unexpected bundle type %q", bt)
			}
			if err := p.resource(i, m, bt, e.Resource); err != nil {
				return fmt.Errorf("entry %d: %w", j, err)
			}
		}
	case "Patient":
		var pt fhir.Patient
		if err := strictUnmarshal(raw, &pt); err != nil {
			return fmt.Errorf("patient: %w", err)
		}
		if pt.Id == nil || pt.Gender == nil || pt.BirthDate == nil {
			return fmt.Errorf("patient without id, gender or birthDate")
		}
		p.patients["Patient/"+*pt.Id] = pt
	case "Observation":
		var o fhir.Observation
		if err := strictUnmarshal(raw, &o); err != nil {
			return fmt.Errorf("observation: %w", err)
		}
		if o.Id == nil || *o.Id == "" {
			return fmt.Errorf("observation without id")
		}
		if o.Subject == nil || o.Subject.Reference == nil {
			return fmt.Errorf("observation %s without subject", *o.Id)
		}
		if o.EffectiveDateTime == nil {
			return fmt.Errorf("observation %s without effectiveDateTime", *o.Id)
		}
		// RFC 3339 requires a zone: Z or +hh:mm (FHIR dateTime with time).
		eff, err := time.Parse(time.RFC3339, *o.EffectiveDateTime)
		if err != nil {
			return fmt.Errorf("observation %s effective: %w", *o.Id, err)
		}
		v := value{msg: i, at: m.At, bundle: bundleType, id: *o.Id, status: o.Status.Code(),
			patient: *o.Subject.Reference, effective: eff, codes: o.Code.Coding, hasMember: len(o.HasMember)}
		if o.Meta != nil && o.Meta.VersionId != nil {
			v.version = *o.Meta.VersionId
		}
		if o.Status != fhir.ObservationStatusFinal && v.version == "" {
			return fmt.Errorf("observation %s: status %s without meta.versionId", *o.Id, v.status)
		}
		if o.ValueQuantity != nil {
			if err := v.setQuantity(*o.ValueQuantity); err != nil {
				return fmt.Errorf("observation %s: %w", *o.Id, err)
			}
			p.values = append(p.values, v)
		}
		for _, c := range o.Component {
			cv := v
			cv.codes, cv.component = c.Code.Coding, true
			if c.ValueQuantity == nil {
				return fmt.Errorf("observation %s: component without valueQuantity", *o.Id)
			}
			if err := cv.setQuantity(*c.ValueQuantity); err != nil {
				return fmt.Errorf("observation %s: %w", *o.Id, err)
			}
			p.values = append(p.values, cv)
		}
		if o.ValueQuantity == nil && len(o.Component) == 0 && len(o.HasMember) == 0 {
			return fmt.Errorf("observation %s without value, components or members", *o.Id)
		}
		if o.ValueQuantity == nil && len(o.Component) == 0 {
			p.values = append(p.values, v) // a hasMember panel, kept for shape checks
		}
	default:
		return fmt.Errorf("unexpected resourceType %q", head.ResourceType)
	}
	return nil
}

func (v *value) setQuantity(q fhir.Quantity) error {
	if q.Value == nil || q.System == nil || q.Code == nil {
		return fmt.Errorf("quantity without value, system or code")
	}
	if *q.System != "http://unitsofmeasure.org" {
		return fmt.Errorf("quantity system %q", *q.System)
	}
	f, err := strconv.ParseFloat(q.Value.String(), 64)
	if err != nil {
		return fmt.Errorf("quantity value: %w", err)
	}
	v.num, v.unit = f, *q.Code
	return nil
}
