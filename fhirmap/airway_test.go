package fhirmap

import (
	"errors"
	"math"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/physio"
)

// airwayAlias is a site alias line for the patient's airway (invented local
// code system; the service has no standard code for the observation).
const airwayAlias = `{"system":"https://larkspur-general.example/fhir/resp-codes","code":"AIRWAY","quantity":"airway","display":"airway in use"}`

func airwayCodes(t *testing.T) *CodeTable {
	t.Helper()
	codes, err := DefaultCodes().WithAliases(strings.NewReader(airwayAlias))
	if err != nil {
		t.Fatal(err)
	}
	return codes
}

// airwayObs is an airway Observation whose value[x] is the JSON given
// ("valueCodeableConcept":{...}).
func airwayObs(value string) string {
	return `{"resourceType":"Observation","id":"airway-1","status":"final",` +
		`"code":{"coding":[{"system":"https://larkspur-general.example/fhir/resp-codes","code":"AIRWAY"}]},` +
		`"subject":{"reference":"` + testPatient + `"},"effectiveDateTime":"2026-03-02T06:00:00Z",` + value + `}`
}

func concept(codings ...string) string {
	return `"valueCodeableConcept":{"coding":[` + strings.Join(codings, ",") + `]}`
}

func coding(system, code string) string {
	return `{"system":"` + system + `","code":"` + code + `"}`
}

// TestDecodeAirway: the patient's airway arrives as an Observation with a
// site alias code whose valueCodeableConcept names a tracheal tube or
// tracheostomy (SNOMED CT 26412008 "Endotracheal tube" and 129121000
// "Tracheostomy tube", physical objects, as the HL7 Germany GECCO value set
// "Respiratory Therapy Devices" codes them [published]) or the service's own
// airway-model codes under the site's CodeSystem URL.
func TestDecodeAirway(t *testing.T) {
	codes := airwayCodes(t)
	const siteURL = "https://fhir.larkspur-general.example/CodeSystem/ventderive"
	for _, c := range []struct {
		name   string
		codes  *CodeTable
		value  string
		want   string // Fact.Text; "" when not a fact
		reason string // Ignored or DecodeError reason
	}{
		{"snomed_endotracheal_tube", codes, concept(coding(SNOMEDSystem, "26412008")), "artificial-airway", ""},
		{"snomed_tracheostomy_tube", codes, concept(coding(SNOMEDSystem, "129121000")), "artificial-airway", ""},
		{"own_code_artificial", codes, concept(coding(DefaultCodeSystemURL, "artificial-airway")), "artificial-airway", ""},
		{"own_code_whole", codes, concept(coding(DefaultCodeSystemURL, "whole-airway")), "whole-airway", ""},
		{"own_code_under_site_url", codes.WithCodeSystemURL(siteURL), concept(coding(siteURL, "whole-airway")), "whole-airway", ""},
		{"default_url_not_read_when_site_has_its_own", codes.WithCodeSystemURL(siteURL), concept(coding(DefaultCodeSystemURL, "whole-airway")), "", "unsupported-value"},
		{"unknown_coding_with_a_known_one", codes, concept(coding("https://larkspur-general.example/x", "ETT"), coding(SNOMEDSystem, "26412008")), "artificial-airway", ""},
		{"snomed_code_other_system_ignored", codes, concept(coding("https://larkspur-general.example/x", "26412008")), "", "unsupported-value"},
		{"laryngeal_mask_not_a_model", codes, concept(coding(SNOMEDSystem, "424979004")), "", "unsupported-value"},
		{"contradicting_codings", codes, concept(coding(SNOMEDSystem, "26412008"), coding(DefaultCodeSystemURL, "whole-airway")), "", "conflicting-codes"},
		{"data_absent", codes, `"dataAbsentReason":{"text":"not charted"}`, "", "data-absent"},
		{"quantity_refused", codes, `"valueQuantity":{"value":1}`, "", "missing-field"},
	} {
		t.Run(c.name, func(t *testing.T) {
			out, err := Decode([]byte(airwayObs(c.value)), c.codes)
			if c.want == "" {
				de, isDE := errors.AsType[*DecodeError](err)
				ignored := err == nil && len(out.Facts) == 0 && len(out.Ignored) == 1 && out.Ignored[0].Reason == c.reason
				if !ignored && !(isDE && de.Reason == c.reason) {
					t.Fatalf("got %+v, %v; want %s", out, err, c.reason)
				}
				return
			}
			if err != nil || len(out.Facts) != 1 {
				t.Fatalf("decode: %v, %+v", err, out)
			}
			if f := out.Facts[0]; f.Quantity != QAirway || f.Text != c.want || f.Value != 0 || f.Unit != "" {
				t.Errorf("fact %+v, want airway %s", f, c.want)
			}
		})
	}
	t.Run("without_the_alias_unknown_code", func(t *testing.T) {
		out, err := Decode([]byte(airwayObs(concept(coding(SNOMEDSystem, "26412008")))), nil)
		if err != nil || len(out.Facts) != 0 || len(out.Ignored) != 1 || out.Ignored[0].Reason != "unknown-code" {
			t.Errorf("got %+v, %v", out, err)
		}
	})
	t.Run("codes_are_the_model_names", func(t *testing.T) {
		if AirwayArtificial != physio.AnatomicArtificialAirway.String() || AirwayWhole != physio.AnatomicWholeAirway.String() {
			t.Errorf("codes %s, %s differ from the model names", AirwayArtificial, AirwayWhole)
		}
	})
}

// predictedAirway is the vector's predicted PaCO2 with the site's 50 mL
// apparatus dead space and an anatomic dead space of perKg mL/kg PBW:
// 0.43 mL per lb = 0.948 mL/kg for a tracheal tube or tracheostomy (Nunn,
// Campbell & Peckett, J Appl Physiol 1959;14:174-6 [published]; 1 lb =
// 0.45359237 kg) or 2.2 mL/kg for the whole airway (Radford, J Appl
// Physiol 1955 [published]); VA = (VT - VDanat - VDapp) x RR, PaCO2 = K x
// VCO2 / VA with K = 0.760 x 310/273 (alveolar ventilation equation
// [published]); PBW men 50 + 0.91 x (175 - 152.4) kg (ARDS Network 2000
// [published]).
func predictedAirway(perKg float64) float64 {
	pbw := 50 + 0.91*(175-152.4)
	va := (500 - perKg*pbw - 50) * 20 / 1000
	return 0.760 * 310 / 273.0 * 200 / va
}

// TestAirwayFromInput: the patient's recorded airway chooses the anatomic
// dead space model, preferred over the site's setting; the latest at or
// before the blood gas in the same encounter wins; the model, its figure
// and where it came from are named in the basis, and the airway is an input
// of the value.
func TestAirwayFromInput(t *testing.T) {
	const tube, whole = 0.43 / 0.45359237, 2.2
	airway := func(id, model string, off time.Duration, opts ...factOpt) Fact {
		return newFact(id, QAirway, 0, off, append([]factOpt{text(model)}, opts...)...)
	}
	for _, c := range []struct {
		name      string
		site      physio.AnatomicModel
		extra     []Fact
		perKg     float64
		fromInput string // the airway fact used, "" for the site's setting
	}{
		{"site_artificial_none_recorded", physio.AnatomicArtificialAirway, nil, tube, ""},
		{"site_whole_none_recorded", physio.AnatomicWholeAirway, nil, whole, ""},
		{"mask_recorded_overrides_site_tube", physio.AnatomicArtificialAirway, []Fact{airway("aw-1", "whole-airway", -2*time.Hour)}, whole, "aw-1"},
		{"tube_recorded_overrides_site_whole", physio.AnatomicWholeAirway, []Fact{airway("aw-1", "artificial-airway", -2*time.Hour)}, tube, "aw-1"},
		{"at_the_blood_gas_counts", physio.AnatomicArtificialAirway, []Fact{airway("aw-1", "whole-airway", 0)}, whole, "aw-1"},
		{"latest_before_wins_intubated_after_mask", physio.AnatomicWholeAirway,
			[]Fact{airway("aw-1", "whole-airway", -5*time.Hour), airway("aw-2", "artificial-airway", -time.Hour)}, tube, "aw-2"},
		{"latest_before_wins_extubated_after_tube", physio.AnatomicArtificialAirway,
			[]Fact{airway("aw-1", "artificial-airway", -5*time.Hour), airway("aw-2", "whole-airway", -time.Hour)}, whole, "aw-2"},
		{"recorded_after_the_gas_not_used", physio.AnatomicArtificialAirway,
			[]Fact{airway("aw-1", "whole-airway", 5*time.Minute)}, tube, ""},
		{"one_before_used_not_one_after", physio.AnatomicWholeAirway,
			[]Fact{airway("aw-1", "whole-airway", -time.Hour), airway("aw-2", "artificial-airway", time.Minute)}, whole, "aw-1"},
		{"other_encounter_not_used", physio.AnatomicArtificialAirway,
			[]Fact{airway("aw-1", "whole-airway", -time.Hour, encounter("Encounter/demo-enc-0"))}, tube, ""},
		{"entered_in_error_not_used", physio.AnatomicArtificialAirway,
			[]Fact{airway("aw-1", "whole-airway", -time.Hour, status(StatusEnteredInError))}, tube, ""},
	} {
		t.Run(c.name, func(t *testing.T) {
			site := DefaultSite()
			site.ApparatusDeadSpaceML, site.ApparatusDeadSpaceConfigured = 50, true
			site.AnatomicDeadSpace = c.site
			ds, rs := DeriveAll(append(vectorFacts(), c.extra...), site)
			dm, rm := byKind(ds, rs)
			want := predictedAirway(c.perKg)
			for _, k := range []string{KindPredictedPaCO2, KindPaCO2Discrepancy} {
				d, ok := dm[k]
				if !ok {
					t.Fatalf("%s refused: %+v", k, rm[k])
				}
				i := slices.IndexFunc(d.Inputs, func(in Input) bool { return in.Role == RoleAirway })
				switch {
				case c.fromInput == "" && i >= 0:
					t.Errorf("%s: airway input %s recorded, want the site's setting", k, d.Inputs[i].Fact.Key)
				case c.fromInput != "" && (i < 0 || d.Inputs[i].Fact.Key != "Observation/"+c.fromInput):
					t.Errorf("%s: airway input %v, want %s", k, i >= 0, c.fromInput)
				}
				model := "whole airway"
				if c.perKg == tube {
					model = "tube or tracheostomy"
				}
				whence := "site setting"
				if c.fromInput != "" {
					whence = "patient's recorded airway"
				}
				notes := strings.Join(BasisNotes(d), "\n")
				if !strings.Contains(notes, "VDanat ("+model) || !strings.Contains(notes, whence) {
					t.Errorf("%s: the basis does not name the model %q and its origin %q:\n%s", k, model, whence, notes)
				}
				pred := d.Result
				if k == KindPaCO2Discrepancy {
					pred = d.Steps[len(d.Steps)-1]
					if math.Abs(d.Result.Value-(45-want)) > 1e-9 {
						t.Errorf("measured minus predicted %.4f mmHg, want 45 - %.4f", d.Result.Value, want)
					}
				}
				if math.Abs(pred.Value-want) > 1e-9 {
					t.Errorf("%s: predicted PaCO2 %.4f mmHg, want %.4f", k, pred.Value, want)
				}
			}
			// The airway is not a reading of the moment: it does not make
			// the inputs "far apart".
			if d := dm[KindPredictedPaCO2]; inputSpan(d.Inputs) > MaxInputSpan {
				t.Errorf("span %s counts the airway", inputSpan(d.Inputs))
			}
		})
	}
	t.Run("whole_airway_worked_value", func(t *testing.T) {
		// Radford 2.2 mL/kg x 70.566 kg = 155.25 mL; VA = (500 - 155.25 -
		// 50) x 20 / 1000 = 5.895 L/min; PaCO2 = 0.863 x 200 / 5.895 = 29.28
		// mmHg [derived]. Tube 0.948 x 70.566 = 66.90 mL; VA = 7.662 L/min;
		// 22.53 mmHg [derived].
		if got := predictedAirway(whole); math.Abs(got-29.28) > 0.005 {
			t.Errorf("whole airway %.3f, want 29.28", got)
		}
		if got := predictedAirway(tube); math.Abs(got-22.53) > 0.005 {
			t.Errorf("tube %.3f, want 22.53", got)
		}
	})
}
