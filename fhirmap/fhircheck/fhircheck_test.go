package fhircheck

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/fhirmap"
)

// Example inputs of the derive command: two invented patients.
var inputs = []string{
	"../../cmd/ventderive/testdata/derive/icu-morning.json",
	"../../cmd/ventderive/testdata/derive/ward-feed.ndjson",
	"../../cmd/ventderive/testdata/derive/capnography.ndjson",
	"../../cmd/ventderive/testdata/derive/goal-and-circuit.ndjson",
}

const aliasFile = "../../cmd/ventderive/testdata/derive/hv-aliases.jsonl"

var recorded = time.Date(2026, 11, 20, 15, 0, 0, 0, time.UTC)

// site configures the apparatus dead space and a target PaCO2 (neither has
// a default), so that every kind is derived and checked.
func site() fhirmap.Site {
	s := fhirmap.DefaultSite()
	s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 50, true
	s.TargetPaCO2mmHg = fhirmap.DefaultTargetPaCO2mmHg
	return s
}

// derived decodes the example inputs through fhirmap (as the service would)
// and derives everything.
func derived(t *testing.T) ([]fhirmap.Derivation, []fhirmap.Refusal) {
	t.Helper()
	af, err := os.Open(aliasFile)
	if err != nil {
		t.Fatal(err)
	}
	defer af.Close()
	codes, err := fhirmap.DefaultCodes().WithAliases(af)
	if err != nil {
		t.Fatal(err)
	}
	var facts []fhirmap.Fact
	for _, name := range inputs {
		raw, err := os.ReadFile(name)
		if err != nil {
			t.Fatal(err)
		}
		d, err := fhirmap.DecodeFile(name, raw, codes)
		if err != nil {
			t.Fatal(err)
		}
		facts = append(facts, d.Facts...)
	}
	ds, rs := fhirmap.DeriveAll(facts, site())
	kinds := map[string]bool{}
	for _, d := range ds {
		kinds[d.Kind] = true
	}
	for _, k := range fhirmap.Catalogue {
		if !kinds[k.Code] {
			t.Fatalf("the example inputs do not derive %s: the check would not cover it", k.Code)
		}
	}
	if len(rs) == 0 {
		t.Fatal("the example inputs produce no refusal: the OperationOutcome would not be covered")
	}
	return ds, rs
}

func mustValid(t *testing.T, what string, b []byte, err error) {
	t.Helper()
	if err != nil {
		t.Fatalf("%s: encode: %v", what, err)
	}
	if err := Validate(b); err != nil {
		t.Errorf("%s: invalid FHIR R4: %v\n%s", what, err, b)
	}
}

// TestEmittedResourcesAreValidR4 validates every kind of resource the
// service emits, generated through the fhirmap API from FHIR input.
func TestEmittedResourcesAreValidR4(t *testing.T) {
	ds, rs := derived(t)
	s := site()
	for _, d := range ds {
		b, err := fhirmap.EncodeObservation(d, 1, s)
		mustValid(t, "Observation "+d.Kind+" "+d.BloodGas, b, err)
		b, err = fhirmap.EncodeProvenance(d, 1, recorded, s)
		mustValid(t, "Provenance v1 "+d.Kind, b, err)
	}
	// A later version (amended) and a retraction of the same derivation.
	amended := ds[0]
	amended.Status = fhirmap.StatusAmended
	amended.Seal()
	b, err := fhirmap.EncodeObservation(amended, 2, s)
	mustValid(t, "Observation amended", b, err)
	b, err = fhirmap.EncodeProvenance(amended, 2, recorded, s)
	mustValid(t, "Provenance v2", b, err)

	retracted := ds[0]
	retracted.Status = fhirmap.StatusEnteredInError
	retracted.Retracted = fhirmap.ReasonEnteredInError
	retracted.Seal()
	b, err = fhirmap.EncodeObservation(retracted, 3, s)
	mustValid(t, "Observation retraction", b, err)
	b, err = fhirmap.EncodeProvenance(retracted, 3, recorded, s)
	mustValid(t, "Provenance retraction", b, err)

	b, err = fhirmap.EncodeOutcome(rs)
	mustValid(t, "OperationOutcome", b, err)
	b, err = fhirmap.EncodeOutcome(nil)
	mustValid(t, "OperationOutcome without refusals", b, err)
	b, err = fhirmap.EncodeBundle(ds, nil, rs, recorded, s)
	mustValid(t, "Bundle", b, err)
	b, err = fhirmap.CodeSystem(s)
	mustValid(t, "CodeSystem", b, err)
}

// TestGoldenFilesAreValidR4 validates the golden outputs kept in the
// repository (they are what reviewers read and what deploy/ ships).
func TestGoldenFilesAreValidR4(t *testing.T) {
	var files []string
	for _, pattern := range []string{"../testdata/encode/*.json", "../../cmd/ventderive/testdata/derive/*.golden.json"} {
		m, err := filepath.Glob(pattern)
		if err != nil {
			t.Fatal(err)
		}
		files = append(files, m...)
	}
	if len(files) < 10 {
		t.Fatalf("found only %d golden files: %v", len(files), files)
	}
	for _, f := range files {
		t.Run(filepath.Base(f), func(t *testing.T) {
			b, err := os.ReadFile(f)
			if err != nil {
				t.Fatal(err)
			}
			if err := Validate(b); err != nil {
				t.Errorf("invalid FHIR R4: %v", err)
			}
		})
	}
}

// TestValidatorRejectsBrokenResources proves the check can fail: each case
// breaks one rule of FHIR R4 in an otherwise valid emitted Observation (or
// Provenance, Bundle), and the validator must reject it.
func TestValidatorRejectsBrokenResources(t *testing.T) {
	ds, rs := derived(t)
	s := site()
	obs, err := fhirmap.EncodeObservation(ds[0], 1, s)
	if err != nil {
		t.Fatal(err)
	}
	prov, err := fhirmap.EncodeProvenance(ds[0], 2, recorded, s)
	if err != nil {
		t.Fatal(err)
	}
	bundle, err := fhirmap.EncodeBundle(ds[:1], nil, rs[:1], recorded, s)
	if err != nil {
		t.Fatal(err)
	}
	if err := Validate(obs); err != nil {
		t.Fatalf("control Observation invalid: %v", err)
	}
	tests := []struct {
		name   string
		base   []byte
		mutate func(map[string]any)
	}{
		{"status_not_in_required_binding", obs, func(m map[string]any) { m["status"] = "done" }},
		{"code_missing_cardinality_1..1", obs, func(m map[string]any) { delete(m, "code") }},
		{"unknown_element", obs, func(m map[string]any) { m["valueMmHg"] = 45 }},
		{"decimal_as_string", obs, func(m map[string]any) { m["valueQuantity"].(map[string]any)["value"] = "0.6" }},
		{"dateTime_without_zone_and_bad_month", obs, func(m map[string]any) { m["effectiveDateTime"] = "2026-13-02T08:00:00" }},
		{"id_too_long_for_fhir_id", obs, func(m map[string]any) { m["id"] = strings.Repeat("a", 65) }},
		{"derivedFrom_points_at_Patient", obs, func(m map[string]any) {
			m["derivedFrom"] = []any{map[string]any{"reference": "Patient/hv-p001"}}
		}},
		{"two_value_types", obs, func(m map[string]any) { m["valueString"] = "0.6" }},
		{"provenance_without_agent", prov, func(m map[string]any) { delete(m, "agent") }},
		{"provenance_entity_role_unknown", prov, func(m map[string]any) {
			m["entity"].([]any)[0].(map[string]any)["role"] = "input"
		}},
		{"provenance_recorded_not_instant", prov, func(m map[string]any) { m["recorded"] = "2026-11-20" }},
		{"bundle_type_unknown", bundle, func(m map[string]any) { m["type"] = "bag" }},
		{"bundle_entry_observation_without_status", bundle, func(m map[string]any) {
			delete(m["entry"].([]any)[0].(map[string]any)["resource"].(map[string]any), "status")
		}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var m map[string]any
			if err := json.Unmarshal(tc.base, &m); err != nil {
				t.Fatal(err)
			}
			tc.mutate(m)
			b, err := json.Marshal(m)
			if err != nil {
				t.Fatal(err)
			}
			if err := Validate(b); err == nil {
				t.Errorf("broken resource accepted:\n%s", b)
			}
		})
	}
}

// TestExampleGoalInputIsValidR4: the example Goal (and circuit Observation)
// the service reads is valid FHIR R4 for an independent parser, so the
// accepted shape is the standard one, not a local dialect; and a Goal
// without its required lifecycleStatus, which fhirmap refuses, is invalid
// for it too (FHIR R4 Goal.lifecycleStatus 1..1 [published]).
func TestExampleGoalInputIsValidR4(t *testing.T) {
	raw, err := os.ReadFile("../../cmd/ventderive/testdata/derive/goal-and-circuit.ndjson")
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimSpace(string(raw)), "\n")
	if len(lines) < 2 || !strings.Contains(lines[0], `"resourceType":"Goal"`) {
		t.Fatalf("the example no longer starts with a Goal")
	}
	for i, l := range lines {
		if err := Validate([]byte(l)); err != nil {
			t.Errorf("line %d: invalid FHIR R4: %v", i+1, err)
		}
	}
	broken := strings.Replace(lines[0], `"lifecycleStatus":"active",`, "", 1)
	if Validate([]byte(broken)) == nil {
		t.Error("a Goal without lifecycleStatus passed the validator")
	}
}
