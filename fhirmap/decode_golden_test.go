package fhirmap

import (
	"bytes"
	"encoding/json"
	"errors"
	"flag"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"
)

// The golden flag is shared by every golden test of the package; it is
// defined here unless another test file of the package defined it first.
func init() {
	if flag.Lookup("update") == nil {
		flag.Bool("update", false, "rewrite golden files under testdata/")
	}
}

func updateGolden() bool {
	f := flag.Lookup("update")
	return f != nil && f.Value.String() == "true"
}

// goldenResource is Resource without the raw bytes (their digest is kept).
type goldenResource struct {
	Type, Reference, VersionID, Patient, Digest string
	Bytes                                       int
}

type goldenOutput struct {
	Error     *DecodeError     `json:",omitempty"`
	Resources []goldenResource `json:",omitempty"`
	Facts     []Fact           `json:",omitempty"`
	Ignored   []Ignored        `json:",omitempty"`
}

// decodeFixture decodes a fixture the way the service would: a .json file
// as one message (Decode), a .ndjson file as a file (DecodeFile).
func decodeFixture(name string, raw []byte, codes *CodeTable) (Decoded, error) {
	if strings.HasSuffix(name, ".ndjson") {
		return DecodeFile(name, raw, codes)
	}
	return Decode(raw, codes)
}

func goldenOf(d Decoded, err error) goldenOutput {
	var out goldenOutput
	if err != nil {
		de, ok := errors.AsType[*DecodeError](err)
		if !ok {
			de = &DecodeError{Reason: "not-a-decode-error", Detail: err.Error()}
		}
		out.Error = de
		return out
	}
	for _, r := range d.Resources {
		out.Resources = append(out.Resources, goldenResource{r.Type, r.Reference, r.VersionID, r.Patient, r.Digest, len(r.Raw)})
	}
	out.Facts, out.Ignored = d.Facts, d.Ignored
	return out
}

// TestDecodeGolden decodes every input under testdata/decode and compares
// the result with its .golden file. A fixture named refuse-<reason>-*.json
// must be refused with that reason code, any other must be accepted with
// every fact valid; so the golden files cannot silently record a wrong
// outcome. Regenerate with: go test ./fhirmap -run Golden -update
func TestDecodeGolden(t *testing.T) {
	inputs, err := filepath.Glob("testdata/decode/*.*json")
	if err != nil || len(inputs) == 0 {
		t.Fatalf("no fixtures: %v", err)
	}
	reasonsSeen := map[string]bool{}
	for _, in := range inputs {
		name := filepath.Base(in)
		t.Run(name, func(t *testing.T) {
			raw, err := os.ReadFile(in)
			if err != nil {
				t.Fatal(err)
			}
			d, derr := decodeFixture(name, raw, DefaultCodes())
			if want, ok := wantedReason(name); ok {
				de, isDE := errors.AsType[*DecodeError](derr)
				if !isDE {
					t.Fatalf("want refusal %q, got err=%v", want, derr)
				}
				if de.Reason != want {
					t.Fatalf("want refusal %q, got %q (%v)", want, de.Reason, derr)
				}
				reasonsSeen[want] = true
			} else {
				if derr != nil {
					t.Fatalf("want acceptance, got %v", derr)
				}
				for i, f := range d.Facts {
					if err := checkFact(f); err != nil {
						t.Errorf("fact %d (%s): %v", i, f.Key, err)
					}
				}
			}
			got, err := json.MarshalIndent(goldenOf(d, derr), "", "  ")
			if err != nil {
				t.Fatal(err)
			}
			got = append(got, '\n')
			golden := strings.TrimSuffix(in, filepath.Ext(in)) + ".golden"
			if updateGolden() {
				if err := os.WriteFile(golden, got, 0o644); err != nil {
					t.Fatal(err)
				}
				return
			}
			want, err := os.ReadFile(golden)
			if err != nil {
				t.Fatalf("read golden (run with -update to create): %v", err)
			}
			if !bytes.Equal(got, want) {
				t.Errorf("decoded output differs from %s (review, then -update):\n%s", golden, lineDiff(string(want), string(got)))
			}
		})
	}
	// Every stable reason that a fixture can show is shown by one.
	// (oversized and too-many-entries are generated in TestDecodeBounds.)
	for _, r := range []string{"malformed-json", "wrong-resource-type", "unknown-field", "missing-field",
		"duplicate-value", "unsupported-extension", "unknown-unit", "not-finite", "negative-value",
		"ambiguous-value", "bad-time", "bad-reference", "empty"} {
		if !reasonsSeen[r] && !t.Failed() {
			t.Errorf("no fixture refuses with %q", r)
		}
	}
}

// wantedReason reads the expected reason from a fixture name.
func wantedReason(name string) (string, bool) {
	rest, ok := strings.CutPrefix(name, "refuse-")
	if !ok {
		return "", false
	}
	rest = strings.TrimSuffix(rest, filepath.Ext(rest))
	for _, r := range []string{"malformed-json", "wrong-resource-type", "unknown-field", "missing-field",
		"duplicate-value", "unsupported-extension", "unknown-unit", "not-finite", "negative-value",
		"ambiguous-value", "bad-time", "bad-reference", "empty", "oversized", "too-many-entries"} {
		if rest == r || strings.HasPrefix(rest, r+"-") {
			return r, true
		}
	}
	return "unparsed-fixture-name", true
}

// lineDiff shows the first differing lines.
func lineDiff(want, got string) string {
	w, g := strings.Split(want, "\n"), strings.Split(got, "\n")
	var b strings.Builder
	shown := 0
	for i := 0; i < max(len(w), len(g)) && shown < 12; i++ {
		var wl, gl string
		if i < len(w) {
			wl = w[i]
		}
		if i < len(g) {
			gl = g[i]
		}
		if wl != gl {
			b.WriteString("line " + strconv.Itoa(i+1) + "\n  want: " + wl + "\n  got:  " + gl + "\n")
			shown++
		}
	}
	return b.String()
}

// checkFact is the validity check every decoded fact must pass.
func checkFact(f Fact) error {
	var errs []error
	bad := func(s string) { errs = append(errs, errors.New(s)) }
	if f.Key == "" || f.Resource == "" || !strings.HasPrefix(f.Key, f.Resource) {
		bad("key must start with the resource reference")
	}
	if !strings.HasPrefix(f.Patient, "Patient/") || !validID(strings.TrimPrefix(f.Patient, "Patient/")) {
		bad("patient must be Patient/<id>")
	}
	if !f.Quantity.known() {
		bad("unknown quantity")
	}
	if f.Unit != f.Quantity.Unit() {
		bad("unit is not the canonical unit")
	}
	if !f.Status.valid() {
		bad("invalid status")
	}
	if len(f.Digest) != 64 || strings.Trim(f.Digest, "0123456789abcdef") != "" {
		bad("digest is not hex SHA-256")
	}
	if f.Value != f.Value || f.Value > 1e300 || f.Value < -1e300 {
		bad("value not finite")
	}
	if f.Value < 0 && !f.Quantity.negativeAllowed() {
		bad("negative value")
	}
	if f.Quantity == QTargetPaCO2 {
		// A goal's Text holds its range's bounds, or nothing for a value;
		// its Effective is the startDate, zero when it has none.
		if lo, hi, ok := GoalRange(f); f.Text != "" && (!ok || lo > hi || f.Value != (lo+hi)/2) {
			bad("goal range text and midpoint disagree")
		}
		if !strings.HasPrefix(f.Resource, "Goal/") {
			bad("target PaCO2 not from a Goal")
		}
	} else {
		if f.Quantity.coded() != (f.Text != "") && !f.Status.Retracts() {
			bad("text must be set exactly for coded quantities")
		}
		patientLevel := strings.HasPrefix(f.Resource, "Patient/")
		if patientLevel != f.Effective.IsZero() {
			bad("effective must be set for observations and zero for patient attributes")
		}
	}
	if !f.Effective.IsZero() && f.Effective.Location() != time.UTC {
		bad("effective not UTC")
	}
	if f.Quantity == QFiO2 && !f.Status.Retracts() && (f.Value < fio2RoomAir || f.Value > fio2Max) {
		bad("fio2 outside [0.21, 1]")
	}
	if f.Code.Code == "" {
		bad("no code")
	}
	if f.Specimen != SpecimenNone && !slices.Contains([]Specimen{SpecimenArterial, SpecimenVenous, SpecimenCapillary, SpecimenMixedVenous, SpecimenUnknown}, f.Specimen) {
		bad("invalid specimen")
	}
	return errors.Join(errs...)
}
