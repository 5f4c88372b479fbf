package fhirmap

import (
	"math"
	"strings"
	"testing"
	"time"
)

// noteWith returns the basis note that starts with prefix, or "".
func noteWith(d Derivation, prefix string) string {
	for _, n := range BasisNotes(d) {
		if strings.HasPrefix(n, prefix) {
			return n
		}
	}
	return ""
}

// targetSite is the default site with an apparatus dead space and a target,
// so that every kind can be derived.
func targetSite() Site {
	s := DefaultSite()
	s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 50, true
	s.TargetPaCO2mmHg = 40
	return s
}

// TestSetMinuteVolumeIsNotVentilation: a set minute volume is not a
// measurement of ventilation. The kinds that rest on the measured minute
// volume are refused with no-minute-volume when only a setting is in the
// window; a measured inspired volume is accepted as a recorded fallback;
// predicted PaCO2 and the rate for the target, which are about settings,
// still use set tidal volume and rate.
func TestSetMinuteVolumeIsNotVentilation(t *testing.T) {
	ventilation := []string{KindDeadSpaceVCO2, KindDeadSpaceEstimated, KindDeadSpaceVolume,
		KindAlveolarVentilation, KindVentilatoryRatio, KindTidalVolumeForTarget}
	t.Run("only_set_minute_volume_refused", func(t *testing.T) {
		facts := append(without(vectorFacts(), "ve-1"), newFact("ve-set", QMinuteVol, 10, -5*time.Minute, setting()))
		ds, rs := DeriveAll(facts, targetSite())
		dm, rm := byKind(ds, rs)
		for _, k := range ventilation {
			r, ok := rm[k]
			if !ok {
				t.Errorf("%s derived from a set minute volume (%v)", k, dm[k].Result.Value)
				continue
			}
			if r.Reason != ReasonNoMinuteVolume || !strings.Contains(r.Detail, "only a set minute volume") || !strings.Contains(r.Detail, "Observation/ve-set") {
				t.Errorf("%s: %s %q, want %s naming the setting", k, r.Reason, r.Detail, ReasonNoMinuteVolume)
			}
		}
		for _, k := range []string{KindPredictedPaCO2, KindRateForTarget, KindPaCO2PETCO2Gradient} {
			if _, ok := dm[k]; !ok {
				t.Errorf("%s refused (%+v); it does not need a measured minute volume", k, rm[k])
			}
		}
	})
	t.Run("measured_inspired_minute_volume_is_a_recorded_fallback", func(t *testing.T) {
		facts := append(without(vectorFacts(), "ve-1"),
			newFact("ve-set", QMinuteVol, 10, -5*time.Minute, setting()),
			newFact("ve-insp", QMinuteVol, 10, -5*time.Minute, detail("inspired")))
		ds, rs := DeriveAll(facts, targetSite())
		dm, rm := byKind(ds, rs)
		for _, k := range ventilation {
			d, ok := dm[k]
			if !ok {
				t.Errorf("%s refused with a measured inspired minute volume: %+v", k, rm[k])
				continue
			}
			a := noteWith(d, "Assumptions: ")
			if !strings.Contains(a, "measured inspired minute volume used: no measured expired minute volume in the window") {
				t.Errorf("%s: fallback not stated: %q", k, a)
			}
			if in := noteWith(d, "Inputs: "); !strings.Contains(in, "minute volume 10 L/min [inspired, measured,") {
				t.Errorf("%s: input kind not stated: %q", k, in)
			}
		}
	})
	t.Run("set_tidal_volume_and_rate_for_predicted_PaCO2_recorded", func(t *testing.T) {
		facts := append(without(vectorFacts(), "vt-1", "rr-1"),
			newFact("vt-set", QTidalVol, 500, -5*time.Minute, setting()),
			newFact("rr-set", QRespRate, 20, -5*time.Minute, setting()))
		ds, rs := DeriveAll(facts, targetSite())
		dm, rm := byKind(ds, rs)
		for _, k := range []string{KindPredictedPaCO2, KindRateForTarget} {
			d, ok := dm[k]
			if !ok {
				t.Fatalf("%s refused: %+v", k, rm[k])
			}
			a := noteWith(d, "Assumptions: ")
			for _, want := range []string{"breath rate setting used: no measured total breath rate", "tidal volume setting used: no measured expired tidal volume"} {
				if !strings.Contains(a, want) {
					t.Errorf("%s: %q lacks %q", k, a, want)
				}
			}
		}
	})
}

// TestInputNotesNameEveryKind: every input line names the kind of value
// used (its detail and origin), and every fallback is stated among the
// assumptions, whichever rank Select took.
func TestInputNotesNameEveryKind(t *testing.T) {
	facts := []Fact{
		arterial("abg-1", 45),
		newFact("ve-u", QMinuteVol, 10, -5*time.Minute),
		newFact("vco2-1", QVCO2, 200, -5*time.Minute),
		newFact("vt-tot", QTidalVol, 500, -5*time.Minute, detail("total")),
		newFact("rr-mech", QRespRate, 20, -5*time.Minute, detail("mechanical")),
		newFact("et-calc", QPETCO2, 35, -5*time.Minute, origin(OriginCalculated)),
		newFact("sex", QSex, 0, -72*time.Hour, fromPatient("sex"), text("male")),
		newFact("height-1", QHeight, 175, -48*time.Hour),
	}
	ds, rs := DeriveAll(facts, targetSite())
	dm, rm := byKind(ds, rs)
	want := map[string][]string{
		KindDeadSpaceVolume: {"measured minute volume (direction not stated) used: no measured expired minute volume",
			"measured total (spontaneous + mechanical) tidal volume used: no measured expired tidal volume"},
		KindPredictedPaCO2: {"measured mechanical breath rate used: no measured total breath rate",
			"measured total (spontaneous + mechanical) tidal volume used"},
		KindPaCO2PETCO2Gradient: {"calculated end-tidal PCO2 used: no measured end-tidal PCO2"},
	}
	for k, fallbacks := range want {
		d, ok := dm[k]
		if !ok {
			t.Fatalf("%s refused: %+v", k, rm[k])
		}
		a := noteWith(d, "Assumptions: ")
		for _, f := range fallbacks {
			if !strings.Contains(a, f) {
				t.Errorf("%s: assumptions %q lack %q", k, a, f)
			}
		}
		if strings.Contains(a, "delivered tidal volume") {
			t.Errorf("%s: a total tidal volume (20118-6) described as delivered: %q", k, a)
		}
		in := noteWith(d, "Inputs: ")
		for _, input := range d.Inputs {
			f := input.Fact
			if f.Quantity == QSex || f.Quantity == QBirthDate {
				continue
			}
			attrs := []string{string(f.Origin), string(f.Status), f.Key}
			if f.Detail != "" {
				attrs = append([]string{f.Detail}, attrs...)
			}
			if f.Specimen != SpecimenNone {
				attrs = append([]string{string(f.Specimen)}, attrs...)
			}
			if !strings.Contains(in, "["+strings.Join(attrs, ", ")) {
				t.Errorf("%s: input %s not described with its kind %v in %q", k, f.Key, attrs, in)
			}
		}
	}
}

// TestSiteRQRecordedAsAssumedOrConfigured: the site default RQ 0.8 is an
// assumption (not measured), never "given"; another site value is labelled
// configured, not measured.
func TestSiteRQRecordedAsAssumedOrConfigured(t *testing.T) {
	for _, tc := range []struct {
		name        string
		rq          float64
		constant    string
		assumption  string
		notAnywhere string
	}{
		{"default_0.8_assumed", DefaultRQ, "RQ = 0.8 (default 0.8, not measured", "respiratory quotient not measured: 0.8 assumed", "configured"},
		{"site_0.85_configured", 0.85, "RQ = 0.85 (configured by the caller, not measured", "respiratory quotient not measured: the configured value is used", "0.8 assumed"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			site := DefaultSite()
			site.RQ = tc.rq
			ds, _ := DeriveAll(vectorFacts(), site)
			dm, _ := byKind(ds, nil)
			d := dm[KindDeadSpaceEstimated]
			c, a := noteWith(d, "Constants: "), noteWith(d, "Assumptions: ")
			if !strings.Contains(c, tc.constant) || !strings.Contains(a, tc.assumption) {
				t.Errorf("constants %q / assumptions %q, want %q and %q", c, a, tc.constant, tc.assumption)
			}
			if strings.Contains(c+a, "given by the caller") || strings.Contains(a, tc.notAnywhere) {
				t.Errorf("RQ mislabelled: %q %q", c, a)
			}
		})
	}
}

// TestConstantsShownAtReadablePrecision: the notes show constants as a
// person reads them (K = 0.863, physiology.md s1 [published: Wang et al.
// 2020]; Harris-Benedict coefficients as published, 13.7516 [published:
// Harris & Benedict 1919]) with display units, while the derivation's data
// keep full precision (K = 760 x 310/273/1000 = 0.8630036630036629
// [derived]) for a reviewer who redoes the arithmetic.
func TestConstantsShownAtReadablePrecision(t *testing.T) {
	ds, _ := DeriveAll(vectorFacts(), DefaultSite())
	dm, _ := byKind(ds, nil)
	vco2 := noteWith(dm[KindDeadSpaceVCO2], "Constants: ")
	if !strings.Contains(vco2, "K = 0.863 mmHg·L/mL") || strings.Contains(vco2, "0.8630036") {
		t.Errorf("K not shown as 0.863 mmHg·L/mL: %q", vco2)
	}
	if note := noteWith(dm[KindDeadSpaceEstimated], "Constants: "); !strings.Contains(note, "REE weight coefficient = 13.7516 ") {
		t.Errorf("Harris-Benedict 13.7516 not shown as published: %q", note)
	}
	full := false
	for _, c := range allConstants(dm[KindDeadSpaceVCO2]) {
		full = full || c.Name == "K" && math.Abs(c.Value-760.0*310/273/1000) < 1e-15 && c.Value != 0.863 && c.Unit == "mm[Hg].L/mL"
	}
	if !full {
		t.Errorf("data lost K at full precision or its UCUM unit: %+v", allConstants(dm[KindDeadSpaceVCO2]))
	}
}

// TestTargetPaCO2MustBeConfigured: no target is assumed; when the site
// sets one, the advice says it is the site's, not the patient's.
func TestTargetPaCO2MustBeConfigured(t *testing.T) {
	kinds := []string{KindRateForTarget, KindTidalVolumeForTarget}
	t.Run("default_site_refuses", func(t *testing.T) {
		if DefaultSite().TargetPaCO2mmHg != 0 {
			t.Fatalf("DefaultSite sets a target")
		}
		facts := append(vectorFacts(), newFact("pe", QPECO2, 17.26, -2*time.Minute))
		ds, rs := DeriveAll(facts, DefaultSite())
		dm, rm := byKind(ds, rs)
		for _, k := range kinds {
			if _, ok := dm[k]; ok {
				t.Errorf("%s derived without a configured target", k)
			}
			if r := rm[k]; r.Reason != ReasonTargetNotSet || ReasonMeaning(r.Reason) == "" {
				t.Errorf("%s: %+v, want %s", k, r, ReasonTargetNotSet)
			}
		}
	})
	t.Run("missing_input_reported_before_target", func(t *testing.T) {
		_, rs := DeriveAll(without(vectorFacts(), "rr-1"), DefaultSite())
		_, rm := byKind(nil, rs)
		if r := rm[KindRateForTarget]; r.Reason != ReasonNoRespRate {
			t.Errorf("reason %q, want %s first", r.Reason, ReasonNoRespRate)
		}
	})
	t.Run("configured_55_mmHg_stated_as_site_target", func(t *testing.T) {
		site := DefaultSite()
		site.TargetPaCO2mmHg = 55
		ds, rs := DeriveAll(vectorFacts(), site)
		dm, rm := byKind(ds, rs)
		for _, k := range kinds {
			d, ok := dm[k]
			if !ok {
				t.Fatalf("%s refused: %+v", k, rm[k])
			}
			a := noteWith(d, "Assumptions: ")
			if !strings.Contains(a, "target PaCO2 55 mmHg is the site's configured target: no PaCO2 Goal of the patient is in force; patients with chronic hypercapnia or on a permissive-hypercapnia strategy need their own target") {
				t.Errorf("%s: %q", k, a)
			}
		}
		// physiology.md s9: RR_new = RR x PaCO2 / target = 20 x 45 / 55 [derived].
		if v := dm[KindRateForTarget].Result.Value; v != 20*45/55.0 {
			t.Errorf("rate for target 55: %v, want %v", v, 20*45/55.0)
		}
	})
	t.Run("catalogue_and_reasons_name_it", func(t *testing.T) {
		for _, k := range kinds {
			info, _ := LookupKind(k)
			if !strings.Contains(info.Refused, ReasonTargetNotSet) {
				t.Errorf("%s Refused %q lacks %s", k, info.Refused, ReasonTargetNotSet)
			}
		}
	})
}

// TestUnknownSpecimenDetailSaysWhich: a gas of unspecified blood and a gas
// whose arterial code is contradicted by its Specimen are both refused,
// each with its own explanation.
func TestUnknownSpecimenDetailSaysWhich(t *testing.T) {
	unspecified := arterial("abg-1", 45, specimen(SpecimenUnknown), func(f *Fact) { f.Code.Code = "11557-6" })
	conflict := arterial("abg-1", 45, specimen(SpecimenUnknown), detail("specimen conflict: arterial (code), capillary (Specimen or panel)"))
	for _, tc := range []struct {
		name string
		bg   Fact
		has  string
		not  string
	}{
		{"unspecified_blood", unspecified, "unspecified blood (code 11557-6) and no coded arterial Specimen", "different blood"},
		{"arterial_code_contradicted_by_capillary_specimen", conflict, "(code 2019-8) whose sources name different blood: arterial (code), capillary (Specimen or panel)", "unspecified"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			sel := Select(tc.bg, vectorFacts(), DefaultSite())
			if sel.Reason != ReasonUnknownSpecimen || !strings.Contains(sel.Detail, tc.has) || strings.Contains(sel.Detail, tc.not) {
				t.Errorf("%s %q, want %s with %q", sel.Reason, sel.Detail, ReasonUnknownSpecimen, tc.has)
			}
		})
	}
}

// TestCatalogueWording: the VCO2 formula states that K follows the
// measured body temperature, and no display claims that settings are used
// where measured values are preferred.
func TestCatalogueWording(t *testing.T) {
	k, _ := LookupKind(KindDeadSpaceVCO2)
	if !strings.Contains(k.Formula, "K(T) = 0.760 x (273 + T)/273") || strings.Contains(k.Display, "expired minute volume") {
		t.Errorf("VCO2 dead space: display %q formula %q", k.Display, k.Formula)
	}
	p, _ := LookupKind(KindPredictedPaCO2)
	if strings.Contains(p.Display, "ventilator settings and") || !strings.Contains(p.Display, "measured preferred") {
		t.Errorf("predicted PaCO2 display %q", p.Display)
	}
}
