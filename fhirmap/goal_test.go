package fhirmap

import (
	"errors"
	"math"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/physio"
)

// goalJSONText is a FHIR R4 Goal of the invented test patient whose one
// target is target (the JSON of a GoalTarget without its measure), measured
// as LOINC 2019-8 unless measure is given.
func goalJSONText(id, version, lifecycle, start, target, measure string) string {
	if measure == "" {
		measure = `{"coding":[{"system":"http://loinc.org","code":"2019-8"}]}`
	}
	meta := ""
	if version != "" {
		meta = `"meta":{"versionId":"` + version + `"},`
	}
	startField := ""
	if start != "" {
		startField = `"startDate":"` + start + `",`
	}
	return `{"resourceType":"Goal","id":"` + id + `",` + meta + `"lifecycleStatus":"` + lifecycle + `",` +
		`"description":{"text":"PaCO2 goal while on the ventilator"},"subject":{"reference":"` + testPatient + `"},` + startField +
		`"target":[{"measure":` + measure + `,` + target + `}]}`
}

const (
	goal50mmHg   = `"detailQuantity":{"value":50,"unit":"mmHg","system":"http://unitsofmeasure.org","code":"mm[Hg]"}`
	goal45to55   = `"detailRange":{"low":{"value":45,"system":"http://unitsofmeasure.org","code":"mm[Hg]"},"high":{"value":55,"system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`
	goal6to7kPa  = `"detailRange":{"low":{"value":6.0,"system":"http://unitsofmeasure.org","code":"kPa"},"high":{"value":7.0,"system":"http://unitsofmeasure.org","code":"kPa"}}`
	siteTargetHg = 40
)

// decodeGoalFact decodes one Goal and returns its single fact.
func decodeGoalFact(t *testing.T, js string, codes *CodeTable) Fact {
	t.Helper()
	out, err := Decode([]byte(js), codes)
	if err != nil {
		t.Fatalf("decode: %v", err)
	}
	if len(out.Facts) != 1 || len(out.Resources) != 1 || out.Resources[0].Type != "Goal" {
		t.Fatalf("decode: %d facts, %d resources, ignored %+v; want one Goal fact", len(out.Facts), len(out.Resources), out.Ignored)
	}
	return out.Facts[0]
}

// TestDecodeGoal checks the strict Goal decoder: the target PaCO2 in mm[Hg]
// (1 kPa = 7.500638 mm[Hg], UCUM definition of mm[Hg] = 133.322 Pa
// [published]), a range kept with its bounds and read at its midpoint, the
// lifecycleStatus mapped to the fact rules (FHIR R4 goal-status value set
// [published]: only active and accepted goals are in force), and every
// malformed or unusable target refused with a reason of the decode
// catalogue, never passed over for the site's target.
func TestDecodeGoal(t *testing.T) {
	aliases, err := DefaultCodes().WithAliases(strings.NewReader(`{"system":"https://larkspur-general.example/fhir/lab-codes","code":"ABG-PCO2","maps":"2019-8"}`))
	if err != nil {
		t.Fatal(err)
	}
	t.Run("quantity_50_mmHg", func(t *testing.T) {
		f := decodeGoalFact(t, goalJSONText("g1", "3", "active", "2026-03-01", goal50mmHg, ""), nil)
		if f.Key != "Goal/g1" || f.Resource != "Goal/g1" || f.Quantity != QTargetPaCO2 || f.Value != 50 || f.Unit != "mm[Hg]" ||
			f.Status != StatusFinal || f.VersionID != "3" || f.Patient != testPatient || f.Text != "" {
			t.Errorf("fact %+v", f)
		}
		if want := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC); !f.Effective.Equal(want) {
			t.Errorf("effective %v, want the startDate %v", f.Effective, want)
		}
	})
	t.Run("range_6_to_7_kPa_midpoint_in_mmHg", func(t *testing.T) {
		f := decodeGoalFact(t, goalJSONText("g1", "", "accepted", "", goal6to7kPa, ""), nil)
		lo, hi, ok := GoalRange(f)
		// 6.0 kPa = 45.0038 mm[Hg]; 7.0 kPa = 52.5045 mm[Hg] (x 7.500638, UCUM) [derived].
		if !ok || math.Abs(lo-45.0038) > 1e-3 || math.Abs(hi-52.5045) > 1e-3 || math.Abs(f.Value-48.7541) > 1e-3 {
			t.Errorf("range %v..%v (ok %v), value %v; want 45.0038..52.5045, midpoint 48.7541", lo, hi, ok, f.Value)
		}
		if f.SourceUnit != "kPa" || math.Abs(f.SourceValue-6.5) > 1e-9 || !f.Effective.IsZero() {
			t.Errorf("source %v %s, effective %v", f.SourceValue, f.SourceUnit, f.Effective)
		}
	})
	t.Run("site_alias_measure", func(t *testing.T) {
		f := decodeGoalFact(t, goalJSONText("g1", "", "active", "", goal50mmHg,
			`{"coding":[{"system":"https://larkspur-general.example/fhir/lab-codes","code":"ABG-PCO2"}]}`), aliases)
		if f.Value != 50 || f.Code.Code != "ABG-PCO2" {
			t.Errorf("fact %+v", f)
		}
	})
	for _, c := range []struct{ lifecycle, want Status }{
		{"active", StatusFinal}, {"accepted", StatusFinal},
		{"proposed", StatusRegistered}, {"planned", StatusRegistered}, {"on-hold", StatusRegistered},
		{"cancelled", StatusCancelled}, {"completed", StatusCancelled}, {"rejected", StatusCancelled},
		{"entered-in-error", StatusEnteredInError},
	} {
		t.Run("lifecycle_"+string(c.lifecycle), func(t *testing.T) {
			f := decodeGoalFact(t, goalJSONText("g1", "", string(c.lifecycle), "", goal50mmHg, ""), nil)
			if f.Status != c.want {
				t.Errorf("status %s, want %s", f.Status, c.want)
			}
		})
	}
	t.Run("withdrawal_kept_without_a_usable_value", func(t *testing.T) {
		f := decodeGoalFact(t, goalJSONText("g1", "2", "entered-in-error", "", `"detailString":"lower"`, ""), nil)
		if f.Status != StatusEnteredInError || f.Value != 0 {
			t.Errorf("fact %+v", f)
		}
	})
	t.Run("no_PaCO2_target_never_used", func(t *testing.T) {
		js := goalJSONText("g1", "2", "active", "", `"detailQuantity":{"value":8,"unit":"kPa"}`,
			`{"coding":[{"system":"http://loinc.org","code":"2021-4"}]}`) // venous PCO2: not a PaCO2 target
		f := decodeGoalFact(t, js, nil)
		if f.Status.Usable() || f.Value != 0 || f.Code.Code != GoalNoPaCO2Target {
			t.Errorf("fact %+v; want an unusable fact that can replace an earlier version", f)
		}
	})
	t.Run("in_a_Bundle_with_its_Patient", func(t *testing.T) {
		js := `{"resourceType":"Bundle","type":"collection","entry":[` +
			`{"fullUrl":"urn:uuid:5a0c7c1e-2b0b-4c55-9d1e-000000000001","resource":{"resourceType":"Patient","id":"demo-7f3a","gender":"male"}},` +
			`{"fullUrl":"urn:uuid:5a0c7c1e-2b0b-4c55-9d1e-000000000002","resource":` +
			strings.Replace(strings.Replace(goalJSONText("g1", "", "active", "", goal50mmHg, ""), `"id":"g1",`, ``, 1),
				`"reference":"`+testPatient+`"`, `"reference":"urn:uuid:5a0c7c1e-2b0b-4c55-9d1e-000000000001"`, 1) + `}]}`
		out, err := Decode([]byte(js), nil)
		if err != nil {
			t.Fatal(err)
		}
		var got []string
		for _, f := range out.Facts {
			got = append(got, f.Key+"="+f.Patient)
		}
		if !slices.Contains(got, "Goal/5a0c7c1e-2b0b-4c55-9d1e-000000000002="+testPatient) {
			t.Errorf("facts %v; want the Goal named by its fullUrl, of the Patient entry", got)
		}
	})

	for _, c := range []struct{ name, js, reason, field string }{
		{"no_lifecycleStatus", strings.Replace(goalJSONText("g1", "", "active", "", goal50mmHg, ""), `"lifecycleStatus":"active",`, "", 1), "missing-field", "Goal.lifecycleStatus"},
		{"no_description", strings.Replace(goalJSONText("g1", "", "active", "", goal50mmHg, ""), `"description":{"text":"PaCO2 goal while on the ventilator"},`, "", 1), "missing-field", "Goal.description"},
		{"no_subject", strings.Replace(goalJSONText("g1", "", "active", "", goal50mmHg, ""), `"subject":{"reference":"`+testPatient+`"},`, "", 1), "missing-field", "Goal.subject"},
		{"subject_not_a_Patient", strings.Replace(goalJSONText("g1", "", "active", "", goal50mmHg, ""), testPatient, "Group/g", 1), "bad-reference", "Goal.subject.reference"},
		{"no_id", strings.Replace(goalJSONText("g1", "", "active", "", goal50mmHg, ""), `"id":"g1",`, "", 1), "missing-field", "Goal.id"},
		{"unknown_lifecycleStatus", goalJSONText("g1", "", "paused", "", goal50mmHg, ""), "malformed-json", ""},
		{"misspelled_element", strings.Replace(goalJSONText("g1", "", "active", "", goal50mmHg, ""), `"description"`, `"descripton"`, 1), "unknown-field", ""},
		{"unknown_field_in_target", goalJSONText("g1", "", "active", "", goal50mmHg+`,"detailAmount":1`, ""), "unknown-field", ""},
		{"modifierExtension", strings.Replace(goalJSONText("g1", "", "active", "", goal50mmHg, ""), `"lifecycleStatus"`, `"modifierExtension":[{"url":"https://larkspur-general.example/x","valueBoolean":true}],"lifecycleStatus"`, 1), "unsupported-extension", "Goal.modifierExtension"},
		{"comparator", goalJSONText("g1", "", "active", "", `"detailQuantity":{"value":50,"comparator":"<=","unit":"mmHg"}`, ""), "ambiguous-value", "Goal.target[0].detailQuantity.comparator"},
		{"one_sided_range", goalJSONText("g1", "", "active", "", `"detailRange":{"high":{"value":55,"unit":"mmHg"}}`, ""), "ambiguous-value", "Goal.target[0].detailRange"},
		{"inverted_range", goalJSONText("g1", "", "active", "", `"detailRange":{"low":{"value":55,"unit":"mmHg"},"high":{"value":45,"unit":"mmHg"}}`, ""), "ambiguous-value", "Goal.target[0].detailRange"},
		{"unknown_unit", goalJSONText("g1", "", "active", "", `"detailQuantity":{"value":50,"unit":"torr"}`, ""), "unknown-unit", "Goal.target[0].detailQuantity.unit"},
		{"negative", goalJSONText("g1", "", "active", "", `"detailQuantity":{"value":-5,"unit":"mmHg"}`, ""), "negative-value", "Goal.target[0].detailQuantity.value"},
		{"no_value", goalJSONText("g1", "", "active", "", `"detailQuantity":{"unit":"mmHg"}`, ""), "missing-field", "Goal.target[0].detailQuantity.value"},
		{"text_detail", goalJSONText("g1", "", "active", "", `"detailString":"around 50"`, ""), "missing-field", "Goal.target[0].detail[x]"},
		{"bad_startDate", goalJSONText("g1", "", "active", "2026-13-01", goal50mmHg, ""), "bad-time", "Goal.startDate"},
		{"two_PaCO2_targets", strings.TrimSuffix(goalJSONText("g1", "", "active", "", goal50mmHg, ""), `}]}`) +
			`},{"measure":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},` + goal45to55 + `}]}`, "duplicate-value", "Goal.target[1].measure"},
	} {
		t.Run(c.name, func(t *testing.T) {
			_, err := Decode([]byte(c.js), nil)
			if c.reason == "" {
				if err == nil {
					t.Fatal("accepted")
				}
				return
			}
			de, ok := errors.AsType[*DecodeError](err)
			if !ok || de.Reason != c.reason || c.field != "" && de.Field != c.field {
				t.Fatalf("err %v; want %s at %s", err, c.reason, c.field)
			}
		})
	}
}

// forTargetSite is the site of the target tests: target 40 mm[Hg], apparatus
// dead space 50 mL.
func forTargetSite() Site {
	site := DefaultSite()
	site.TargetPaCO2mmHg = siteTargetHg
	site.ApparatusDeadSpaceML, site.ApparatusDeadSpaceConfigured = 50, true
	return site
}

// goalFact is a target fact as the decoder makes it from a Goal.
func goalFact(id string, v float64, start time.Time, opts ...factOpt) Fact {
	f := newFact(id, QTargetPaCO2, v, 0, append([]factOpt{func(f *Fact) {
		f.Key, f.Resource, f.Encounter, f.Origin, f.Effective, f.Detail = "Goal/"+id, "Goal/"+id, "", "", start, "goal value"
	}}, opts...)...)
	return f
}

func goalRange(lo, hi float64) factOpt {
	return func(f *Fact) {
		f.Value = (lo + hi) / 2
		f.Text = strconv.FormatFloat(lo, 'g', -1, 64) + ".." + strconv.FormatFloat(hi, 'g', -1, 64)
		f.Detail = "midpoint of the goal range"
	}
}

// TestGoalOverridesSiteTarget: the breath rate for a target at the same
// tidal volume is RR x PaCO2 / target (alveolar ventilation equation at
// constant VCO2, physiology.md s9 [derived]); with the vector (RR 20 /min,
// PaCO2 45 mm[Hg]) it is 22.5 /min at the site's 40 mm[Hg] and 18.0 /min at
// the patient's goal of 50 mm[Hg]. The goal is an input of both values for
// a target, named with its version in the basis.
func TestGoalOverridesSiteTarget(t *testing.T) {
	facts := vectorFacts()
	for _, c := range []struct {
		name     string
		goals    []Fact
		site     func(*Site)
		wantRR   float64 // 0: refused
		reason   string
		goalUsed string
		flagged  bool
	}{
		{"no_goal_site_40", nil, nil, 22.5, "", "", false},
		{"goal_50_overrides_site_40", []Fact{goalFact("g1", 50, time.Time{})}, nil, 18.0, "", "Goal/g1", false},
		{"goal_50_without_site_target", []Fact{goalFact("g1", 50, time.Time{})}, func(s *Site) { s.TargetPaCO2mmHg = 0 }, 18.0, "", "Goal/g1", false},
		// Range 45-55: midpoint 50; PaCO2 45 lies within it: flagged, the goal is met.
		{"range_45_55_midpoint_within_flagged", []Fact{goalFact("g1", 0, time.Time{}, goalRange(45, 55))}, nil, 18.0, "", "Goal/g1", true},
		// Range 46-54: midpoint 50; PaCO2 45 below it: not flagged.
		{"range_46_54_midpoint_outside_not_flagged", []Fact{goalFact("g1", 0, time.Time{}, goalRange(46, 54))}, nil, 18.0, "", "Goal/g1", false},
		{"goal_started_yesterday_used", []Fact{goalFact("g1", 50, t0.Add(-24*time.Hour))}, nil, 18.0, "", "Goal/g1", false},
		{"goal_starting_tomorrow_not_used", []Fact{goalFact("g1", 50, t0.Add(24*time.Hour))}, nil, 22.5, "", "", false},
		// Two goals in force: the later start wins: 20 x 45 / 60 = 15.0 /min.
		{"later_goal_wins", []Fact{goalFact("g1", 50, t0.Add(-48*time.Hour)), goalFact("g2", 60, t0.Add(-2*time.Hour))}, nil, 15.0, "", "Goal/g2", false},
		{"cancelled_goal_site_target", []Fact{goalFact("g1", 50, time.Time{}, status(StatusCancelled))}, nil, 22.5, "", "", false},
		{"proposed_goal_site_target", []Fact{goalFact("g1", 50, time.Time{}, status(StatusRegistered))}, nil, 22.5, "", "", false},
		// An implausible goal (below 20 mm[Hg], TargetPaCO2Range) refuses; it never falls back to the site.
		{"implausible_goal_15_refused", []Fact{goalFact("g1", 15, time.Time{})}, nil, 0, ReasonImplausible, "Goal/g1", false},
	} {
		t.Run(c.name, func(t *testing.T) {
			site := forTargetSite()
			if c.site != nil {
				c.site(&site)
			}
			ds, rs := DeriveAll(append(slices.Clone(facts), c.goals...), site)
			dm, rm := byKind(ds, rs)
			for _, k := range []string{KindRateForTarget, KindTidalVolumeForTarget} {
				if c.wantRR == 0 {
					r, ok := rm[k]
					if !ok || r.Reason != c.reason || !strings.Contains(r.Detail, c.goalUsed) {
						t.Errorf("%s: %+v, want refusal %s naming %s", k, r, c.reason, c.goalUsed)
					}
					continue
				}
				d, ok := dm[k]
				if !ok {
					t.Fatalf("%s refused: %+v", k, rm[k])
				}
				var used string
				for _, in := range d.Inputs {
					if in.Role == RoleTarget {
						used = in.Fact.Key
					}
				}
				if used != c.goalUsed {
					t.Errorf("%s: goal input %q, want %q", k, used, c.goalUsed)
				}
				if got := slices.Contains(d.Result.Flags(), physio.FlagWithinGoalRange); got != c.flagged {
					t.Errorf("%s: within-range flag %v, want %v", k, got, c.flagged)
				}
				notes := strings.Join(BasisNotes(d), "\n")
				if c.goalUsed != "" && !strings.Contains(notes, "is the patient's own goal ("+c.goalUsed+", version 1)") {
					t.Errorf("%s: the basis does not name the goal and its version:\n%s", k, notes)
				}
				if c.goalUsed == "" && !strings.Contains(notes, "is the site's configured target") {
					t.Errorf("%s: the basis does not say the target is the site's:\n%s", k, notes)
				}
				if k == KindRateForTarget && math.Abs(d.Result.Value-c.wantRR) > 1e-9 {
					t.Errorf("rate for target %v /min, want %v", d.Result.Value, c.wantRR)
				}
			}
			// Values not for a target do not read the goal.
			for _, in := range dm[KindDeadSpaceVCO2].Inputs {
				if in.Role == RoleTarget {
					t.Errorf("the goal is an input of %s", KindDeadSpaceVCO2)
				}
			}
		})
	}
}

// TestGoalWithdrawal: a new version of the Goal that withdraws it
// (cancelled, completed, entered-in-error) or no longer targets PaCO2 returns both values for a target
// to the site's target, whatever the order the versions arrive in (Current:
// numeric meta.versionId decides).
func TestGoalWithdrawal(t *testing.T) {
	for _, c := range []struct{ name, lifecycle, target, measure string }{
		{"cancelled", "cancelled", goal50mmHg, ""},
		{"completed", "completed", goal50mmHg, ""},
		{"entered-in-error", "entered-in-error", goal50mmHg, ""},
		// A later version that measures SpO2 instead (LOINC 59408-5) is no
		// longer a PaCO2 goal.
		{"active_version_without_PaCO2_target", "active", `"detailQuantity":{"value":92,"unit":"%"}`,
			`{"coding":[{"system":"http://loinc.org","code":"59408-5"}]}`},
	} {
		t.Run(c.name, func(t *testing.T) {
			v1 := decodeGoalFact(t, goalJSONText("g1", "1", "active", "", goal50mmHg, ""), nil)
			v2 := decodeGoalFact(t, goalJSONText("g1", "2", c.lifecycle, "", c.target, c.measure), nil)
			for _, order := range [][]Fact{{v1, v2}, {v2, v1}} {
				ds, rs := DeriveAll(append(vectorFacts(), order...), forTargetSite())
				dm, rm := byKind(ds, rs)
				d, ok := dm[KindRateForTarget]
				if !ok {
					t.Fatalf("refused: %+v", rm[KindRateForTarget])
				}
				if d.Result.Value != 22.5 {
					t.Errorf("rate for target %v, want the site target's 22.5 /min", d.Result.Value)
				}
			}
		})
	}
}

// TestGoalDecodedEndToEnd: a Goal and the blood gas decoded from FHIR JSON
// give the same values whichever comes first in the input (the final state
// depends on the set of inputs, not on their order).
func TestGoalDecodedEndToEnd(t *testing.T) {
	goal := decodeGoalFact(t, goalJSONText("g1", "1", "active", "2026-03-01", goal45to55, ""), nil)
	a := append(vectorFacts(), goal)
	b := append([]Fact{goal}, vectorFacts()...)
	da, _ := DeriveAll(a, forTargetSite())
	db, _ := DeriveAll(b, forTargetSite())
	if len(da) != len(db) {
		t.Fatalf("%d vs %d derivations", len(da), len(db))
	}
	for i := range da {
		if da[i].Digest != db[i].Digest {
			t.Errorf("%s differs with the order of the inputs", da[i].Kind)
		}
	}
	dm, _ := byKind(da, nil)
	notes := strings.Join(BasisNotes(dm[KindTidalVolumeForTarget]), "\n")
	for _, want := range []string{"target PaCO2 50 mmHg [midpoint of the goal range 45-55 mmHg, final, Goal/g1, version 1]",
		"the midpoint of its range 45-55 mmHg", physio.FlagWithinGoalRange} {
		if !strings.Contains(notes, want) {
			t.Errorf("basis lacks %q:\n%s", want, notes)
		}
	}
}
