package fhirmap

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"syscall"
	"testing"
	"time"
)

// obsJSONText is a minimal valid Observation for rule tests; %s slots are
// filled by the cases.
func obsText(extra string) []byte {
	return []byte(`{"resourceType":"Observation","id":"lg-t-1","status":"final",
	 "code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},
	 "subject":{"reference":"Patient/lg-0001"},"effectiveDateTime":"2026-11-20T08:00:00Z"` + extra + `}`)
}

const qty44 = `,"valueQuantity":{"value":44,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}`

func mustDecode(t *testing.T, raw []byte) Decoded {
	t.Helper()
	d, err := Decode(raw, nil)
	if err != nil {
		t.Fatalf("decode: %v", err)
	}
	return d
}

func wantRefusal(t *testing.T, raw []byte, reason, field string, entry int) {
	t.Helper()
	d, err := Decode(raw, nil)
	de, ok := errors.AsType[*DecodeError](err)
	if !ok {
		t.Fatalf("want %s, got %v (%+v)", reason, err, d)
	}
	if de.Reason != reason || (field != "" && de.Field != field) || de.Entry != entry {
		t.Fatalf("got %s at %q entry %d, want %s at %q entry %d", de.Reason, de.Field, de.Entry, reason, field, entry)
	}
	if d.Facts != nil || d.Resources != nil || d.Ignored != nil {
		t.Fatal("a partly filled result came with the error")
	}
}

func TestDecodeRules(t *testing.T) {
	bundle := func(typ string, entries ...string) []byte {
		return []byte(`{"resourceType":"Bundle","type":"` + typ + `","entry":[` + strings.Join(entries, ",") + `]}`)
	}
	patient := `{"fullUrl":"urn:uuid:00000000-0000-4000-8000-000000000001","resource":{"resourceType":"Patient","id":"lg-0009","gender":"female"}}`
	cases := []struct {
		name   string
		raw    []byte
		reason string // "" when accepted
		field  string
		entry  int
		check  func(t *testing.T, d Decoded)
	}{
		{name: "escaped_key_is_the_same_key", raw: obsText(`,"\u0076alueQuantity":{"value":44,"unit":"mmHg"}`),
			check: func(t *testing.T, d Decoded) {
				if len(d.Facts) != 1 || d.Facts[0].Value != 44 {
					t.Fatalf("%+v", d.Facts)
				}
			}},
		{name: "escaped_key_duplicate", raw: obsText(qty44 + `,"\u0076alueQuantity":{"value":45,"unit":"mmHg"}`),
			reason: "duplicate-value", field: "Observation.valueQuantity", entry: -1},
		{name: "primitive_extension_deep", raw: obsText(`,"valueQuantity":{"value":44,"_value":{"extension":[]},"unit":"mmHg"}`),
			reason: "unsupported-extension", field: "Observation.valueQuantity._value", entry: -1},
		{name: "unknown_field_in_coding", raw: []byte(strings.Replace(string(obsText(qty44)), `"code":"2019-8"`, `"code":"2019-8","sytem":"x"`, 1)),
			reason: "unknown-field", field: "Observation.code.coding[0].sytem", entry: -1},
		{name: "integer_where_string", raw: obsText(qty44 + `,"issued":20261120`),
			reason: "malformed-json", field: "Observation.issued", entry: -1},
		{name: "object_where_array", raw: obsText(qty44 + `,"category":{"text":"lab"}`),
			reason: "malformed-json", field: "Observation.category", entry: -1},
		{name: "subject_versioned_reference", raw: []byte(strings.Replace(string(obsText(qty44)), `Patient/lg-0001`, `Patient/lg-0001/_history/4`, 1)),
			check: func(t *testing.T, d Decoded) {
				if d.Facts[0].Patient != "Patient/lg-0001" {
					t.Fatal(d.Facts[0].Patient)
				}
			}},
		{name: "subject_absolute_url", raw: []byte(strings.Replace(string(obsText(qty44)), `Patient/lg-0001`, `https://other.example/fhir/Patient/lg-0001`, 1)),
			reason: "bad-reference", entry: -1},
		{name: "subject_identifier_only", raw: []byte(strings.Replace(string(obsText(qty44)), `"subject":{"reference":"Patient/lg-0001"}`, `"subject":{"identifier":{"value":"LG-MRN-1"}}`, 1)),
			reason: "bad-reference", field: "Observation.subject.reference", entry: -1},
		{name: "invalid_id", raw: []byte(strings.Replace(string(obsText(qty44)), `"lg-t-1"`, `"lg t 1"`, 1)),
			reason: "bad-reference", field: "Observation.id", entry: -1},
		{name: "effective_timing_refused", raw: []byte(strings.Replace(string(obsText(qty44)), `"effectiveDateTime":"2026-11-20T08:00:00Z"`, `"effectiveTiming":{"event":["2026-11-20T08:00:00Z"]}`, 1)),
			reason: "bad-time", field: "Observation.effectiveTiming", entry: -1},
		{name: "two_effective_variants", raw: obsText(qty44 + `,"effectiveInstant":"2026-11-20T08:00:00Z"`),
			reason: "duplicate-value", field: "Observation.effectiveInstant", entry: -1},
		{name: "period_end_only", raw: []byte(strings.Replace(string(obsText(qty44)), `"effectiveDateTime":"2026-11-20T08:00:00Z"`, `"effectivePeriod":{"end":"2026-11-20T08:05:00+00:00"}`, 1)),
			check: func(t *testing.T, d Decoded) {
				if got := d.Facts[0].Effective.Format("15:04"); got != "08:05" {
					t.Fatal(got)
				}
			}},
		{name: "bad_lastUpdated", raw: obsText(qty44 + `,"meta":{"lastUpdated":"2026-11-20"}`),
			reason: "bad-time", field: "Observation.meta.lastUpdated", entry: -1},
		{name: "unit_code_without_ucum_system_uses_unit_text", raw: obsText(`,"valueQuantity":{"value":5.9,"unit":"kPa","code":"mm[Hg]"}`),
			check: func(t *testing.T, d Decoded) {
				if d.Facts[0].SourceUnit != "kPa" || !near(d.Facts[0].Value, 5.9*mmHgPerKPa, 1e-9) {
					t.Fatalf("%+v", d.Facts[0])
				}
			}},
		{name: "ucum_code_wins_over_unit_text", raw: obsText(`,"valueQuantity":{"value":5.9,"unit":"mmHg","system":"http://unitsofmeasure.org","code":"kPa"}`),
			check: func(t *testing.T, d Decoded) {
				if d.Facts[0].SourceUnit != "kPa" {
					t.Fatalf("%+v", d.Facts[0])
				}
			}},
		{name: "retraction_with_unusable_value_still_retracts", raw: []byte(strings.Replace(string(obsText(`,"valueQuantity":{"value":44,"unit":"furlongs"}`)), `"final"`, `"entered-in-error"`, 1)),
			check: func(t *testing.T, d Decoded) {
				if len(d.Facts) != 1 || d.Facts[0].Status != StatusEnteredInError || d.Facts[0].Value != 0 || d.Facts[0].Unit != "mm[Hg]" {
					t.Fatalf("%+v", d.Facts)
				}
			}},
		{name: "preliminary_is_kept_with_its_status", raw: []byte(strings.Replace(string(obsText(qty44)), `"final"`, `"preliminary"`, 1)),
			check: func(t *testing.T, d Decoded) {
				if d.Facts[0].Status != StatusPreliminary || !d.Facts[0].Status.Usable() {
					t.Fatal(d.Facts[0].Status)
				}
			}},
		{name: "bundle_urn_subject_resolves_to_patient_id", raw: bundle("collection", patient,
			`{"resource":`+strings.Replace(string(obsText(qty44)), `Patient/lg-0001`, `urn:uuid:00000000-0000-4000-8000-000000000001`, 1)+`}`),
			check: func(t *testing.T, d Decoded) {
				if len(d.Facts) != 2 || d.Facts[1].Patient != "Patient/lg-0009" {
					t.Fatalf("%+v", d.Facts)
				}
			}},
		{name: "bundle_urn_subject_not_a_patient", raw: bundle("collection",
			`{"fullUrl":"urn:uuid:00000000-0000-4000-8000-000000000002","resource":{"resourceType":"Device","id":"d1"}}`,
			`{"resource":`+strings.Replace(string(obsText(qty44)), `Patient/lg-0001`, `urn:uuid:00000000-0000-4000-8000-000000000002`, 1)+`}`),
			reason: "bad-reference", field: "Bundle.entry[1].resource.subject.reference", entry: 1},
		{name: "bundle_duplicate_fullUrl", raw: bundle("collection", patient, patient),
			reason: "bad-reference", field: "Bundle.entry[1].fullUrl", entry: 1},
		{name: "bundle_entry_without_id_or_fullUrl", raw: bundle("collection",
			`{"resource":`+strings.Replace(string(obsText(qty44)), `"id":"lg-t-1",`, ``, 1)+`}`),
			reason: "missing-field", field: "Bundle.entry[0].resource.id", entry: 0},
		{name: "bundle_specimen_entry_says_arterial", raw: bundle("collection",
			`{"fullUrl":"urn:uuid:00000000-0000-4000-8000-000000000003","resource":{"resourceType":"Specimen","id":"sp1","type":{"coding":[{"system":"http://snomed.info/sct","code":"122552005"}]}}}`,
			`{"resource":`+strings.Replace(string(obsText(qty44+`,"specimen":{"reference":"urn:uuid:00000000-0000-4000-8000-000000000003"}`)), `2019-8`, `11557-6`, 1)+`}`),
			check: func(t *testing.T, d Decoded) {
				if d.Facts[0].Specimen != SpecimenArterial {
					t.Fatal(d.Facts[0].Specimen)
				}
				if len(d.Ignored) != 1 || d.Ignored[0].Reason != "unsupported-resource" {
					t.Fatalf("%+v", d.Ignored)
				}
			}},
		{name: "bundle_unknown_field_in_specimen_entry", raw: bundle("collection",
			`{"resource":{"resourceType":"Specimen","id":"sp1","tpye":{}}}`),
			reason: "unknown-field", field: "Bundle.entry[0].resource.tpye", entry: 0},
		{name: "bundle_nested_entry_error_names_entry", raw: bundle("batch", patient, patient[:len(patient)-1]+`,"request":{"method":"PUT","url":"Patient/lg-0009","bogus":1}}`),
			reason: "unknown-field", field: "Bundle.entry[1].request.bogus", entry: -1},
		{name: "member_alone_with_unspecified_code_is_unknown_specimen", raw: []byte(strings.Replace(string(obsText(qty44)), `2019-8`, `11557-6`, 1)),
			check: func(t *testing.T, d Decoded) {
				if d.Facts[0].Specimen != SpecimenUnknown {
					t.Fatal(d.Facts[0].Specimen)
				}
			}},
		{name: "temperature_corrected_code", raw: []byte(strings.Replace(string(obsText(qty44)), `2019-8`, `32771-8`, 1)),
			check: func(t *testing.T, d Decoded) {
				if !d.Facts[0].TempCorrected || d.Facts[0].Specimen != SpecimenArterial {
					t.Fatalf("%+v", d.Facts[0])
				}
			}},
		{name: "conflicting_codings_ignored", raw: []byte(strings.Replace(string(obsText(qty44)), `{"system":"http://loinc.org","code":"2019-8"}`, `{"system":"http://loinc.org","code":"2019-8"},{"system":"http://loinc.org","code":"2703-7"}`, 1)),
			check: func(t *testing.T, d Decoded) {
				if len(d.Facts) != 0 || len(d.Ignored) != 1 || d.Ignored[0].Reason != "conflicting-codes" {
					t.Fatalf("%+v", d)
				}
			}},
		{name: "agreeing_codings_loinc_and_mdc", raw: []byte(`{"resourceType":"Observation","id":"v1","status":"final",
			"code":{"coding":[{"system":"urn:iso:std:iso:11073:10101","code":"151976"},{"system":"http://loinc.org","code":"76248-4"}]},
			"subject":{"reference":"Patient/lg-0001"},"effectiveDateTime":"2026-11-20T08:00:00Z",
			"valueQuantity":{"value":6,"system":"http://unitsofmeasure.org","code":"cm[H2O]"}}`),
			check: func(t *testing.T, d Decoded) {
				if len(d.Facts) != 1 || d.Facts[0].Code.System != MDCSystem || d.Facts[0].Quantity != QPEEP {
					t.Fatalf("%+v", d)
				}
			}},
		{name: "unknown_status_without_value_ignored", raw: []byte(strings.Replace(string(obsText("")), `"final"`, `"unknown"`, 1)),
			check: func(t *testing.T, d Decoded) {
				if len(d.Facts) != 0 || d.Ignored[0].Reason != "no-value" {
					t.Fatalf("%+v", d)
				}
			}},
		{name: "final_without_value_refused", raw: obsText(""), reason: "missing-field", field: "Observation.valueQuantity", entry: -1},
		{name: "quantity_without_value_refused", raw: obsText(`,"valueQuantity":{"unit":"mmHg"}`), reason: "missing-field", field: "Observation.valueQuantity.value", entry: -1},
		{name: "top_level_whitespace_ok", raw: append(append([]byte("\n  "), obsText(qty44)...), '\n'),
			check: func(t *testing.T, d Decoded) {
				if len(d.Facts) != 1 {
					t.Fatal(d)
				}
			}},
		{name: "trailing_garbage", raw: append(obsText(qty44), '}'), reason: "malformed-json", entry: -1},
		{name: "empty_message", raw: []byte("  "), reason: "empty", entry: -1},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if c.reason != "" {
				wantRefusal(t, c.raw, c.reason, c.field, c.entry)
				return
			}
			d := mustDecode(t, c.raw)
			for _, f := range d.Facts {
				if err := checkFact(f); err != nil {
					t.Errorf("invalid fact %s: %v", f.Key, err)
				}
			}
			c.check(t, d)
		})
	}
}

// TestDecodeBundleEntryError checks that an error inside an entry names the
// entry in DecodeError.Entry and the field path (task rule).
func TestDecodeBundleEntryError(t *testing.T) {
	raw, err := os.ReadFile("testdata/decode/refuse-unknown-unit-bundle-entry.json")
	if err != nil {
		t.Fatal(err)
	}
	wantRefusal(t, raw, "unknown-unit", "Bundle.entry[2].resource.valueQuantity.unit", 2)
}

func TestDecodeBounds(t *testing.T) {
	t.Run("oversized_1MiB_plus_1", func(t *testing.T) {
		raw := obsText(qty44)
		raw = append(raw, bytes.Repeat([]byte(" "), MaxResourceBytes+1-len(raw))...)
		wantRefusal(t, raw, "oversized", "", -1)
	})
	t.Run("exactly_1MiB_accepted", func(t *testing.T) {
		raw := obsText(qty44)
		raw = append(raw, bytes.Repeat([]byte(" "), MaxResourceBytes-len(raw))...)
		mustDecode(t, raw)
	})
	entry := `{"resource":{"resourceType":"Device","id":"d"}}`
	t.Run("too_many_entries_1001", func(t *testing.T) {
		raw := []byte(`{"resourceType":"Bundle","type":"collection","entry":[` + strings.TrimSuffix(strings.Repeat(entry+",", MaxBundleEntries+1), ",") + `]}`)
		wantRefusal(t, raw, "too-many-entries", "Bundle.entry", -1)
	})
	t.Run("entries_1000_accepted", func(t *testing.T) {
		raw := []byte(`{"resourceType":"Bundle","type":"collection","entry":[` + strings.TrimSuffix(strings.Repeat(entry+",", MaxBundleEntries), ",") + `]}`)
		d := mustDecode(t, raw)
		if len(d.Ignored) != MaxBundleEntries {
			t.Fatal(len(d.Ignored))
		}
	})
	t.Run("ndjson_too_many_lines", func(t *testing.T) {
		line := `{"resourceType":"Patient","id":"lg-0001"}` + "\n"
		raw := []byte(strings.Repeat(line, MaxFileLines+1))
		_, err := DecodeFile("big.ndjson", raw, nil)
		de, ok := errors.AsType[*DecodeError](err)
		if !ok || de.Reason != "too-many-entries" || de.Line != MaxFileLines+1 {
			t.Fatalf("got %v", err)
		}
	})
}

func TestDecodeFile(t *testing.T) {
	raw, err := os.ReadFile("testdata/decode/refuse-malformed-json-ndjson-line.ndjson")
	if err != nil {
		t.Fatal(err)
	}
	d, err := DecodeFile("larkspur-export.ndjson", raw, nil)
	de, ok := errors.AsType[*DecodeError](err)
	if !ok || de.Line != 2 || de.Reason != "malformed-json" || d.Facts != nil {
		t.Fatalf("got %v", err)
	}
	if !strings.Contains(err.Error(), "larkspur-export.ndjson") || !strings.Contains(err.Error(), "line 2") {
		t.Errorf("error does not name the file and line: %v", err)
	}
	// A pretty-printed single resource is JSON, not NDJSON.
	one, err := os.ReadFile("testdata/decode/panel-components.json")
	if err != nil {
		t.Fatal(err)
	}
	if d, err := DecodeFile("panel.json", one, nil); err != nil || len(d.Facts) != 5 {
		t.Fatalf("pretty JSON file: %v, %d facts", err, len(d.Facts))
	}
	// An error inside a Bundle file names the entry.
	bad, err := os.ReadFile("testdata/decode/refuse-unknown-unit-bundle-entry.json")
	if err != nil {
		t.Fatal(err)
	}
	_, err = DecodeFile("bundle.json", bad, nil)
	if de, ok := errors.AsType[*DecodeError](err); !ok || de.Entry != 2 || !strings.Contains(err.Error(), "bundle.json") {
		t.Fatalf("got %v", err)
	}
}

// TestDecodeDigest checks Digest against SHA-256 (FIPS 180-4, crypto/sha256)
// of the resource bytes as received: the whole message for a lone resource,
// the entry's resource text for a Bundle entry.
func TestDecodeDigest(t *testing.T) {
	raw, err := os.ReadFile("testdata/decode/obs-paco2-mmhg.json")
	if err != nil {
		t.Fatal(err)
	}
	d := mustDecode(t, raw)
	sum := sha256.Sum256(bytes.TrimSpace(raw))
	if d.Facts[0].Digest != hex.EncodeToString(sum[:]) || d.Resources[0].Digest != d.Facts[0].Digest ||
		!bytes.Equal(d.Resources[0].Raw, bytes.TrimSpace(raw)) {
		t.Fatal("digest or raw of a lone resource differs")
	}

	braw, err := os.ReadFile("testdata/decode/bundle-transaction-hasmember.json")
	if err != nil {
		t.Fatal(err)
	}
	var b struct {
		Entry []struct {
			Resource json.RawMessage `json:"resource"`
		} `json:"entry"`
	}
	if err := json.Unmarshal(braw, &b); err != nil {
		t.Fatal(err)
	}
	want := map[string]bool{}
	for _, e := range b.Entry {
		s := sha256.Sum256(e.Resource)
		want[hex.EncodeToString(s[:])] = true
	}
	d = mustDecode(t, braw)
	for _, r := range d.Resources {
		if !want[r.Digest] {
			t.Errorf("%s: digest is not that of any entry resource", r.Reference)
		}
	}
}

// TestDecodeDoesNotLeakValues checks that refusal texts carry no patient
// value or identifier from the input.
func TestDecodeDoesNotLeakValues(t *testing.T) {
	secret := "LG-MRN-77731"
	inputs := [][]byte{
		[]byte(strings.Replace(string(obsText(qty44)), `"Patient/lg-0001"`, `"Group/`+secret+`"`, 1)),
		[]byte(strings.Replace(string(obsText(qty44)), `"final"`, `"`+secret+`"`, 1)),
		[]byte(strings.Replace(string(obsText(qty44)), `"2026-11-20T08:00:00Z"`, `"`+secret+`"`, 1)),
		obsText(qty44 + `,"identifier":[{"value":"` + secret + `"}],"issued":false`),
		obsText(qty44 + `,"note":[{"text":"` + secret + `"}],"bogus":1`),
	}
	for i, raw := range inputs {
		t.Run(fmt.Sprint(i), func(t *testing.T) {
			_, err := Decode(raw, nil)
			if err == nil {
				t.Fatal("accepted")
			}
			if strings.Contains(err.Error(), secret) {
				t.Fatalf("error leaks input: %v", err)
			}
		})
	}
}

// FuzzDecode: no panic; either an error (a *DecodeError with a stable
// reason and an empty result) or a result whose every fact is valid.
func FuzzDecode(f *testing.F) {
	inputs, _ := filepath.Glob("testdata/decode/*.json")
	for _, in := range inputs {
		raw, err := os.ReadFile(in)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(raw)
	}
	reasons := []string{"malformed-json", "wrong-resource-type", "unknown-field", "missing-field",
		"duplicate-value", "unsupported-extension", "unknown-unit", "ambiguous-value", "not-finite",
		"negative-value", "bad-time", "bad-reference", "oversized", "too-deep", "too-many-entries", "empty"}
	f.Fuzz(func(t *testing.T, raw []byte) {
		d, err := Decode(raw, nil)
		if err != nil {
			de, ok := errors.AsType[*DecodeError](err)
			if !ok || !slices.Contains(reasons, de.Reason) {
				t.Fatalf("error without a stable reason: %v", err)
			}
			if d.Facts != nil || d.Resources != nil || d.Ignored != nil {
				t.Fatal("result and error together")
			}
			return
		}
		refs := map[string]bool{}
		for _, r := range d.Resources {
			refs[r.Reference] = true
		}
		for _, fct := range d.Facts {
			if err := checkFact(fct); err != nil {
				t.Fatalf("invalid fact %+v: %v", fct, err)
			}
			if !refs[fct.Resource] {
				t.Fatalf("fact of %s without its resource", fct.Resource)
			}
		}
	})
}

func benchDecode(b *testing.B, file string, perObservation int) {
	raw, err := os.ReadFile(filepath.Join("testdata/decode", file))
	if err != nil {
		b.Fatal(err)
	}
	if _, err := Decode(raw, nil); err != nil {
		b.Fatal(err)
	}
	b.SetBytes(int64(len(raw)))
	b.ReportAllocs()
	cpu0 := processCPU()
	for b.Loop() {
		if _, err := Decode(raw, nil); err != nil {
			b.Fatal(err)
		}
	}
	// Wall time per Observation, and process CPU time per Observation: on a
	// shared machine the second is the honest "one core" figure.
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(perObservation)/1000, "us/obs")
	b.ReportMetric(float64((processCPU()-cpu0).Nanoseconds())/float64(b.N)/float64(perObservation)/1000, "cpu-us/obs")
}

// processCPU is the user+system CPU time of this process so far.
func processCPU() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// BenchmarkDecodeObservation: one arterial PaCO2 Observation (target: under
// 25 us per Observation, decode and normalise, one core).
func BenchmarkDecodeObservation(b *testing.B) { benchDecode(b, "obs-paco2-mmhg.json", 1) }

// BenchmarkDecodePanel: one blood gas panel with six components.
func BenchmarkDecodePanel(b *testing.B) { benchDecode(b, "panel-components.json", 1) }

// BenchmarkDecodeBundle: a transaction Bundle with a Patient, a hasMember
// panel and two member Observations (3 Observations).
func BenchmarkDecodeBundle(b *testing.B) { benchDecode(b, "bundle-transaction-hasmember.json", 3) }

// TestDecodeTruncated: every proper prefix of a fixture is broken JSON and
// must be refused as "malformed-json" (or "empty"), whatever the strict
// pass saw first; the strict pass must not panic or loop on it.
func TestDecodeTruncated(t *testing.T) {
	inputs, _ := filepath.Glob("testdata/decode/*.json")
	for _, in := range inputs {
		raw, err := os.ReadFile(in)
		if err != nil {
			t.Fatal(err)
		}
		raw = bytes.TrimSpace(raw)
		if !json.Valid(raw) {
			continue
		}
		t.Run(filepath.Base(in), func(t *testing.T) {
			step := max(1, len(raw)/97)
			for n := 0; n < len(raw); n += step {
				_, err := Decode(raw[:n], nil)
				de, ok := errors.AsType[*DecodeError](err)
				if !ok || (de.Reason != "malformed-json" && de.Reason != "empty") {
					t.Fatalf("prefix of %d bytes: got %v", n, err)
				}
				checkStrict(raw[:n], obsSchema, "Observation")
				checkStrict(raw[:n], bundleSchema, "Bundle")
			}
		})
	}
}

// TestCombineSpecimenNote: contradictory specimen claims give
// SpecimenUnknown with a note naming each claim and its source, so that the
// refusal can say which blood each source named.
func TestCombineSpecimenNote(t *testing.T) {
	tests := []struct {
		name   string
		code   Specimen
		claims []Specimen
		want   Specimen
		note   string
	}{
		{"arterial_code_agreeing_specimen", SpecimenArterial, []Specimen{SpecimenArterial}, SpecimenArterial, ""},
		{"unspecified_code_arterial_specimen", SpecimenUnknown, []Specimen{SpecimenArterial}, SpecimenArterial, ""},
		{"unspecified_code_no_specimen", SpecimenUnknown, []Specimen{SpecimenUnknown}, SpecimenUnknown, ""},
		{"arterial_code_capillary_specimen", SpecimenArterial, []Specimen{SpecimenCapillary}, SpecimenUnknown, "specimen conflict: arterial (code), capillary (Specimen or panel)"},
		{"unspecified_code_venous_and_arterial_claims", SpecimenUnknown, []Specimen{SpecimenVenous, SpecimenArterial, SpecimenVenous}, SpecimenUnknown, "specimen conflict: venous (Specimen or panel), arterial (Specimen or panel)"},
		{"not_blood", SpecimenNone, []Specimen{SpecimenArterial}, SpecimenNone, ""},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got, note := combineSpecimenNote(tc.code, tc.claims...)
			if got != tc.want || note != tc.note {
				t.Errorf("got %q %q, want %q %q", got, note, tc.want, tc.note)
			}
		})
	}
}
