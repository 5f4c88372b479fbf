package fhirmap

import (
	"strings"
	"testing"
	"time"
)

// TestSelectWindowEdges checks that both ends of the pairing window are
// included and one second beyond is not (default window 30 min before,
// 10 min after).
func TestSelectWindowEdges(t *testing.T) {
	tests := []struct {
		name   string
		offset time.Duration
		used   bool
	}{
		{"at_30_min_before_included", -30 * time.Minute, true},
		{"at_30_min_1_s_before_excluded", -30*time.Minute - time.Second, false},
		{"at_10_min_after_included", 10 * time.Minute, true},
		{"at_10_min_1_s_after_excluded", 10*time.Minute + time.Second, false},
		{"at_blood_gas_time_included", 0, true},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			bg := arterial("abg", 45)
			ve := newFact("ve", QMinuteVol, 10, tc.offset, detail("expired"))
			sel := Select(bg, []Fact{bg, ve}, DefaultSite())
			in, ok := sel.Input(RoleMinuteVolume)
			if ok != tc.used {
				t.Fatalf("used = %v, want %v", ok, tc.used)
			}
			if ok && in.Offset != tc.offset {
				t.Errorf("offset %v, want %v", in.Offset, tc.offset)
			}
			if !ok && (!sel.HasOutside || sel.NearestOutside != tc.offset || sel.Ventilator != 0) {
				t.Errorf("outside reading not reported: %+v", sel)
			}
		})
	}
}

// TestSelectPreference checks measured over set, expired over inspired,
// total over mechanical breath rate, then nearest, then earlier, then Key.
func TestSelectPreference(t *testing.T) {
	tests := []struct {
		name     string
		role     Role
		facts    []Fact
		want     string // chosen fact key
		fallback string // substring of Input.Fallback, "" for none
	}{
		{"expired_minute_volume_beats_nearer_inspired_and_setting", RoleMinuteVolume, []Fact{
			newFact("ve-exp", QMinuteVol, 10, -20*time.Minute, detail("expired")),
			newFact("ve-insp", QMinuteVol, 11, -1*time.Minute, detail("inspired")),
			newFact("ve-set", QMinuteVol, 12, 0, setting()),
		}, "Observation/ve-exp", ""},
		{"inspired_minute_volume_beats_setting_with_fallback", RoleMinuteVolume, []Fact{
			newFact("ve-insp", QMinuteVol, 11, -20*time.Minute, detail("inspired")),
			newFact("ve-set", QMinuteVol, 12, 0, setting()),
		}, "Observation/ve-insp", "inspired minute volume used: no measured expired minute volume"},
		{"minute_volume_setting_as_last_fallback", RoleMinuteVolume, []Fact{
			newFact("ve-set", QMinuteVol, 12, -3*time.Minute, setting()),
		}, "Observation/ve-set", "minute volume setting used"},
		{"expired_tidal_volume_beats_delivered_and_setting", RoleTidalVolume, []Fact{
			newFact("vt-set", QTidalVol, 450, 0, setting()),
			newFact("vt-del", QTidalVol, 480, -time.Minute, detail("delivered")),
			newFact("vt-exp", QTidalVol, 470, -25*time.Minute, detail("expired")),
		}, "Observation/vt-exp", ""},
		{"delivered_tidal_volume_beats_setting_with_fallback", RoleTidalVolume, []Fact{
			newFact("vt-set", QTidalVol, 450, 0, setting()),
			newFact("vt-del", QTidalVol, 480, -9*time.Minute, detail("delivered")),
		}, "Observation/vt-del", "measured delivered tidal volume used"},
		{"total_rate_beats_mechanical_and_setting", RoleRespRate, []Fact{
			newFact("rr-mech", QRespRate, 14, 0, detail("mechanical")),
			newFact("rr-set", QRespRate, 14, 0, setting()),
			newFact("rr-tot", QRespRate, 18, -15*time.Minute, detail("total")),
		}, "Observation/rr-tot", ""},
		{"mechanical_rate_beats_setting_with_fallback", RoleRespRate, []Fact{
			newFact("rr-set", QRespRate, 14, 0, setting()),
			newFact("rr-mech", QRespRate, 16, -15*time.Minute, detail("mechanical")),
		}, "Observation/rr-mech", "measured mechanical breath rate used"},
		{"spontaneous_rate_never_used_alone", RoleRespRate, []Fact{
			newFact("rr-spont", QRespRate, 6, 0, detail("spontaneous")),
			newFact("rr-set", QRespRate, 14, -15*time.Minute, setting()),
		}, "Observation/rr-set", "breath rate setting used"},
		{"measured_etco2_beats_calculated", RolePETCO2, []Fact{
			newFact("et-calc", QPETCO2, 34, 0, origin(OriginCalculated)),
			newFact("et-meas", QPETCO2, 35, -20*time.Minute),
		}, "Observation/et-meas", ""},
		{"nearest_in_time_wins_within_a_rank", RoleMinuteVolume, []Fact{
			newFact("ve-far", QMinuteVol, 10, -10*time.Minute, detail("expired")),
			newFact("ve-near", QMinuteVol, 10, -5*time.Minute, detail("expired")),
			newFact("ve-after", QMinuteVol, 10, 6*time.Minute, detail("expired")),
		}, "Observation/ve-near", ""},
		{"tie_5_min_before_and_after_earlier_wins", RoleMinuteVolume, []Fact{
			newFact("ve-after", QMinuteVol, 10, 5*time.Minute, detail("expired")),
			newFact("ve-before", QMinuteVol, 10, -5*time.Minute, detail("expired")),
		}, "Observation/ve-before", ""},
		{"tie_same_time_smaller_key_wins", RoleMinuteVolume, []Fact{
			newFact("ve-b", QMinuteVol, 10, -5*time.Minute, detail("expired")),
			newFact("ve-a", QMinuteVol, 10, -5*time.Minute, detail("expired")),
		}, "Observation/ve-a", ""},
		{"reading_of_other_encounter_not_used", RoleMinuteVolume, []Fact{
			newFact("ve-other", QMinuteVol, 10, -1*time.Minute, detail("expired"), encounter("Encounter/demo-enc-2")),
			newFact("ve-same", QMinuteVol, 10, -20*time.Minute, detail("expired")),
		}, "Observation/ve-same", ""},
		{"reading_without_encounter_used", RoleMinuteVolume, []Fact{
			newFact("ve-none", QMinuteVol, 10, -1*time.Minute, detail("expired"), encounter("")),
		}, "Observation/ve-none", ""},
		{"reading_of_other_patient_not_used", RoleMinuteVolume, []Fact{
			newFact("ve-other", QMinuteVol, 10, -1*time.Minute, detail("expired"), patient("Patient/demo-other")),
			newFact("ve-mine", QMinuteVol, 10, -20*time.Minute, detail("expired")),
		}, "Observation/ve-mine", ""},
		{"entered_in_error_reading_not_used", RoleMinuteVolume, []Fact{
			newFact("ve-err", QMinuteVol, 10, -1*time.Minute, detail("expired"), status(StatusEnteredInError)),
			newFact("ve-ok", QMinuteVol, 10, -20*time.Minute, detail("expired")),
		}, "Observation/ve-ok", ""},
		{"registered_reading_not_used", RoleMinuteVolume, []Fact{
			newFact("ve-reg", QMinuteVol, 10, -1*time.Minute, detail("expired"), status(StatusRegistered)),
			newFact("ve-ok", QMinuteVol, 10, -20*time.Minute, detail("expired"), status(StatusPreliminary)),
		}, "Observation/ve-ok", ""},
		{"height_latest_before_the_gas_from_any_encounter_beats_a_later_one", RoleHeight, []Fact{
			newFact("h-old", QHeight, 170, -400*24*time.Hour, encounter("Encounter/demo-enc-0")),
			newFact("h-new", QHeight, 175, -30*24*time.Hour, encounter("Encounter/demo-enc-0")),
			newFact("h-future", QHeight, 176, 48*time.Hour),
		}, "Observation/h-new", ""},
		{"weight_at_the_gas_time_counts_as_before", RoleWeight, []Fact{
			newFact("w-at", QWeight, 80, 0),
			newFact("w-after", QWeight, 70, time.Minute),
		}, "Observation/w-at", ""},
		{"weight_only_after_the_gas_earliest_wins", RoleWeight, []Fact{
			newFact("w-late", QWeight, 70, 72*time.Hour),
			newFact("w-soon", QWeight, 71, 2*time.Hour),
		}, "Observation/w-soon", ""},
		{"weight_before_beats_nearer_after", RoleWeight, []Fact{
			newFact("w-after", QWeight, 70, time.Minute),
			newFact("w-before", QWeight, 71, -30*24*time.Hour),
		}, "Observation/w-before", ""},
		{"patient_resource_fact_zero_time_counts_as_before", RoleSex, []Fact{
			newFact("sex-later", QSex, 0, 24*time.Hour, text("female")),
			newFact("sex", QSex, 0, 0, fromPatient("sex"), text("male"), func(f *Fact) { f.Effective = time.Time{} }),
		}, testPatient + "#sex", ""},
		{"weight_tie_smaller_key", RoleWeight, []Fact{
			newFact("w-b", QWeight, 71, -time.Hour),
			newFact("w-a", QWeight, 70, -time.Hour),
		}, "Observation/w-a", ""},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			bg := arterial("abg", 45)
			sel := Select(bg, append([]Fact{bg}, tc.facts...), DefaultSite())
			in, ok := sel.Input(tc.role)
			if !ok {
				t.Fatalf("no %s selected: %+v", tc.role, sel)
			}
			if in.Fact.Key != tc.want {
				t.Errorf("chose %s, want %s", in.Fact.Key, tc.want)
			}
			if tc.fallback == "" && in.Fallback != "" {
				t.Errorf("fallback %q, want none", in.Fallback)
			}
			if tc.fallback != "" && !strings.Contains(in.Fallback, tc.fallback) {
				t.Errorf("fallback %q, want it to say %q", in.Fallback, tc.fallback)
			}
			if want := in.Fact.Effective.Sub(t0); in.Offset != want {
				t.Errorf("offset %v, want %v", in.Offset, want)
			}
		})
	}
}

func TestSelectCounters(t *testing.T) {
	bg := arterial("abg", 45)
	facts := []Fact{bg,
		newFact("ve-other", QMinuteVol, 10, -time.Minute, detail("expired"), encounter("Encounter/demo-enc-2")),
		newFact("ve-err", QMinuteVol, 10, -time.Minute, detail("expired"), status(StatusEnteredInError)),
		newFact("ve-stale", QMinuteVol, 10, -2*time.Hour, detail("expired")),
		newFact("ve-stale2", QMinuteVol, 10, -50*time.Minute, detail("expired")),
	}
	sel := Select(bg, facts, DefaultSite())
	if sel.Ventilator != 0 || sel.OtherEncounter != 1 || sel.NotUsable != 1 || !sel.HasOutside || sel.NearestOutside != -50*time.Minute {
		t.Errorf("counters %+v", sel)
	}
	_, rs := Derive(sel, DefaultSite())
	_, rm := byKind(nil, rs)
	r := rm[KindDeadSpaceVCO2]
	for _, want := range []string{ReasonNoVentilatorData} {
		if r.Reason != want {
			t.Errorf("reason %q, want %q", r.Reason, want)
		}
	}
	for _, want := range []string{"50 min before", "1 reading(s) of another encounter", "1 reading(s) with an unusable status"} {
		if !strings.Contains(r.Detail, want) {
			t.Errorf("detail %q lacks %q", r.Detail, want)
		}
	}
}

// TestSelectWindowFromSite checks that the site's window, not a constant,
// bounds the selection.
func TestSelectWindowFromSite(t *testing.T) {
	site := DefaultSite()
	site.Window = Window{Before: 60 * time.Minute, After: 0}
	bg := arterial("abg", 45)
	facts := []Fact{bg,
		newFact("ve-45", QMinuteVol, 10, -45*time.Minute, detail("expired")),
		newFact("ve-after", QMinuteVol, 10, time.Minute, detail("expired")),
	}
	in, ok := Select(bg, facts, site).Input(RoleMinuteVolume)
	if !ok || in.Fact.Key != "Observation/ve-45" {
		t.Errorf("chose %+v, want ve-45 (60 min before, 0 after)", in)
	}
}

func TestSelectBloodGasReasons(t *testing.T) {
	tests := []struct {
		name   string
		bg     Fact
		reason string
	}{
		{"arterial_final_ok", arterial("abg", 45), ""},
		{"arterial_preliminary_ok", arterial("abg", 45, status(StatusPreliminary)), ""},
		{"arterial_corrected_ok", arterial("abg", 45, status(StatusCorrected)), ""},
		{"venous", arterial("abg", 45, specimen(SpecimenVenous)), ReasonVenous},
		{"capillary", arterial("abg", 45, specimen(SpecimenCapillary)), ReasonCapillary},
		{"mixed_venous", arterial("abg", 45, specimen(SpecimenMixedVenous)), ReasonMixedVenous},
		{"unknown_specimen", arterial("abg", 45, specimen(SpecimenUnknown)), ReasonUnknownSpecimen},
		{"no_specimen", arterial("abg", 45, specimen(SpecimenNone)), ReasonUnknownSpecimen},
		{"entered_in_error", arterial("abg", 45, status(StatusEnteredInError)), ReasonEnteredInError},
		{"registered", arterial("abg", 45, status(StatusRegistered)), ReasonBloodGasNotUsable},
		{"unknown_status", arterial("abg", 45, status(StatusUnknown)), ReasonBloodGasNotUsable},
		{"temperature_corrected", arterial("abg", 45, func(f *Fact) { f.TempCorrected = true }), ReasonTemperatureAdjusted},
		// physio.PaCO2Range is 10 to 250 mm[Hg]: 6 and 8 are kPa values sent
		// as mm[Hg] (45 and 60 mm[Hg]; UCUM 1 kPa = 7.500638 mm[Hg]).
		{"PaCO2_6_mmHg_implausible", arterial("abg", 6), ReasonImplausible},
		{"PaCO2_8_kPa_as_mmHg_implausible", arterial("abg", 8), ReasonImplausible},
		{"PaCO2_260_mmHg_implausible", arterial("abg", 260), ReasonImplausible},
		{"PaCO2_10_mmHg_at_edge_ok", arterial("abg", 10), ""},
		{"not_a_pco2_fact", newFact("x", QPETCO2, 35, 0), ReasonNotBloodGas},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			sel := Select(tc.bg, vectorFacts(), DefaultSite())
			if sel.Reason != tc.reason {
				t.Errorf("reason %q (%s), want %q", sel.Reason, sel.Detail, tc.reason)
			}
			if tc.reason != "" && (len(sel.Inputs) != 1 || sel.Detail == "") {
				t.Errorf("refused selection has inputs %v, detail %q", sel.Inputs, sel.Detail)
			}
		})
	}
}

// TestSelectIsDeterministic checks that the order of facts does not change
// the selection.
func TestSelectIsDeterministic(t *testing.T) {
	bg := arterial("abg", 45)
	facts := []Fact{bg,
		newFact("ve-b", QMinuteVol, 10, -5*time.Minute, detail("expired")),
		newFact("ve-a", QMinuteVol, 11, -5*time.Minute, detail("expired")),
		newFact("ve-c", QMinuteVol, 12, 5*time.Minute, detail("expired")),
		newFact("h-1", QHeight, 170, -time.Hour),
		newFact("h-2", QHeight, 171, -time.Hour),
	}
	want := Select(bg, facts, DefaultSite())
	for i := range facts {
		rot := append(append([]Fact(nil), facts[i:]...), facts[:i]...)
		got := Select(bg, rot, DefaultSite())
		for _, r := range []Role{RoleMinuteVolume, RoleHeight} {
			a, _ := want.Input(r)
			b, _ := got.Input(r)
			if a.Fact.Key != b.Fact.Key {
				t.Errorf("rotation %d: %s chose %s, want %s", i, r, b.Fact.Key, a.Fact.Key)
			}
		}
	}
}
