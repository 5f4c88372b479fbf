package fhirmap

import (
	"errors"
	"math"
	"slices"
	"strings"
	"testing"
	"time"
)

// apparatusAlias is a site alias line for the apparatus dead space of a
// patient's circuit (invented local code system; no LOINC code exists).
const apparatusAlias = `{"system":"https://larkspur-general.example/fhir/resp-codes","code":"CIRCUIT-VD","quantity":"apparatus-dead-space","display":"apparatus dead space beyond the Y-piece"}`

func apparatusCodes(t *testing.T) *CodeTable {
	t.Helper()
	codes, err := DefaultCodes().WithAliases(strings.NewReader(apparatusAlias))
	if err != nil {
		t.Fatal(err)
	}
	return codes
}

func apparatusObs(value, unit string) string {
	return `{"resourceType":"Observation","id":"circuit-1","status":"final",` +
		`"code":{"coding":[{"system":"https://larkspur-general.example/fhir/resp-codes","code":"CIRCUIT-VD"}]},` +
		`"subject":{"reference":"` + testPatient + `"},"effectiveDateTime":"2026-03-02T06:00:00Z",` +
		`"valueQuantity":{"value":` + value + `,"system":"http://unitsofmeasure.org","code":"` + unit + `"}}`
}

// TestDecodeApparatusDeadSpace: the circuit's apparatus dead space arrives
// as an Observation with a site alias code, in mL or L (UCUM: 1 L = 1000
// mL [published]); another unit is refused, and a target PaCO2 cannot be
// aliased onto an Observation (it comes only from a Goal).
func TestDecodeApparatusDeadSpace(t *testing.T) {
	codes := apparatusCodes(t)
	for _, c := range []struct {
		value, unit string
		want        float64
		reason      string
	}{
		{"80", "mL", 80, ""},
		{"0.08", "L", 80, ""},
		{"80", "cm[H2O]", 0, "unknown-unit"},
		{"-5", "mL", 0, "negative-value"},
	} {
		t.Run(c.value+"_"+c.unit, func(t *testing.T) {
			out, err := Decode([]byte(apparatusObs(c.value, c.unit)), codes)
			if c.reason != "" {
				if de, ok := errors.AsType[*DecodeError](err); !ok || de.Reason != c.reason {
					t.Fatalf("err %v, want %s", err, c.reason)
				}
				return
			}
			if err != nil || len(out.Facts) != 1 {
				t.Fatalf("decode: %v, %+v", err, out)
			}
			if f := out.Facts[0]; f.Quantity != QApparatusVD || math.Abs(f.Value-c.want) > 1e-9 || f.Unit != "mL" {
				t.Errorf("fact %+v, want %v mL", f, c.want)
			}
		})
	}
	t.Run("without_the_alias_unknown_code", func(t *testing.T) {
		out, err := Decode([]byte(apparatusObs("80", "mL")), nil)
		if err != nil || len(out.Facts) != 0 || len(out.Ignored) != 1 || out.Ignored[0].Reason != "unknown-code" {
			t.Errorf("got %+v, %v", out, err)
		}
	})
	t.Run("target_alias_refused", func(t *testing.T) {
		_, err := DefaultCodes().WithAliases(strings.NewReader(`{"system":"https://larkspur-general.example/x","code":"T","quantity":"target-paco2"}`))
		if err == nil {
			t.Error("a target PaCO2 alias was accepted")
		}
	})
}

// predictedWith is the vector's predicted PaCO2 with apparatus dead space
// vdapp mL under the default anatomic model (tracheal tube: intrathoracic
// airway 0.43 mL per lb = 0.948 mL/kg PBW, Nunn, Campbell & Peckett, J Appl
// Physiol 1959;14:174-6 [published]): VA = (VT - 0.948 mL/kg x PBW - VDapp)
// x RR, PaCO2 = K x VCO2 / VA, K = 0.760 x (273 + 37)/273 (alveolar
// ventilation equation [published]; PBW men 50 + 0.91 x (175 - 152.4) kg,
// ARDS Network 2000 [published]).
func predictedWith(vdapp float64) float64 {
	pbw := 50 + 0.91*(175-152.4)
	k := 0.760 * (273 + 37) / 273.0
	va := (500 - 0.43/0.45359237*pbw - vdapp) * 20 / 1000
	return k * 200 / va
}

// TestApparatusDeadSpaceFromInput: an apparatus dead space recorded for the
// patient's circuit is preferred over the site's setting, recorded as an
// input and in the constants (source), and validated against
// physio.ApparatusDeadSpaceRange (0-500 mL): an implausible one refuses the
// value rather than falling back to the site's.
func TestApparatusDeadSpaceFromInput(t *testing.T) {
	circuit := func(v float64, off time.Duration, opts ...factOpt) Fact {
		return newFact("circuit-1", QApparatusVD, v, off, opts...)
	}
	for _, c := range []struct {
		name       string
		extra      []Fact
		configured bool
		want       float64 // 0: refused
		reason     string
		fromInput  bool
	}{
		{"site_50_mL", nil, true, predictedWith(50), "", false},
		{"patient_100_mL_2_h_before_overrides_site", []Fact{circuit(100, -2*time.Hour)}, true, predictedWith(100), "", true},
		{"patient_100_mL_without_site_setting", []Fact{circuit(100, -2*time.Hour)}, false, predictedWith(100), "", true},
		{"patient_0_mL_no_apparatus", []Fact{circuit(0, -2*time.Hour)}, false, predictedWith(0), "", true},
		{"patient_100_mL_5_min_after_within_allowance", []Fact{circuit(100, 5*time.Minute)}, true, predictedWith(100), "", true},
		{"patient_100_mL_1_h_after_not_used", []Fact{circuit(100, time.Hour)}, true, predictedWith(50), "", false},
		{"other_encounter_not_used", []Fact{circuit(100, -2*time.Hour, encounter("Encounter/demo-enc-0"))}, true, predictedWith(50), "", false},
		{"entered_in_error_not_used", []Fact{circuit(100, -2*time.Hour, status(StatusEnteredInError))}, true, predictedWith(50), "", false},
		{"latest_circuit_wins", []Fact{circuit(100, -3*time.Hour), newFact("circuit-2", QApparatusVD, 30, -time.Hour)}, true, predictedWith(30), "", true},
		{"implausible_600_mL_refused", []Fact{circuit(600, -2*time.Hour)}, true, 0, ReasonImplausible, true},
		{"neither_refused", nil, false, 0, ReasonApparatusNotSet, false},
	} {
		t.Run(c.name, func(t *testing.T) {
			site := DefaultSite()
			site.ApparatusDeadSpaceML, site.ApparatusDeadSpaceConfigured = 50, c.configured
			if !c.configured {
				site.ApparatusDeadSpaceML = 0
			}
			ds, rs := DeriveAll(append(vectorFacts(), c.extra...), site)
			dm, rm := byKind(ds, rs)
			for _, k := range []string{KindPredictedPaCO2, KindPaCO2Discrepancy} {
				if c.want == 0 {
					if r, ok := rm[k]; !ok || r.Reason != c.reason {
						t.Errorf("%s: %+v, want refusal %s", k, r, c.reason)
					}
					continue
				}
				d, ok := dm[k]
				if !ok {
					t.Fatalf("%s refused: %+v", k, rm[k])
				}
				input := slices.ContainsFunc(d.Inputs, func(in Input) bool { return in.Role == RoleApparatusVD })
				if input != c.fromInput {
					t.Errorf("%s: apparatus input recorded %v, want %v", k, input, c.fromInput)
				}
				source := "the site's setting"
				if c.fromInput {
					source = "recorded for the patient's circuit"
				}
				notes := strings.Join(BasisNotes(d), "\n")
				if !strings.Contains(notes, "apparatus dead space = ") || !strings.Contains(notes, source) {
					t.Errorf("%s: the basis does not say where the apparatus dead space came from (%s):\n%s", k, source, notes)
				}
				if k == KindPredictedPaCO2 && math.Abs(d.Result.Value-c.want) > 0.01 {
					t.Errorf("predicted PaCO2 %.3f mmHg, want %.3f", d.Result.Value, c.want)
				}
			}
			// The circuit's dead space is not a reading of the moment: it
			// does not make the inputs "far apart".
			if d, ok := dm[KindPredictedPaCO2]; ok && inputSpan(d.Inputs) > MaxInputSpan {
				t.Errorf("span %s counts the circuit", inputSpan(d.Inputs))
			}
		})
	}
}
