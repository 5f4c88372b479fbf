package fhirmap

import (
	"errors"
	"strings"
	"testing"
)

// nestedExtension returns an extension nested depth levels deep (each level
// an array and an object), with an unknown field at the bottom.
func nestedExtension(depth int) string {
	return `"extension":` + strings.Repeat(`[{"url":"http://example.org/x","extension":`, depth-1) +
		`[{"url":"http://example.org/x","notAnElement":1}]` + strings.Repeat(`}]`, depth-1)
}

// A field path grows with nesting (extension in extension has no limit in
// FHIR's types): the decoder refuses deep input and bounds every path, so a
// small hostile message cannot make a dead-letter header or log line of any
// size.
func TestDecodeNestingBounds(t *testing.T) {
	t.Run("9800 JSON levels refused as too-deep", func(t *testing.T) {
		raw := obsText(`,` + nestedExtension(4900))
		if len(raw) > MaxResourceBytes {
			t.Fatalf("test input of %d bytes is over the size limit", len(raw))
		}
		_, err := Decode(raw, nil)
		de, ok := errors.AsType[*DecodeError](err)
		if !ok || de.Reason != "too-deep" {
			t.Fatalf("got %v, want too-deep", err)
		}
		if len(de.Field) > MaxFieldPath || len(de.Error()) > 2*MaxFieldPath {
			t.Errorf("field path %d bytes, error %d bytes: want at most %d and %d", len(de.Field), len(de.Error()), MaxFieldPath, 2*MaxFieldPath)
		}
	})
	t.Run("deep raw value in a Bundle refused as too-deep", func(t *testing.T) {
		raw := []byte(`{"resourceType":"Bundle","type":"collection","entry":[{"fullUrl":"urn:uuid:00000000-0000-4000-8000-000000000002","resource":` +
			strings.Repeat(`{"a":`, 5000) + `1` + strings.Repeat(`}`, 5000) + `}]}`)
		_, err := Decode(raw, nil)
		de, ok := errors.AsType[*DecodeError](err)
		if !ok || de.Reason != "too-deep" {
			t.Fatalf("got %v, want too-deep", err)
		}
	})
	t.Run("20000 JSON levels refused as too-deep, not malformed", func(t *testing.T) {
		_, err := Decode(obsText(`,`+nestedExtension(10000)), nil)
		if de, ok := errors.AsType[*DecodeError](err); !ok || de.Reason != "too-deep" {
			t.Fatalf("got %v, want too-deep", err)
		}
	})
	t.Run("30 levels: unknown field, path cut in the middle", func(t *testing.T) {
		raw := obsText(`,` + nestedExtension(30))
		_, err := Decode(raw, nil)
		de, ok := errors.AsType[*DecodeError](err)
		if !ok || de.Reason != "unknown-field" {
			t.Fatalf("got %v, want unknown-field", err)
		}
		if len(de.Field) > MaxFieldPath || !strings.Contains(de.Field, "...") {
			t.Errorf("field %q (%d bytes): want at most %d bytes, cut with ...", de.Field, len(de.Field), MaxFieldPath)
		}
		if !strings.HasPrefix(de.Field, "Observation.extension[0]") || !strings.HasSuffix(de.Field, ".notAnElement") {
			t.Errorf("field %q: want the start and the end of the path kept", de.Field)
		}
	})
	t.Run("4 levels: full path", func(t *testing.T) {
		raw := obsText(`,` + nestedExtension(4))
		wantRefusal(t, raw, "unknown-field",
			"Observation.extension[0].extension[0].extension[0].extension[0].notAnElement", -1)
	})
}

// Invalid UTF-8 inside a string value is refused, not turned into U+FFFD.
func TestDecodeInvalidUTF8(t *testing.T) {
	raw := obsText(`,"valueQuantity":{"value":44,"unit":"mm[Hg]` + "\xff\xfe" + `","system":"http://unitsofmeasure.org","code":"mm[Hg]"}`)
	wantRefusal(t, raw, "malformed-json", "", -1)
	// The same with valid UTF-8 decodes.
	mustDecode(t, obsText(`,"valueQuantity":{"value":44,"unit":"mm[Hg] é","system":"http://unitsofmeasure.org","code":"mm[Hg]"}`))
}

// A year-9999 effective time (a placeholder) is refused: it would sit far
// outside every pairing window and recomputation horizon.
func TestDecodeRefusesYear9999(t *testing.T) {
	raw := []byte(strings.Replace(string(obsText(qty44)), "2026-11-20T08:00:00Z", "9999-12-31T23:59:59Z", 1))
	wantRefusal(t, raw, "bad-time", "Observation.effectiveDateTime", -1)
}

// A Bundle entry without an id is identified by its fullUrl only when that
// is a urn:uuid or urn:oid, stored as Observation/<uuid or oid> (a reference
// the store's CHECK on input_resource.reference accepts and every output
// resolves): anything else is refused here, so that the constraint never
// fires and PostgreSQL never logs the failing row.
func TestDecodeFullURLWithoutID(t *testing.T) {
	entry := func(fullURL string) []byte {
		return []byte(`{"resourceType":"Bundle","type":"collection","entry":[{"fullUrl":"` + fullURL + `","resource":` +
			strings.Replace(string(obsText(qty44)), `"id":"lg-t-1",`, "", 1) + `}]}`)
	}
	for _, tc := range []struct {
		fullURL string
		want    string // "" for a refusal
	}{
		{"urn:uuid:00000000-0000-4000-8000-000000000001", "Observation/00000000-0000-4000-8000-000000000001"},
		{"urn:uuid:ABCDEF00-0000-4000-8000-000000000001", "Observation/abcdef00-0000-4000-8000-000000000001"},
		{"urn:oid:1.2.840.113619.2.62", "Observation/1.2.840.113619.2.62"},
		{"http://example.org/fhir/Observation/123", ""},
		{"urn:uuid:not-a-uuid", ""},
		{"urn:uuid:00000000-0000-4000-8000-00000000000g", ""},
		{"urn:oid:3.1", ""},
		{"urn:oid:1.02", ""},
		{"urn:oid:1..2", ""},
	} {
		t.Run(tc.fullURL, func(t *testing.T) {
			raw := entry(tc.fullURL)
			if tc.want != "" {
				d := mustDecode(t, raw)
				if len(d.Resources) != 1 || d.Resources[0].Reference != tc.want {
					t.Fatalf("resources %+v, want one named %s", d.Resources, tc.want)
				}
				return
			}
			wantRefusal(t, raw, "bad-reference", "Bundle.entry[0].fullUrl", 0)
		})
	}
}
