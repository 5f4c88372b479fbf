package fhirmap

import (
	"bytes"
	"encoding/json"
	"errors"
	"flag"
	"math"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/physio"
)

// The -update flag is shared by every golden test of the package; whichever
// test file's init runs first defines it.
func init() {
	if flag.Lookup("update") == nil {
		flag.Bool("update", false, "rewrite golden files under testdata/")
	}
}

func updatingGoldens() bool {
	f := flag.Lookup("update")
	return f != nil && f.Value.String() == "true"
}

// checkGolden compares got (compact JSON) with testdata/encode/name,
// stored indented for review; -update rewrites it.
func checkGolden(t *testing.T, name string, got []byte) {
	t.Helper()
	var pretty bytes.Buffer
	if err := json.Indent(&pretty, got, "", "  "); err != nil {
		t.Fatalf("%s: output is not JSON: %v", name, err)
	}
	pretty.WriteByte('\n')
	path := filepath.Join("testdata", "encode", name)
	if updatingGoldens() {
		if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, pretty.Bytes(), 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("read golden (run go test -run %s -update): %v", t.Name(), err)
	}
	if !bytes.Equal(pretty.Bytes(), want) {
		t.Errorf("%s differs from the golden file; review the diff and run with -update if intended\ngot:\n%s", path, pretty.Bytes())
	}
}

// goldenSite is the default site with an apparatus dead space of 50 mL and
// a target PaCO2 of 40 mm[Hg], so that every kind is derived.
func goldenSite() Site {
	s := DefaultSite()
	s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 50, true
	s.TargetPaCO2mmHg = DefaultTargetPaCO2mmHg
	return s
}

// goldenFacts is the reference vector with a measured PECO2 of 17.26 mm[Hg],
// the value the vector implies (physiology.md section 2: PECO2 = K x VCO2 /
// VE = 17.26 [derived]), so that every kind is derived.
func goldenFacts() []Fact {
	return append(vectorFacts(), newFact("peco2-1", QPECO2, 17.26, -5*time.Minute))
}

func goldenDerivations(t *testing.T) ([]Derivation, []Refusal) {
	t.Helper()
	ds, rs := DeriveAll(goldenFacts(), goldenSite())
	if len(ds) != len(Catalogue) {
		t.Fatalf("%d derivations, want every kind (%d); refusals %+v", len(ds), len(Catalogue), rs)
	}
	return ds, rs
}

var recordedAt = time.Date(2026, 3, 2, 8, 3, 0, 0, time.UTC)

// retractionOf is what the service publishes when the blood gas of d is
// entered in error: the same id, a new version, status entered-in-error.
func retractionOf(d Derivation) Derivation {
	d.Status = StatusEnteredInError
	d.Retracted = ReasonEnteredInError
	d.Seal()
	return d
}

func TestEncodeObservationGolden(t *testing.T) {
	ds, _ := goldenDerivations(t)
	site := goldenSite()
	for _, d := range ds {
		t.Run(d.Kind, func(t *testing.T) {
			b, err := EncodeObservation(d, 1, site)
			if err != nil {
				t.Fatal(err)
			}
			checkGolden(t, "observation-"+d.Kind+".json", b)
			checkObservation(t, b, d, site)
		})
	}
	t.Run("retraction", func(t *testing.T) {
		r := retractionOf(ds[0])
		b, err := EncodeObservation(r, 2, site)
		if err != nil {
			t.Fatal(err)
		}
		checkGolden(t, "observation-retraction.json", b)
		var obs map[string]any
		if err := json.Unmarshal(b, &obs); err != nil {
			t.Fatal(err)
		}
		if obs["status"] != "entered-in-error" || obs["id"] != ds[0].ID {
			t.Errorf("status %v id %v", obs["status"], obs["id"])
		}
		if _, has := obs["valueQuantity"]; has {
			t.Errorf("a retraction carries no value")
		}
		if !strings.Contains(string(b), "Entered in error") || !strings.Contains(string(b), ReasonEnteredInError) {
			t.Errorf("retraction note does not say why")
		}
	})
}

// checkObservation checks the FHIR R4 elements the task requires, beyond
// the golden comparison.
func checkObservation(t *testing.T, b []byte, d Derivation, site Site) {
	t.Helper()
	var obs struct {
		ResourceType string
		ID           string
		Meta         struct {
			VersionID string
			Security  []struct{ System, Code string }
			Tag       []struct{ System, Code string }
		}
		Status   string
		Category []struct {
			Coding []struct{ System, Code string }
		}
		Code struct {
			Coding []struct{ System, Code string }
		}
		ValueQuantity struct {
			Value              json.Number
			System, Code, Unit string
		}
		EffectiveDateTime string
		DerivedFrom       []struct{ Reference string }
		Note              []struct{ Text string }
		Interpretation    []struct{ Text string }
		Text              struct{ Div string }
	}
	if err := json.Unmarshal(b, &obs); err != nil {
		t.Fatal(err)
	}
	if obs.ResourceType != "Observation" || obs.ID != d.ID || obs.Meta.VersionID != "1" || obs.Status != string(d.Status) {
		t.Errorf("identity: %s %s v%s %s", obs.ResourceType, obs.ID, obs.Meta.VersionID, obs.Status)
	}
	// HL7 v3 ObservationValue DEVAST (FHIR R4 security labels) plus the service's advisory tag.
	if len(obs.Meta.Security) != 1 || obs.Meta.Security[0].System != "http://terminology.hl7.org/CodeSystem/v3-ObservationValue" || obs.Meta.Security[0].Code != "DEVAST" {
		t.Errorf("security %+v", obs.Meta.Security)
	}
	if len(obs.Meta.Tag) != 1 || obs.Meta.Tag[0].System != site.CodeSystemURL || obs.Meta.Tag[0].Code != "advisory" {
		t.Errorf("tag %+v", obs.Meta.Tag)
	}
	if obs.Code.Coding[0].System != site.CodeSystemURL || obs.Code.Coding[0].Code != d.Kind {
		t.Errorf("code %+v", obs.Code)
	}
	// UCUM in the coded field: system http://unitsofmeasure.org (FHIR R4
	// Quantity), code the kind's UCUM unit, never the non-UCUM "mmHg".
	if obs.ValueQuantity.System != "http://unitsofmeasure.org" || obs.ValueQuantity.Code != KindUnit(d.Kind) || obs.ValueQuantity.Unit == "mmHg" {
		t.Errorf("valueQuantity %+v", obs.ValueQuantity)
	}
	// Display units in text for people (notes, interpretation text,
	// narrative): mmHg and °C, not the UCUM codes mm[Hg] and Cel
	// [common practice]; and no source marked as recalled from memory.
	texts := []string{obs.Text.Div}
	for _, n := range obs.Note {
		texts = append(texts, n.Text)
	}
	for _, in := range obs.Interpretation {
		texts = append(texts, in.Text)
	}
	for _, tx := range texts {
		if strings.Contains(tx, "mm[Hg]") || regexp.MustCompile(`\bCel\b`).MatchString(tx) || strings.Contains(tx, "[memory") {
			t.Errorf("text for people holds a UCUM code or a [memory] source: %q", tx)
		}
	}
	v, _ := obs.ValueQuantity.Value.Float64()
	if k, _ := LookupKind(d.Kind); math.Abs(v-d.Result.Value) > 0.5*math.Pow10(-k.Decimals)+1e-12 {
		t.Errorf("value %v far from %v at %d decimals", v, d.Result.Value, k.Decimals)
	}
	if obs.EffectiveDateTime != "2026-03-02T08:00:00Z" {
		t.Errorf("effective %s", obs.EffectiveDateTime)
	}
	wantFrom := map[string]bool{}
	for _, in := range d.Inputs {
		if strings.HasPrefix(in.Fact.Resource, "Observation/") {
			wantFrom[in.Fact.Resource] = true
		}
	}
	if len(obs.DerivedFrom) != len(wantFrom) {
		t.Errorf("derivedFrom %v, want %v", obs.DerivedFrom, wantFrom)
	}
	for _, r := range obs.DerivedFrom {
		if !wantFrom[r.Reference] {
			t.Errorf("derivedFrom %s not an input Observation", r.Reference)
		}
	}
	var notes strings.Builder
	for _, n := range obs.Note {
		notes.WriteString(n.Text + "\n")
	}
	for _, want := range []string{"not an order", "Formula:", "Inputs:", "5 min before the blood gas", d.Algorithm} {
		if !strings.Contains(notes.String(), want) {
			t.Errorf("notes lack %q", want)
		}
	}
	hasProcedure := false
	for _, c := range obs.Category {
		for _, cd := range c.Coding {
			hasProcedure = hasProcedure || cd.System == "http://terminology.hl7.org/CodeSystem/observation-category" && cd.Code == "procedure"
		}
	}
	if !hasProcedure {
		t.Errorf("category %+v lacks observation-category procedure", obs.Category)
	}
}

func TestEncodeObservationErrors(t *testing.T) {
	ds, _ := goldenDerivations(t)
	good := ds[0]
	tests := []struct {
		name    string
		change  func(*Derivation)
		version int
	}{
		{"unknown_kind", func(d *Derivation) { d.Kind = "nope" }, 1},
		{"empty_id", func(d *Derivation) { d.ID = "" }, 1},
		{"version_0", func(d *Derivation) {}, 0},
		{"no_patient", func(d *Derivation) { d.Patient = "" }, 1},
		{"no_effective_time", func(d *Derivation) { d.Effective = time.Time{} }, 1},
		{"NaN_value", func(d *Derivation) { d.Result.Value = math.NaN() }, 1},
		{"Inf_value", func(d *Derivation) { d.Result.Value = math.Inf(1) }, 1},
		{"status_not_FHIR", func(d *Derivation) { d.Status = "done" }, 1},
		{"unit_not_the_kinds", func(d *Derivation) { d.Result.Unit = "%" }, 1},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			d := good
			tc.change(&d)
			if _, err := EncodeObservation(d, tc.version, goldenSite()); !errors.Is(err, ErrEncode) {
				t.Errorf("err %v, want ErrEncode", err)
			}
		})
	}
}

func TestEncodeProvenanceGolden(t *testing.T) {
	ds, _ := goldenDerivations(t)
	d := ds[0]
	tests := []struct {
		name     string
		d        Derivation
		version  int
		activity string
		lastRole string
	}{
		{"provenance-v1.json", d, 1, "CREATE", "derivation"},
		{"provenance-v2.json", d, 2, "UPDATE", "revision"},
		{"provenance-retraction.json", retractionOf(d), 3, "NULLIFY", "removal"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			b, err := EncodeProvenance(tc.d, tc.version, recordedAt, goldenSite())
			if err != nil {
				t.Fatal(err)
			}
			checkGolden(t, tc.name, b)
			var p struct {
				ID       string
				Target   []struct{ Reference string }
				Recorded string
				Policy   []string
				Activity struct {
					Coding []struct{ System, Code string }
				}
				Agent []struct {
					Type struct{ Coding []struct{ Code string } }
					Who  struct{ Reference string }
				}
				Entity []struct {
					Role string
					What struct{ Reference string }
				}
			}
			if err := json.Unmarshal(b, &p); err != nil {
				t.Fatal(err)
			}
			if p.ID != ProvenanceID(tc.d.Key, tc.version) {
				t.Errorf("id %s", p.ID)
			}
			if want := "Observation/" + tc.d.ID + "/_history/" + string(rune('0'+tc.version)); p.Target[0].Reference != want {
				t.Errorf("target %s, want %s", p.Target[0].Reference, want)
			}
			if p.Recorded != "2026-03-02T08:03:00Z" || p.Policy[0] != DefaultAlgorithmURL+"/"+Algorithm {
				t.Errorf("recorded %s policy %v", p.Recorded, p.Policy)
			}
			if p.Activity.Coding[0].System != "http://terminology.hl7.org/CodeSystem/v3-DataOperation" || p.Activity.Coding[0].Code != tc.activity {
				t.Errorf("activity %+v, want %s", p.Activity, tc.activity)
			}
			if p.Agent[0].Type.Coding[0].Code != "assembler" || p.Agent[0].Who.Reference != DefaultDevice {
				t.Errorf("agent %+v", p.Agent)
			}
			if len(p.Entity) != len(tc.d.Inputs)+min(tc.version-1, 1) || p.Entity[len(p.Entity)-1].Role != tc.lastRole {
				t.Errorf("entities %+v", p.Entity)
			}
		})
	}
	if _, err := EncodeProvenance(d, 1, time.Time{}, goldenSite()); !errors.Is(err, ErrEncode) {
		t.Errorf("zero recorded time: err %v", err)
	}
}

func TestEncodeOutcomeGolden(t *testing.T) {
	_, rs := DeriveAll(append(vectorFacts(), arterial("vbg-2", 52, specimen(SpecimenVenous), func(f *Fact) {
		f.Code = Coding{System: "http://loinc.org", Code: "2021-4"}
		f.Effective = t0.Add(time.Hour)
	})), DefaultSite())
	b, err := EncodeOutcome(rs)
	if err != nil {
		t.Fatal(err)
	}
	checkGolden(t, "outcome.json", b)
	var oo struct {
		Issue []struct {
			Severity, Code string
			Details        struct{ Text string }
			Expression     []string
		}
	}
	if err := json.Unmarshal(b, &oo); err != nil {
		t.Fatal(err)
	}
	if len(oo.Issue) != len(rs) {
		t.Fatalf("%d issues for %d refusals", len(oo.Issue), len(rs))
	}
	for i, is := range oo.Issue {
		if is.Severity != "information" || !strings.Contains(is.Details.Text, rs[i].Reason) || len(is.Expression) != 1 {
			t.Errorf("issue %d: %+v", i, is)
		}
		wantCode := "business-rule"
		switch {
		case strings.HasPrefix(rs[i].Reason, "no-"):
			wantCode = "incomplete"
		case rs[i].Reason == ReasonApparatusNotSet, rs[i].Reason == ReasonTargetNotSet:
			wantCode = "processing" // a site configuration gap
		}
		if is.Code != wantCode {
			t.Errorf("issue %d (%s): code %s, want %s", i, rs[i].Reason, is.Code, wantCode)
		}
	}
	empty, err := EncodeOutcome(nil)
	if err != nil {
		t.Fatal(err)
	}
	checkGolden(t, "outcome-empty.json", empty)
}

func TestEncodeBundleGolden(t *testing.T) {
	ds, _ := goldenDerivations(t)
	_, rs := DeriveAll(vectorFacts(), DefaultSite())
	b, err := EncodeBundle(ds[:2], []int{1, 2}, rs, recordedAt, goldenSite())
	if err != nil {
		t.Fatal(err)
	}
	checkGolden(t, "bundle.json", b)
	again, _ := EncodeBundle(ds[:2], []int{1, 2}, rs, recordedAt, goldenSite())
	if !bytes.Equal(b, again) {
		t.Errorf("bundle not deterministic")
	}
	var bundle struct {
		ResourceType, Type, Timestamp string
		Entry                         []struct {
			FullURL  string
			Resource struct{ ResourceType, ID string }
		}
	}
	if err := json.Unmarshal(b, &bundle); err != nil {
		t.Fatal(err)
	}
	if bundle.ResourceType != "Bundle" || bundle.Type != "collection" || bundle.Timestamp != "2026-03-02T08:03:00Z" {
		t.Errorf("bundle %s %s %s", bundle.ResourceType, bundle.Type, bundle.Timestamp)
	}
	wantTypes := []string{"Observation", "Provenance", "Observation", "Provenance", "OperationOutcome"}
	if len(bundle.Entry) != len(wantTypes) {
		t.Fatalf("%d entries, want %d", len(bundle.Entry), len(wantTypes))
	}
	for i, e := range bundle.Entry {
		if e.Resource.ResourceType != wantTypes[i] || e.FullURL != "urn:uuid:"+e.Resource.ID {
			t.Errorf("entry %d: %s %s %s", i, e.Resource.ResourceType, e.FullURL, e.Resource.ID)
		}
	}
	if _, err := EncodeBundle(ds, []int{1}, nil, recordedAt, goldenSite()); !errors.Is(err, ErrEncode) {
		t.Errorf("mismatched versions: err %v", err)
	}
}

func TestCodeSystemGolden(t *testing.T) {
	b, err := CodeSystem(DefaultSite())
	if err != nil {
		t.Fatal(err)
	}
	checkGolden(t, "codesystem.json", b)
	var cs struct {
		URL, Content string
		Count        int
		Concept      []struct {
			Code, Display, Definition string
			Property                  []map[string]any
		}
	}
	if err := json.Unmarshal(b, &cs); err != nil {
		t.Fatal(err)
	}
	if cs.URL != DefaultCodeSystemURL || cs.Content != "complete" || cs.Count != len(cs.Concept) || cs.Count != len(Catalogue)+4 { // + tag, category and the two airway-model codes
		t.Errorf("url %s content %s count %d concepts %d", cs.URL, cs.Content, cs.Count, len(cs.Concept))
	}
	// The airway-model codes are the physio.AnatomicModel names, which the
	// decoder reads back (airwayModel) and the --anatomic-dead-space flag takes.
	if n := len(cs.Concept); n >= 2 && (cs.Concept[n-2].Code != physio.AnatomicArtificialAirway.String() || cs.Concept[n-1].Code != physio.AnatomicWholeAirway.String()) {
		t.Errorf("airway-model codes %s, %s", cs.Concept[n-2].Code, cs.Concept[n-1].Code)
	}
	for i, k := range Catalogue {
		c := cs.Concept[i]
		if c.Code != k.Code || c.Definition == "" || c.Display == "" {
			t.Errorf("concept %d: %+v", i, c)
		}
		for _, p := range c.Property {
			if len(p) != 2 {
				t.Errorf("concept %s property %v: want code and exactly one value[x]", c.Code, p)
			}
		}
	}
	other := DefaultSite()
	other.CodeSystemURL = "https://icu.example.net/fhir/CodeSystem/vd"
	b2, _ := CodeSystem(other)
	if !strings.Contains(string(b2), other.CodeSystemURL) {
		t.Errorf("configured URL not used")
	}
}

// TestCatalogueUnitsAreUCUM checks every output unit against the UCUM codes
// verified with the reference UCUM library @lhncbc/ucum-lhc 7.1.10
// (shared/reference/codes.md, "UCUM").
func TestCatalogueUnitsAreUCUM(t *testing.T) {
	valid := map[string]bool{"mm[Hg]": true, "kPa": true, "L/min": true, "mL/min": true, "mL": true, "L": true,
		"%": true, "1": true, "/min": true, "kg": true, "cm": true}
	seen := map[string]bool{}
	for _, k := range Catalogue {
		if !valid[k.Unit] {
			t.Errorf("%s: unit %q not in the verified UCUM list", k.Code, k.Unit)
		}
		if seen[k.Code] {
			t.Errorf("duplicate code %s", k.Code)
		}
		seen[k.Code] = true
		if k.Formula == "" || k.Source == "" || k.Refused == "" || k.Definition == "" {
			t.Errorf("%s: incomplete catalogue entry", k.Code)
		}
	}
}

func TestUnescapeHTML(t *testing.T) {
	tests := []struct{ name, in, want string }{
		{"less_than", `"a \u003c b"`, `"a < b"`},
		{"all_three", `"\u003cdiv\u003e \u0026"`, `"<div> &"`},
		{"escaped_backslash_then_u003c_kept", `"\\u003c"`, `"\\u003c"`},
		{"other_escapes_kept", `"\u00e9 \" \n"`, `"\u00e9 \" \n"`},
		{"nothing_to_do", `{"a":1}`, `{"a":1}`},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got := string(unescapeHTML([]byte(tc.in)))
			if got != tc.want {
				t.Errorf("got %s, want %s", got, tc.want)
			}
			var a, b any
			if json.Unmarshal([]byte(tc.in), &a) != nil || json.Unmarshal([]byte(got), &b) != nil {
				t.Fatalf("not JSON")
			}
			if ja, _ := json.Marshal(a); string(ja) != mustJSON(b) {
				t.Errorf("meaning changed: %v vs %v", a, b)
			}
		})
	}
}

func mustJSON(v any) string {
	b, _ := json.Marshal(v)
	return string(b)
}

func TestSiteValidate(t *testing.T) {
	tests := []struct {
		name   string
		change func(*Site)
		ok     bool
	}{
		{"default_ok", func(*Site) {}, true},
		{"apparatus_50_mL_ok", func(s *Site) { s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 50, true }, true},
		{"apparatus_0_mL_ok", func(s *Site) { s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 0, true }, true},
		{"apparatus_900_mL_refused", func(s *Site) { s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 900, true }, false},
		{"target_15_mmHg_refused", func(s *Site) { s.TargetPaCO2mmHg = 15 }, false},
		{"target_0_not_configured_ok", func(s *Site) { s.TargetPaCO2mmHg = 0 }, true},
		{"target_55_mmHg_ok", func(s *Site) { s.TargetPaCO2mmHg = 55 }, true},
		{"target_negative_refused", func(s *Site) { s.TargetPaCO2mmHg = -40 }, false},
		{"rq_0_refused", func(s *Site) { s.RQ = 0 }, false},
		{"energy_zero_refused", func(s *Site) { s.Energy = 0 }, false},
		{"relative_url_refused", func(s *Site) { s.CodeSystemURL = "CodeSystem/x" }, false},
		{"device_not_a_device_refused", func(s *Site) { s.Device = "Patient/x" }, false},
		{"empty_window_refused", func(s *Site) { s.Window = Window{} }, false},
		{"zero_site_refused", func(s *Site) { *s = Site{} }, false},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			s := DefaultSite()
			tc.change(&s)
			if err := s.Validate(); (err == nil) != tc.ok {
				t.Errorf("Validate() = %v, want ok %v", err, tc.ok)
			}
		})
	}
}
