package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"io"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/ventderive/ventderive/fhirmap"
)

func init() {
	if flag.Lookup("update") == nil {
		flag.Bool("update", false, "rewrite golden files under testdata/")
	}
}

func deriveUpdating() bool {
	f := flag.Lookup("update")
	return f != nil && f.Value.String() == "true"
}

const deriveDir = "testdata/derive"

// runDeriveCmd runs "ventderive derive args..." with stdin as given.
func runDeriveCmd(t *testing.T, stdin io.Reader, args ...string) (stdout, stderr string, err error) {
	t.Helper()
	var out, errOut bytes.Buffer
	if stdin == nil {
		stdin = strings.NewReader("")
	}
	e := env{getenv: func(string) string { return "" }, stdin: stdin, stdout: &out, stderr: &errOut}
	err = run(context.Background(), append([]string{"derive"}, args...), e)
	return out.String(), errOut.String(), err
}

func inDeriveDir(names ...string) []string {
	out := make([]string, len(names))
	for i, n := range names {
		out[i] = filepath.Join(deriveDir, n)
	}
	return out
}

func checkDeriveGolden(t *testing.T, name, got string) {
	t.Helper()
	path := filepath.Join(deriveDir, name)
	if deriveUpdating() {
		if err := os.WriteFile(path, []byte(got), 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("read golden (run with -update): %v", err)
	}
	if got != string(want) {
		t.Errorf("%s differs from the golden file; review and run with -update if intended\ngot:\n%s", path, got)
	}
}

// The README example: two invented patients, a Bundle and an NDJSON feed,
// apparatus dead space 50 mL, the site's target PaCO2 40 mm[Hg], a fixed
// recorded time.
var exampleArgs = append([]string{"--apparatus-dead-space-ml", "50", "--target-paco2", "40", "--recorded", "2026-11-20T15:00:00Z"},
	inDeriveDir("icu-morning.json", "ward-feed.ndjson")...)

func TestDeriveCommandGolden(t *testing.T) {
	tests := []struct {
		name   string
		args   []string
		golden string
	}{
		{"bundle", exampleArgs, "example.bundle.golden.json"},
		{"explain", append([]string{"--explain"}, exampleArgs...), "example.explain.golden.txt"},
		{"aliases_give_enghoff_from_site_code", append([]string{"--aliases", filepath.Join(deriveDir, "hv-aliases.jsonl"), "--explain", "--recorded", "2026-11-20T15:00:00Z"},
			inDeriveDir("icu-morning.json", "capnography.ndjson")...), "aliases.explain.golden.txt"},
		// A patient's PaCO2 Goal (range 50-60 mmHg) over the site's target
		// and the circuit's apparatus dead space (aliased Observation, 0.09 L)
		// over the site's setting.
		{"goal_and_circuit_override_site", append([]string{"--aliases", filepath.Join(deriveDir, "hv-aliases.jsonl"), "--explain",
			"--apparatus-dead-space-ml", "50", "--target-paco2", "40", "--recorded", "2026-11-20T15:00:00Z"},
			inDeriveDir("icu-morning.json", "goal-and-circuit.ndjson")...), "goal-and-circuit.explain.golden.txt"},
		// The patient's recorded airway (aliased Observation, SNOMED CT
		// 129121000 tracheostomy tube) over the site's whole-airway model:
		// hv-p001's predicted PaCO2 at 07:00 UTC uses 0.948 mL/kg PBW (Nunn,
		// Campbell & Peckett 1959 [published]): 22.53 mmHg, where the site's
		// 2.2 mL/kg (Radford 1955 [published]) would give 29.28 mmHg
		// [derived: see fhirmap TestAirwayFromInput].
		{"airway_overrides_site", append([]string{"--aliases", filepath.Join(deriveDir, "hv-aliases.jsonl"), "--explain",
			"--anatomic-dead-space", "whole-airway", "--apparatus-dead-space-ml", "50", "--recorded", "2026-11-20T15:00:00Z"},
			inDeriveDir("icu-morning.json", "airway.ndjson")...), "airway.explain.golden.txt"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			out, errOut, err := runDeriveCmd(t, nil, tc.args...)
			if err != nil {
				t.Fatalf("derive: %v\n%s", err, errOut)
			}
			checkDeriveGolden(t, tc.golden, out)
		})
	}
}

// TestDeriveCommandBundle checks the Bundle's content against the example's
// design: patient 1's first gas is the reference vector (physiology.md
// section 11: VD/VT 0.616 with K 0.863 [derived]); the venous gas, the gas
// of unspecified blood and the gas with stale ventilator data are refused
// for every kind with their reasons.
func TestDeriveCommandBundle(t *testing.T) {
	out, errOut, err := runDeriveCmd(t, nil, exampleArgs...)
	if err != nil {
		t.Fatalf("derive: %v\n%s", err, errOut)
	}
	var b struct {
		ResourceType, Type string
		Entry              []struct {
			Resource json.RawMessage
		}
	}
	if err := json.Unmarshal([]byte(out), &b); err != nil {
		t.Fatal(err)
	}
	if b.ResourceType != "Bundle" || b.Type != "collection" {
		t.Fatalf("not a collection Bundle: %s %s", b.ResourceType, b.Type)
	}
	counts := map[string]int{}
	var vdvt string
	reasons := map[string]int{}
	for _, e := range b.Entry {
		var r struct {
			ResourceType string
			Code         struct{ Coding []struct{ Code string } }
			Subject      struct{ Reference string }
			Effective    string                      `json:"effectiveDateTime"`
			Value        struct{ Value json.Number } `json:"valueQuantity"`
			Issue        []struct{ Details struct{ Text string } }
		}
		if err := json.Unmarshal(e.Resource, &r); err != nil {
			t.Fatal(err)
		}
		counts[r.ResourceType]++
		if r.ResourceType == "Observation" && r.Code.Coding[0].Code == fhirmap.KindDeadSpaceVCO2 && r.Effective == "2026-11-20T07:00:00Z" {
			vdvt = r.Value.Value.String()
		}
		for _, is := range r.Issue {
			for _, reason := range []string{fhirmap.ReasonVenous, fhirmap.ReasonUnknownSpecimen, fhirmap.ReasonNoVentilatorData} {
				if strings.Contains(is.Details.Text, ": "+reason+":") {
					reasons[reason]++
				}
			}
		}
	}
	if counts["Observation"] == 0 || counts["Observation"] != counts["Provenance"] || counts["OperationOutcome"] != 1 {
		t.Errorf("entries %v: want Observations, one Provenance each, one OperationOutcome", counts)
	}
	if vdvt != "0.616" {
		t.Errorf("VD/VT of the reference gas %q, want 0.616 (physiology.md s11, K 0.863 [derived])", vdvt)
	}
	for _, reason := range []string{fhirmap.ReasonVenous, fhirmap.ReasonUnknownSpecimen, fhirmap.ReasonNoVentilatorData} {
		if reasons[reason] != len(fhirmap.Catalogue) {
			t.Errorf("%d issues with %s, want one per kind (%d)", reasons[reason], reason, len(fhirmap.Catalogue))
		}
	}
}

func TestDeriveCommandStdin(t *testing.T) {
	raw, err := os.ReadFile(filepath.Join(deriveDir, "ward-feed.ndjson"))
	if err != nil {
		t.Fatal(err)
	}
	args := []string{"--recorded", "2026-11-20T15:00:00Z"}
	fromFile, _, err := runDeriveCmd(t, nil, append(args, filepath.Join(deriveDir, "ward-feed.ndjson"))...)
	if err != nil {
		t.Fatal(err)
	}
	fromStdin, _, err := runDeriveCmd(t, bytes.NewReader(raw), append(args, "-")...)
	if err != nil {
		t.Fatal(err)
	}
	if fromFile != fromStdin {
		t.Errorf("stdin output differs from file output")
	}
}

func TestDeriveCommandErrors(t *testing.T) {
	tests := []struct {
		name  string
		args  []string
		usage bool
		want  []string // substrings of the error
	}{
		{"malformed_input_names_file_entry_field", inDeriveDir("malformed.json"), false, []string{"malformed.json", "entry[2]", "subject", "missing-field"}},
		{"missing_file", inDeriveDir("absent.json"), false, []string{"absent.json"}},
		{"bad_alias_file", append([]string{"--aliases", filepath.Join(deriveDir, "icu-morning.json")}, inDeriveDir("icu-morning.json")...), false, []string{"aliases"}},
		{"no_files", nil, true, nil},
		{"unknown_flag", []string{"--nope", "x.json"}, true, nil},
		{"bad_recorded_time", []string{"--recorded", "yesterday", "x.json"}, true, nil},
		{"negative_window", []string{"--window-before", "-5m", "x.json"}, true, nil},
		{"apparatus_900_mL", []string{"--apparatus-dead-space-ml", "900", "x.json"}, true, nil},
		{"target_10_mmHg", []string{"--target-paco2", "10", "x.json"}, true, nil},
		{"target_negative", []string{"--target-paco2", "-40", "x.json"}, true, nil},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			out, _, err := runDeriveCmd(t, nil, tc.args...)
			if err == nil {
				t.Fatalf("no error; output %q", out)
			}
			if errors.Is(err, errUsage) != tc.usage {
				t.Errorf("err %v: usage error = %v, want %v", err, errors.Is(err, errUsage), tc.usage)
			}
			for _, w := range tc.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("error %q does not name %q", err, w)
				}
			}
			if out != "" {
				t.Errorf("partial output written: %q", out)
			}
		})
	}
}

// TestDeriveCommandTarget: without --target-paco2 (or with 0) no target is
// assumed and the for-target kinds are refused with their reason; with it
// the advice names the site's target.
func TestDeriveCommandTarget(t *testing.T) {
	files := inDeriveDir("icu-morning.json", "ward-feed.ndjson")
	base := []string{"--explain", "--apparatus-dead-space-ml", "50", "--recorded", "2026-11-20T15:00:00Z"}
	for _, tc := range []struct {
		name    string
		flags   []string
		refused bool
	}{
		{"unset_not_configured", nil, true},
		{"zero_not_configured", []string{"--target-paco2", "0"}, true},
		{"55_mmHg_configured", []string{"--target-paco2", "55"}, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			out, errOut, err := runDeriveCmd(t, nil, append(append(append([]string(nil), base...), tc.flags...), files...)...)
			if err != nil {
				t.Fatalf("derive: %v\n%s", err, errOut)
			}
			refused := strings.Contains(out, fhirmap.KindRateForTarget+"  ") && strings.Contains(out, fhirmap.ReasonTargetNotSet)
			if refused != tc.refused {
				t.Errorf("for-target refused with %s: %v, want %v", fhirmap.ReasonTargetNotSet, refused, tc.refused)
			}
			if tc.refused && !strings.Contains(out, "target PaCO2 not configured") {
				t.Errorf("header does not say the target is not configured")
			}
			if !tc.refused && !strings.Contains(out, "target PaCO2 55 mmHg is the site's configured target: no PaCO2 Goal of the patient is in force") {
				t.Errorf("advice does not name the site's target")
			}
		})
	}
}

// TestDeriveCommandExplainShowsInterpretation: every derived row of a kind
// with a reading carries its code (or "-") and an Interpretation line with
// the text and source; reference vector VD/VT 0.616 is H, above the 0.58
// mean at ARDS onset (Nuckton 2002 [published]).
func TestDeriveCommandExplainShowsInterpretation(t *testing.T) {
	out, errOut, err := runDeriveCmd(t, nil, append([]string{"--explain"}, exampleArgs...)...)
	if err != nil {
		t.Fatalf("derive: %v\n%s", err, errOut)
	}
	derived, _, ok := strings.Cut(out, "\nREFUSED (")
	if !ok {
		t.Fatalf("no REFUSED section")
	}
	lines := strings.Split(derived, "\n")
	found := false
	for i, l := range lines {
		f := strings.Fields(l)
		if len(f) < 6 || !strings.HasPrefix(f[0], "Patient/") {
			continue
		}
		kind := f[2]
		switch kind {
		case fhirmap.KindDeadSpaceVCO2, fhirmap.KindDeadSpaceEstimated, fhirmap.KindDeadSpaceEnghoff, fhirmap.KindVentilatoryRatio,
			fhirmap.KindPaCO2PETCO2Gradient, fhirmap.KindAlveolarDeadSpace, fhirmap.KindPaCO2Discrepancy:
			if len(f) != 7 || i+1 >= len(lines) || !strings.HasPrefix(lines[i+1], "    Interpretation: ["+f[6]+"] ") {
				t.Errorf("row %q lacks its interpretation (next line %q)", l, lines[i+1])
			}
		default:
			if len(f) != 6 || strings.HasPrefix(lines[i+1], "    Interpretation:") {
				t.Errorf("row %q of a kind without reading shows an interpretation", l)
			}
		}
		if kind == fhirmap.KindDeadSpaceVCO2 && f[1] == "2026-11-20T07:00:00Z" {
			found = true
			if f[3] != "0.616" || f[6] != "H" || !strings.Contains(lines[i+1], "Nuckton") {
				t.Errorf("reference gas row %q / %q, want 0.616 H citing Nuckton", l, lines[i+1])
			}
		}
	}
	if !found {
		t.Errorf("reference gas VD/VT row not found")
	}
}

// TestDeriveCommandWindowFlags checks that the window flags reach the
// selection: with 60 min before, the stale readings of patient 2 (55 min
// before its 12:00 gas) are paired.
func TestDeriveCommandWindowFlags(t *testing.T) {
	args := []string{"--explain", "--window-before", "60m", "--recorded", "2026-11-20T15:00:00Z", filepath.Join(deriveDir, "ward-feed.ndjson")}
	out, _, err := runDeriveCmd(t, nil, args...)
	if err != nil {
		t.Fatal(err)
	}
	if strings.Contains(out, fhirmap.ReasonNoVentilatorData) {
		t.Errorf("a 60 min window still refused with %s", fhirmap.ReasonNoVentilatorData)
	}
	if !strings.Contains(out, "55 min before the blood gas") {
		t.Errorf("the 55 min old reading was not paired")
	}
}
