package fhirmap

import (
	"os"
	"strings"
	"testing"
)

// referenceCodes is the code list of shared reference codes.md (LOINC-2.80,
// GECCO, MII-ICU), with the quantity, origin and specimen each one must map
// to and a unit from its "usual unit" column, which must be accepted.
var referenceCodes = []struct {
	code     string
	q        Quantity
	origin   Origin
	specimen Specimen
	unit     string
}{
	{"2019-8", QPCO2, OriginMeasured, SpecimenArterial, "mm[Hg]"},
	{"2021-4", QPCO2, OriginMeasured, SpecimenVenous, "mm[Hg]"},
	{"2020-6", QPCO2, OriginMeasured, SpecimenCapillary, "mm[Hg]"},
	{"19212-0", QPCO2, OriginMeasured, SpecimenMixedVenous, "mm[Hg]"},
	{"11557-6", QPCO2, OriginMeasured, SpecimenUnknown, "mm[Hg]"},
	{"32771-8", QPCO2, OriginMeasured, SpecimenArterial, "mm[Hg]"},
	{"2703-7", QPO2, OriginMeasured, SpecimenArterial, "mm[Hg]"},
	{"2744-1", QPH, OriginMeasured, SpecimenArterial, "[pH]"},
	{"1960-4", QBicarbonate, OriginMeasured, SpecimenArterial, "mmol/L"},
	{"1925-7", QBaseExcess, OriginCalculated, SpecimenArterial, "mmol/L"},
	{"19891-1", QPETCO2, OriginMeasured, SpecimenNone, "mm[Hg]"},
	{"19890-3", QPETCO2, OriginCalculated, SpecimenNone, "mm[Hg]"},
	{"19889-5", QFETCO2, OriginMeasured, SpecimenNone, "%"},
	{"60825-7", QVCO2, OriginMeasured, SpecimenNone, "mL/min"},
	{"76008-2", QMinuteVol, OriginMeasured, SpecimenNone, "L/min"},
	{"76009-0", QMinuteVol, OriginMeasured, SpecimenNone, "L/min"},
	{"75959-7", QMinuteVol, OriginMeasured, SpecimenNone, "L/min"},
	{"33425-0", QMinuteVol, OriginSetting, SpecimenNone, "L/min"},
	{"20112-9", QTidalVol, OriginSetting, SpecimenNone, "mL"},
	{"76222-9", QTidalVol, OriginMeasured, SpecimenNone, "mL"},
	{"76007-4", QTidalVol, OriginMeasured, SpecimenNone, "mL"},
	{"20118-6", QTidalVol, OriginMeasured, SpecimenNone, "mL"},
	{"9279-1", QRespRate, OriginMeasured, SpecimenNone, "/min"},
	{"19834-1", QRespRate, OriginSetting, SpecimenNone, "/min"},
	{"33438-3", QRespRate, OriginMeasured, SpecimenNone, "/min"},
	{"19840-8", QRespRate, OriginMeasured, SpecimenNone, "/min"},
	{"19839-0", QRespRate, OriginMeasured, SpecimenNone, "/min"},
	{"3150-0", QFiO2, OriginMeasured, SpecimenNone, "%"},
	{"19996-8", QFiO2, OriginMeasured, SpecimenNone, "%"},
	{"19994-3", QFiO2, OriginSetting, SpecimenNone, "%"},
	{"20077-4", QPEEP, OriginSetting, SpecimenNone, "cm[H2O]"},
	{"76248-4", QPEEP, OriginMeasured, SpecimenNone, "cm[H2O]"},
	{"76259-1", QPlateau, OriginMeasured, SpecimenNone, "cm[H2O]"},
	{"76530-5", QMeanAirway, OriginMeasured, SpecimenNone, "cm[H2O]"},
	{"50984-4", QPFRatio, OriginCalculated, SpecimenArterial, "mm[Hg]"},
	{"29463-7", QWeight, OriginMeasured, SpecimenNone, "kg"},
	{"8302-2", QHeight, OriginMeasured, SpecimenNone, "cm"},
	{"8310-5", QBodyTemp, OriginMeasured, SpecimenNone, "Cel"},
	{"76689-9", QSex, OriginMeasured, SpecimenNone, ""},
	{"46098-0", QSex, OriginMeasured, SpecimenNone, ""},
}

func TestDefaultCodesCoverReference(t *testing.T) {
	codes := DefaultCodes()
	for _, rc := range referenceCodes {
		t.Run("loinc_"+rc.code, func(t *testing.T) {
			ci, ok := codes.Lookup(LOINCSystem, rc.code)
			if !ok {
				t.Fatal("not in the table")
			}
			if ci.Quantity != rc.q || ci.Origin != rc.origin || ci.Specimen != rc.specimen || ci.Panel {
				t.Fatalf("got %+v", ci)
			}
			if ci.Display == "" {
				t.Error("no display")
			}
			if rc.unit != "" {
				v := 0.5
				if rc.q == QFiO2 {
					v = 40
				}
				if _, err := normalise(rc.q, v, rc.unit); err != nil {
					t.Errorf("usual unit %q refused: %v", rc.unit, err)
				}
			}
			// The same code under another system is not matched.
			if _, ok := codes.Lookup("http://loinc.org/", rc.code); ok {
				t.Error("matched with a wrong system")
			}
		})
	}
	if ci, _ := codes.Lookup(LOINCSystem, "32771-8"); !ci.TempCorrected {
		t.Error("32771-8 must be marked temperature-corrected (LOINC long common name: adjusted to patient's actual temperature)")
	}
	for _, p := range []struct {
		code string
		sp   Specimen
	}{{"24336-0", SpecimenArterial}, {"24338-6", SpecimenUnknown}, {"24339-4", SpecimenVenous}, {"24337-8", SpecimenCapillary}} {
		ci, ok := codes.Lookup(LOINCSystem, p.code)
		if !ok || !ci.Panel || ci.Specimen != p.sp || ci.Quantity != "" {
			t.Errorf("panel %s: got %+v", p.code, ci)
		}
	}
	// Codes that public lists mislabel "arterial" are specimen-unspecified (codes.md traps).
	for _, c := range []string{"1959-6", "11555-0", "11558-4"} {
		if ci, ok := codes.Lookup(LOINCSystem, c); !ok || ci.Specimen != SpecimenUnknown {
			t.Errorf("%s: got %+v, want SpecimenUnknown", c, ci)
		}
	}
}

// TestDefaultCodesMDC checks each ISO/IEEE 11073 code against the LOINC code
// shared reference codes.md pairs it with (MII-ICU).
func TestDefaultCodesMDC(t *testing.T) {
	pairs := map[string]string{"151980": "76222-9", "16929196": "20112-9", "152004": "76009-0", "151586": "33438-3",
		"152490": "19840-8", "152498": "19839-0", "151708": "19891-1", "151976": "76248-4", "152424": "76259-1",
		"151975": "76530-5",
		// Body temperature by site, as the MII-ICU guide's temperature
		// profiles pair them (SD_MII_ICU_Koerpertemperatur_*).
		"150368": "8329-5", "188420": "8332-9", "150372": "60836-4", "150380": "60838-0", "188504": "76010-8"}
	codes := DefaultCodes()
	for mdc, lc := range pairs {
		t.Run("mdc_"+mdc, func(t *testing.T) {
			m, ok := codes.Lookup(MDCSystem, mdc)
			if !ok {
				t.Fatal("not in the table")
			}
			l, _ := codes.Lookup(LOINCSystem, lc)
			if m.Quantity != l.Quantity || m.Origin != l.Origin || m.Detail != l.Detail || m.Specimen != l.Specimen {
				t.Fatalf("MDC %+v differs from LOINC %+v", m, l)
			}
			if _, ok := codes.Lookup(LOINCSystem, mdc); ok {
				t.Error("MDC code matched under the LOINC system")
			}
		})
	}
	if n := len(codes.Entries()); n != len(referenceCodes)+4+3+len(temperatureSites)+len(pairs) {
		t.Errorf("table has %d entries, want %d (reference codes, 4 panels, 3 unspecified-specimen codes, temperature sites, MDC)", n, len(referenceCodes)+4+3+len(temperatureSites)+len(pairs))
	}
	if codes.Len() != len(codes.Entries()) {
		t.Error("Len disagrees with Entries")
	}
}

func TestWithAliases(t *testing.T) {
	f, err := os.Open("testdata/aliases/larkspur.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	before := DefaultCodes().Len()
	codes, err := DefaultCodes().WithAliases(f)
	if err != nil {
		t.Fatal(err)
	}
	if codes.Len() != before+4 || DefaultCodes().Len() != before {
		t.Fatalf("len %d (default %d), want default untouched and 4 added", codes.Len(), DefaultCodes().Len())
	}
	ci, ok := codes.Lookup("https://larkspur-general.example/fhir/lab-codes", "ABG-PCO2")
	if !ok || ci.Quantity != QPCO2 || ci.Specimen != SpecimenArterial || ci.AliasOf != "2019-8" {
		t.Errorf("ABG-PCO2: %+v", ci)
	}
	ci, _ = codes.Lookup("https://larkspur-general.example/fhir/lab-codes", "BG-PCO2")
	if ci.Specimen != SpecimenUnknown || ci.Display != "pCO2 (blood, site code)" {
		t.Errorf("BG-PCO2: %+v", ci)
	}
	ci, _ = codes.Lookup("https://larkspur-general.example/fhir/vent-codes", "PECO2-VCAP")
	if ci.Quantity != QPECO2 || ci.Origin != OriginMeasured || ci.AliasOf != "" {
		t.Errorf("PECO2-VCAP: %+v", ci)
	}

	bad := []struct{ name, text, want string }{
		{"unknown_key", `{"system":"s","code":"c","maps":"2019-8","mapz":"x"}`, "line 1"},
		{"loinc_system", `{"system":"http://loinc.org","code":"2019-8","maps":"2021-4"}`, "cannot be aliased"},
		{"mdc_system", `{"system":"urn:iso:std:iso:11073:10101","code":"1","maps":"2019-8"}`, "cannot be aliased"},
		{"unknown_target", "# c\n\n" + `{"system":"s","code":"c","maps":"0000-0"}`, "line 3"},
		{"both_maps_and_quantity", `{"system":"s","code":"c","maps":"2019-8","quantity":"pco2"}`, "either"},
		{"unknown_quantity", `{"system":"s","code":"c","quantity":"paco2"}`, "not known"},
		{"unknown_origin", `{"system":"s","code":"c","quantity":"pco2","origin":"guessed"}`, "not known"},
		{"unknown_specimen", `{"system":"s","code":"c","quantity":"pco2","specimen":"arterialised"}`, "not known"},
		{"duplicate", `{"system":"s","code":"c","maps":"2019-8"}` + "\n" + `{"system":"s","code":"c","maps":"2021-4"}`, "line 2"},
		{"missing_code", `{"system":"s","maps":"2019-8"}`, "required"},
		{"not_json", `system=s code=c`, "line 1"},
		{"two_values", `{"system":"s","code":"c","maps":"2019-8"} {}`, "more than one"},
	}
	for _, b := range bad {
		t.Run("refuse_"+b.name, func(t *testing.T) {
			_, err := DefaultCodes().WithAliases(strings.NewReader(b.text))
			if err == nil || !strings.Contains(err.Error(), b.want) {
				t.Fatalf("got %v, want an error containing %q", err, b.want)
			}
		})
	}
}

// TestDecodeWithAliases decodes local codes through a site alias table.
func TestDecodeWithAliases(t *testing.T) {
	f, err := os.Open("testdata/aliases/larkspur.jsonl")
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	codes, err := DefaultCodes().WithAliases(f)
	if err != nil {
		t.Fatal(err)
	}
	raw := []byte(`{"resourceType":"Observation","id":"lg-x-1","status":"final",
	 "code":{"coding":[{"system":"https://larkspur-general.example/fhir/vent-codes","code":"PECO2-VCAP"}]},
	 "subject":{"reference":"Patient/lg-0001"},"effectiveDateTime":"2026-11-20T08:00:00Z",
	 "valueQuantity":{"value":2.4,"unit":"kPa","system":"http://unitsofmeasure.org","code":"kPa"}}`)
	d, err := Decode(raw, codes)
	if err != nil {
		t.Fatal(err)
	}
	if len(d.Facts) != 1 || d.Facts[0].Quantity != QPECO2 || !near(d.Facts[0].Value, 2.4*mmHgPerKPa, 1e-9) {
		t.Fatalf("got %+v", d.Facts)
	}
	// The default table does not know the local code.
	d, err = Decode(raw, nil)
	if err != nil || len(d.Facts) != 0 || len(d.Ignored) != 1 || d.Ignored[0].Reason != "unknown-code" {
		t.Fatalf("default table: %+v, %v", d, err)
	}
}
