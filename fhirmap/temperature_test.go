package fhirmap

import (
	"math"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/physio"
)

// temperatureSites are the body temperature codes by site, as the MII-ICU
// guide's temperature profiles (SD_MII_ICU_Koerpertemperatur_*) and the ISiK
// core-temperature profile name them; core sites are preferred [common
// practice: peripheral temperatures lag and differ from core].
var temperatureSites = []struct{ code, detail string }{
	{"8329-5", "core"}, {"8332-9", "core"}, {"60836-4", "core"}, {"60838-0", "core"}, {"8334-5", "core"},
	{"76010-8", "peripheral"},
}

func TestTemperatureSiteCodes(t *testing.T) {
	codes := DefaultCodes()
	for _, c := range temperatureSites {
		ci, ok := codes.Lookup(LOINCSystem, c.code)
		if !ok || ci.Quantity != QBodyTemp || ci.Detail != c.detail || ci.Origin != OriginMeasured {
			t.Errorf("%s: %+v, want body temperature, %s", c.code, ci, c.detail)
		}
	}
	if ci, _ := codes.Lookup(LOINCSystem, "8310-5"); ci.Detail != "" {
		t.Errorf("8310-5 (site not stated) has detail %q", ci.Detail)
	}
}

// The ISiK and MII-ICU core-temperature profiles code one Observation with
// 8310-5 (required by the FHIR R4 vital-signs profile) and 8329-5 together:
// that is one core temperature, not a conflict.
func TestCoreTemperatureCodedTwice(t *testing.T) {
	raw := []byte(`{"resourceType":"Observation","id":"temp-core-1","status":"final",
"category":[{"coding":[{"system":"http://terminology.hl7.org/CodeSystem/observation-category","code":"vital-signs"}]}],
"code":{"coding":[{"system":"http://loinc.org","code":"8310-5"},{"system":"http://loinc.org","code":"8329-5"}]},
"subject":{"reference":"Patient/demo-7f3a"},"effectiveDateTime":"2026-03-02T07:00:00Z",
"valueQuantity":{"value":33.6,"unit":"Cel","system":"http://unitsofmeasure.org","code":"Cel"}}`)
	d := mustDecode(t, raw)
	if len(d.Facts) != 1 || d.Facts[0].Quantity != QBodyTemp || d.Facts[0].Detail != "core" || d.Facts[0].Value != 33.6 {
		t.Fatalf("facts %+v, want one core body temperature 33.6", d.Facts)
	}
}

// A body temperature coded only 8310-5 names its site in bodySite in the
// MII-ICU profiles (SNOMED CT body structures: rectum 34402009, nasal
// 45206002).
func TestTemperatureSiteFromBodySite(t *testing.T) {
	for _, c := range []struct{ site, want string }{{"34402009", "core"}, {"45206002", "peripheral"}, {"12345678", ""}} {
		raw := []byte(`{"resourceType":"Observation","id":"temp-site-1","status":"final",
"code":{"coding":[{"system":"http://loinc.org","code":"8310-5"}]},
"bodySite":{"coding":[{"system":"http://snomed.info/sct","code":"` + c.site + `"}]},
"subject":{"reference":"Patient/demo-7f3a"},"effectiveDateTime":"2026-03-02T07:00:00Z",
"valueQuantity":{"value":36.1,"unit":"Cel","system":"http://unitsofmeasure.org","code":"Cel"}}`)
		d := mustDecode(t, raw)
		if len(d.Facts) != 1 || d.Facts[0].Detail != c.want {
			t.Errorf("bodySite %s: facts %+v, want detail %q", c.site, d.Facts, c.want)
		}
	}
}

// cooled is the reference vector (physiology.md s11) with a measured body
// temperature: a patient cooled to 33.5 °C.
func cooled(extra ...Fact) []Fact {
	return append(vectorFacts(), extra...)
}

func TestTemperatureWindow(t *testing.T) {
	site := DefaultSite()
	pick := func(facts []Fact) (Input, bool) {
		return Select(facts[0], facts, site).Input(RoleBodyTemp)
	}
	t.Run("hourly_temperature_90_min_before_is_paired", func(t *testing.T) {
		// Outside the 30 min ventilator window, inside the 2 h temperature
		// window: charted hourly, the last one is up to an hour old
		// [common practice].
		in, ok := pick(cooled(newFact("temp-1", QBodyTemp, 33.5, -90*time.Minute)))
		if !ok || in.Fact.Value != 33.5 {
			t.Fatalf("temperature 90 min before not paired: %+v %v", in, ok)
		}
	})
	t.Run("3_h_before_is_not", func(t *testing.T) {
		if in, ok := pick(cooled(newFact("temp-1", QBodyTemp, 33.5, -3*time.Hour))); ok {
			t.Fatalf("temperature 3 h before paired: %+v", in)
		}
	})
	t.Run("core_beats_a_nearer_site_not_stated", func(t *testing.T) {
		in, ok := pick(cooled(newFact("temp-core", QBodyTemp, 33.6, -70*time.Minute, detail("core")),
			newFact("temp-any", QBodyTemp, 35.0, -5*time.Minute)))
		if !ok || in.Fact.Value != 33.6 || in.Fallback != "" {
			t.Fatalf("got %+v, want the core temperature without fallback", in)
		}
	})
	t.Run("peripheral_used_as_a_recorded_fallback", func(t *testing.T) {
		in, ok := pick(cooled(newFact("temp-nasal", QBodyTemp, 35.2, -10*time.Minute, detail("peripheral"))))
		if !ok || !strings.Contains(in.Fallback, "peripheral") {
			t.Fatalf("got %+v, want a recorded peripheral fallback", in)
		}
	})
	t.Run("temperature_does_not_make_inputs_apart", func(t *testing.T) {
		s := site
		s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 50, true
		ds, _ := DeriveAll(cooled(newFact("temp-1", QBodyTemp, 36.9, -80*time.Minute)), s)
		for _, d := range ds {
			if slices.Contains(d.Result.Flags(), physio.FlagInputsApart) {
				t.Errorf("%s flagged inputs apart by a temperature 80 min before", d.Kind)
			}
		}
	})
}

func TestTemperatureConventionApplied(t *testing.T) {
	site := DefaultSite()
	site.ApparatusDeadSpaceML, site.ApparatusDeadSpaceConfigured = 50, true
	const tempC = 33.5
	// PaCO2 45 mmHg at 37 °C is 45 x 10^(0.019 x -3.5) = 38.61 mmHg at
	// 33.5 °C (in vitro coefficient 0.019, J Appl Physiol 1964 [published]).
	pT := 45 * math.Pow(10, 0.019*(tempC-37))
	kT := 0.760 * (273 + tempC) / 273 // reference s1 [derived]
	ds, rs := DeriveAll(cooled(newFact("temp-1", QBodyTemp, tempC, -40*time.Minute, detail("core"))), site)
	dm, rm := byKind(ds, rs)
	want := map[string]float64{
		// reference s2 [derived] with the corrected PaCO2 and K(T)
		KindDeadSpaceVCO2: 1 - kT*200/(10*pT),
		// reference s8 [published formulas] with the corrected PaCO2
		KindPaCO2PETCO2Gradient: pT - 35,
		KindAlveolarDeadSpace:   (pT - 35) / pT,
		// reference s6 [published: Sinha 2009]
		KindVentilatoryRatio: 10000 * pT / (70.566 * 100 * 37.5),
	}
	for kind, w := range want {
		d, ok := dm[kind]
		if !ok {
			t.Errorf("%s refused: %+v", kind, rm[kind])
			continue
		}
		if math.Abs(d.Result.Value-w) > 1e-6*math.Max(1, math.Abs(w)) {
			t.Errorf("%s = %.6f, want %.6f at the patient's temperature", kind, d.Result.Value, w)
		}
		if !slices.ContainsFunc(d.Steps, func(r physio.Result) bool { return strings.Contains(r.Basis(), "PaCO2(33.5 °C)") }) {
			t.Errorf("%s: no temperature-correction step in the basis", kind)
		}
	}
	// Predicted PaCO2 at body temperature, given back at 37 °C; measured
	// minus predicted compares the two at 37 °C, as the blood gas is reported.
	vd := 0.43 / 0.45359237 * 70.566 // Nunn, Campbell & Peckett 1959 [published]
	predT := kT * 200 / ((500 - vd - 50) * 20 / 1000)
	pred37 := predT * math.Pow(10, 0.019*(37-tempC))
	if d := dm[KindPredictedPaCO2]; math.Abs(d.Result.Value-pred37) > 1e-6 {
		t.Errorf("predicted %.4f, want %.4f at 37 °C", d.Result.Value, pred37)
	}
	if d := dm[KindPaCO2Discrepancy]; math.Abs(d.Result.Value-(45-pred37)) > 1e-6 {
		t.Errorf("measured minus predicted %.4f, want %.4f", d.Result.Value, 45-pred37)
	}
	// The ratio of the rate for target is the same in either frame.
	site.TargetPaCO2mmHg = 40
	ds, _ = DeriveAll(cooled(newFact("temp-1", QBodyTemp, tempC, -40*time.Minute)), site)
	dm, _ = byKind(ds, nil)
	if d := dm[KindRateForTarget]; math.Abs(d.Result.Value-20*45.0/40) > 1e-9 {
		t.Errorf("rate for target %.4f, want %.4f (reference s9)", d.Result.Value, 20*45.0/40)
	}

	t.Run("not_measured_says_so", func(t *testing.T) {
		ds, _ := DeriveAll(vectorFacts(), site)
		dm, _ := byKind(ds, nil)
		for _, kind := range []string{KindPaCO2PETCO2Gradient, KindAlveolarDeadSpace, KindVentilatoryRatio} {
			d := dm[kind]
			if !slices.ContainsFunc(d.Result.Assumptions(), func(a string) bool { return strings.Contains(a, "PaCO2 used as measured at 37 °C") }) {
				t.Errorf("%s: assumptions %q do not say the PaCO2 is uncorrected", kind, d.Result.Assumptions())
			}
		}
		if d := dm[KindPaCO2PETCO2Gradient]; d.Result.Value != 10 {
			t.Errorf("gradient %.4f, want 10 (reference s8)", d.Result.Value)
		}
	})
}
