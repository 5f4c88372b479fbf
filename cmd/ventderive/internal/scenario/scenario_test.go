package scenario

import (
	"bytes"
	"encoding/json"
	"math"
	"reflect"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"
)

// Generated and parsed scenarios are shared by the tests (parsing a day
// takes seconds).
var days sync.Map // Options -> *dayResult

type dayResult struct {
	once sync.Once
	sc   Scenario
	p    parsed
}

func generated(t *testing.T, o Options) (Scenario, parsed) {
	t.Helper()
	v, _ := days.LoadOrStore(o, &dayResult{})
	d := v.(*dayResult)
	d.once.Do(func() {
		d.sc = Generate(o)
		d.p = parseAll(t, d.sc)
	})
	if d.p.patients == nil {
		t.Fatal("scenario failed to parse in an earlier test")
	}
	return d.sc, d.p
}

// day is the default 24 h scenario for a seed.
func day(t *testing.T, seed int64) (Scenario, parsed) { return generated(t, Options{Seed: seed}) }

func TestGenerateDeterministic(t *testing.T) {
	short := Options{Seed: 42, Duration: MinDuration}
	a, b := Generate(short), Generate(short)
	if !reflect.DeepEqual(a, b) {
		t.Fatal("same options gave different scenarios")
	}

	c := Generate(Options{Seed: 43, Duration: MinDuration})
	differ := 0
	for i := range min(len(a.Messages), len(c.Messages)) {
		if !bytes.Equal(a.Messages[i].Payload, c.Messages[i].Payload) {
			differ++
		}
	}
	// Patient resources and body measures do not depend on the seed; nearly
	// everything else carries noise.
	if differ < len(a.Messages)*9/10 {
		t.Errorf("seed 42 vs 43: only %d of %d messages differ", differ, len(a.Messages))
	}

	ids := map[string]bool{}
	for _, m := range a.Messages {
		if ids[m.MsgID] {
			t.Fatalf("message id %s used twice", m.MsgID)
		}
		ids[m.MsgID] = true
	}
}

func TestOptionsDefaults(t *testing.T) {
	tests := []struct {
		name     string
		in       Options
		duration time.Duration
		every    time.Duration
	}{
		{"zero_24h_1min", Options{}, 24 * time.Hour, time.Minute},
		{"1h_raised_to_6h", Options{Duration: time.Hour}, 6 * time.Hour, time.Minute},
		{"12h_5min", Options{Duration: 12 * time.Hour, VentEvery: 5 * time.Minute}, 12 * time.Hour, 5 * time.Minute},
		{"1h_vent_capped_10min", Options{Duration: 8 * time.Hour, VentEvery: time.Hour}, 8 * time.Hour, 10 * time.Minute},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			o := tt.in.normalize()
			if o.Duration != tt.duration || o.VentEvery != tt.every || !o.Start.Equal(DefaultStart) {
				t.Errorf("normalize = %v %v %v, want %v %v %v", o.Start, o.Duration, o.VentEvery, DefaultStart, tt.duration, tt.every)
			}
		})
	}
}

func TestMessagesSortedAndWithinDuration(t *testing.T) {
	for _, o := range []Options{{Seed: 1}, {Seed: 5, Duration: MinDuration, VentEvery: 3 * time.Minute}} {
		sc, p := generated(t, o)
		end := sc.Start.Add(sc.Duration)
		for i, m := range sc.Messages {
			if m.At.Before(sc.Start) || !m.At.Before(end) {
				t.Fatalf("message %d at %v outside [%v, %v)", i, m.At, sc.Start, end)
			}
			if i > 0 && m.At.Before(sc.Messages[i-1].At) {
				t.Fatalf("message %d at %v before message %d at %v", i, m.At, i-1, sc.Messages[i-1].At)
			}
			if !strings.HasPrefix(m.Subject, DefaultSubjectPrefix+".") || m.Patient == "" || m.MsgID == "" {
				t.Fatalf("message %d: subject %q patient %q id %q", i, m.Subject, m.Patient, m.MsgID)
			}
		}
		// Nothing is observed after it is sent.
		for _, v := range p.values {
			if v.effective.After(v.at) {
				t.Fatalf("%s effective %v after its message at %v", v.id, v.effective, v.at)
			}
		}
	}
}

// knownCodes are the codes of reference/codes.md the scenario may use, with
// the UCUM units allowed for each and a plausible adult ICU range in the
// code's canonical unit. Ranges are [common practice] bedside limits unless a
// source is named.
var knownCodes = map[string]struct {
	units  []string
	lo, hi float64
}{
	"http://loinc.org|2019-8":            {[]string{"mm[Hg]", "kPa"}, 20, 100}, // PaCO2; normal 35-45 [published textbooks, physiology.md s1]
	"http://loinc.org|2021-4":            {[]string{"mm[Hg]", "kPa"}, 25, 110}, // venous PCO2
	"http://loinc.org|2703-7":            {[]string{"mm[Hg]", "kPa"}, 40, 600}, // PaO2
	"http://loinc.org|2744-1":            {[]string{"[pH]"}, 6.8, 7.8},         // arterial pH
	"http://loinc.org|1960-4":            {[]string{"mmol/L"}, 5, 50},          // bicarbonate
	"http://loinc.org|1925-7":            {[]string{"mmol/L"}, -25, 25},        // base excess
	"http://loinc.org|24336-0":           {nil, 0, 0},                          // arterial gas panel: no value of its own
	"http://loinc.org|19891-1":           {[]string{"mm[Hg]", "kPa"}, 5, 90},   // PETCO2
	"http://loinc.org|60825-7":           {[]string{"mL/min"}, 80, 450},        // VCO2; normal about 200 [published textbooks, physiology.md s1]
	"http://loinc.org|76008-2":           {[]string{"L/min"}, 2, 30},           // expired minute volume
	"http://loinc.org|76009-0":           {[]string{"L/min"}, 2, 30},           // inspired minute volume
	"http://loinc.org|76222-9":           {[]string{"mL"}, 150, 1000},          // tidal volume
	"http://loinc.org|19840-8":           {[]string{"/min", "{breaths}/min"}, 5, 45},
	"http://loinc.org|3150-0":            {[]string{"%", "1"}, 0.21, 1},        // FiO2 as a fraction
	"http://loinc.org|19996-8":           {[]string{"%", "1"}, 0.21, 1},        // FiO2 as a fraction
	"http://loinc.org|76248-4":           {[]string{"cm[H2O]"}, 0, 25},         // PEEP
	"http://loinc.org|76259-1":           {[]string{"cm[H2O]"}, 10, 40},        // plateau pressure
	"http://loinc.org|29463-7":           {[]string{"kg", "[lb_av]"}, 35, 250}, // body weight
	"http://loinc.org|8302-2":            {[]string{"cm", "[in_i]"}, 120, 220}, // body height
	"http://loinc.org|8310-5":            {[]string{"Cel", "[degF]"}, 30, 43},  // body temperature; cooling to 32-36 is TTM
	"http://loinc.org|60836-4":           {[]string{"Cel", "[degF]"}, 30, 43},  // oesophageal (core) temperature, MII-ICU profile
	"urn:iso:std:iso:11073:10101|151980": {[]string{"mL"}, 150, 1000},          // tidal volume delivered
	"urn:iso:std:iso:11073:10101|152004": {[]string{"L/min"}, 2, 30},           // inspired minute volume
	"urn:iso:std:iso:11073:10101|152490": {[]string{"/min", "{breaths}/min"}, 5, 45},
	"urn:iso:std:iso:11073:10101|151708": {[]string{"mm[Hg]", "kPa"}, 5, 90},
	"urn:iso:std:iso:11073:10101|151976": {[]string{"cm[H2O]"}, 0, 25},
	"urn:iso:std:iso:11073:10101|152424": {[]string{"cm[H2O]"}, 10, 40},
}

// canonical converts a value to its code's canonical unit. Factors: UCUM
// (reference/codes.md): 1 kPa = 7.500638 mm[Hg]; 1 [in_i] = 2.54 cm;
// 1 [lb_av] = 0.45359237 kg; [degF] = Cel x 9/5 + 32; % / 100 = 1.
func canonical(v value) float64 {
	switch v.unit {
	case "kPa":
		return v.num * 7.500638
	case "[in_i]":
		return v.num * 2.54
	case "[lb_av]":
		return v.num * 0.45359237
	case "[degF]":
		return (v.num - 32) * 5 / 9
	case "%":
		return v.num / 100
	}
	return v.num
}

func TestCodesUnitsAndPlausibleRanges(t *testing.T) {
	for _, o := range []Options{{Seed: 1}, {Seed: 2, Duration: 12 * time.Hour, VentEvery: 2 * time.Minute}} {
		_, p := generated(t, o)
		if len(p.values) == 0 {
			t.Fatal("no values")
		}
		for _, v := range p.values {
			if len(v.codes) == 0 {
				t.Fatalf("%s: no coding", v.id)
			}
			var spec struct {
				units  []string
				lo, hi float64
			}
			for i, c := range v.codes {
				k := *c.System + "|" + *c.Code
				s, ok := knownCodes[k]
				if !ok {
					t.Fatalf("%s: code %s is not in the shared code table", v.id, k)
				}
				if i == 0 {
					spec = s
				} else if !slices.Equal(s.units, spec.units) {
					t.Fatalf("%s: codings of different quantities", v.id)
				}
			}
			if spec.units == nil {
				if v.hasMember == 0 && v.unit != "" {
					t.Fatalf("%s: panel with a value", v.id)
				}
				continue
			}
			if !slices.Contains(spec.units, v.unit) {
				t.Fatalf("%s: unit %q, want one of %v", v.id, v.unit, spec.units)
			}
			if c := canonical(v); c < spec.lo || c > spec.hi || math.IsNaN(c) {
				t.Errorf("seed %d %s (%s): %g %s = %g canonical, outside [%g, %g]",
					o.Seed, v.id, *v.codes[0].Code, v.num, v.unit, c, spec.lo, spec.hi)
			}
		}
	}
}

// TestMalformedAreMalformed checks that each malformed message is broken in
// the intended way and nothing else is, without the service's decoder.
func TestMalformedAreMalformed(t *testing.T) {
	sc, _ := day(t, 1)
	got := map[string]int{}
	perPatient := map[string]int{}
	for _, m := range sc.Messages {
		if !m.Malformed {
			if !json.Valid(m.Payload) {
				t.Fatalf("well-formed message %s is not valid JSON", m.MsgID)
			}
			continue
		}
		got[m.DeadLetterReason]++
		perPatient[m.Patient]++
		var o struct {
			ResourceType  string          `json:"resourceType"`
			Subject       json.RawMessage `json:"subject"`
			ValueQuantity struct {
				Code string `json:"code"`
			} `json:"valueQuantity"`
		}
		err := json.Unmarshal(m.Payload, &o)
		switch m.DeadLetterReason {
		case DeadLetterInvalidJSON:
			if json.Valid(m.Payload) {
				t.Errorf("%s: valid JSON", m.DeadLetterReason)
			}
		case DeadLetterResourceType:
			if err != nil || o.ResourceType == "Observation" || o.ResourceType == "Bundle" || o.ResourceType == "Patient" {
				t.Errorf("%s: resourceType %q (%v)", m.DeadLetterReason, o.ResourceType, err)
			}
		case DeadLetterNoSubject:
			if err != nil || o.ResourceType != "Observation" || o.Subject != nil {
				t.Errorf("%s: %q with subject %s (%v)", m.DeadLetterReason, o.ResourceType, o.Subject, err)
			}
		case DeadLetterUnknownUnit:
			// Not among the UCUM units of reference/codes.md.
			if err != nil || slices.Contains([]string{"mm[Hg]", "kPa", "cm[Hg]"}, o.ValueQuantity.Code) {
				t.Errorf("%s: unit %q (%v)", m.DeadLetterReason, o.ValueQuantity.Code, err)
			}
		default:
			t.Errorf("unexpected dead-letter reason %q", m.DeadLetterReason)
		}
	}
	for _, r := range []string{DeadLetterInvalidJSON, DeadLetterResourceType, DeadLetterNoSubject, DeadLetterUnknownUnit} {
		if got[r] != 1 {
			t.Errorf("%d malformed messages for %s, want 1", got[r], r)
		}
	}
	for _, p := range sc.Patients {
		if perPatient[p.Ref] != p.Expect.DeadLetters {
			t.Errorf("%s: %d malformed messages, expectation says %d", p.Label, perPatient[p.Ref], p.Expect.DeadLetters)
		}
	}
}

const (
	sysLOINC = "http://loinc.org"
	sysMDC   = "urn:iso:std:iso:11073:10101"
)

// TestShapes checks that the feeds use every shape the task names.
func TestShapes(t *testing.T) {
	sc, p := day(t, 1)
	if p.bundles["transaction"] == 0 || p.bundles["message"] == 0 {
		t.Errorf("bundle types %v, want transaction and message", p.bundles)
	}
	var components, hasMemberInBundle, mdcOnly, mdcAndLOINC, kPaLab, kPaETCO2, fio2Pct, fio2Frac bool
	units := map[string]bool{}
	for _, v := range p.values {
		units[v.unit] = true
		components = components || (v.component && v.has(sysLOINC, "2019-8"))
		hasMemberInBundle = hasMemberInBundle || (v.hasMember > 0 && v.bundle != "" && v.has(sysLOINC, "24336-0"))
		var l, m bool
		for _, c := range v.codes {
			l = l || *c.System == sysLOINC
			m = m || *c.System == sysMDC
		}
		mdcOnly = mdcOnly || (m && !l)
		mdcAndLOINC = mdcAndLOINC || (m && l)
		kPaLab = kPaLab || (v.unit == "kPa" && v.has(sysLOINC, "2019-8"))
		kPaETCO2 = kPaETCO2 || (v.unit == "kPa" && (v.has(sysLOINC, "19891-1") || v.has(sysMDC, "151708")))
		fio2Pct = fio2Pct || (v.unit == "%" && (v.has(sysLOINC, "3150-0") || v.has(sysLOINC, "19996-8")))
		fio2Frac = fio2Frac || (v.unit == "1" && v.has(sysLOINC, "3150-0"))
	}
	for name, ok := range map[string]bool{
		"24336-0 panel with components": components, "hasMember panel inside a Bundle": hasMemberInBundle,
		"MDC-only codings": mdcOnly, "MDC and LOINC codings together": mdcAndLOINC,
		"PaCO2 in kPa": kPaLab, "end-tidal CO2 in kPa": kPaETCO2, "FiO2 in %": fio2Pct, "FiO2 as a fraction": fio2Frac,
		"height in [in_i]": units["[in_i]"], "weight in [lb_av]": units["[lb_av]"], "temperature in [degF]": units["[degF]"],
		"PaCO2 in mm[Hg]": units["mm[Hg]"],
	} {
		if !ok {
			t.Errorf("no %s", name)
		}
	}
	for _, pt := range sc.Patients {
		fp, ok := p.patients[pt.Ref]
		if !ok {
			t.Errorf("%s: no Patient resource", pt.Label)
			continue
		}
		if fp.Name != nil {
			t.Errorf("%s: Patient resource carries a name", pt.Label)
		}
		for _, c := range []string{"8302-2", "29463-7", "8310-5"} {
			if !slices.ContainsFunc(p.values, func(v value) bool { return v.patient == pt.Ref && v.has(sysLOINC, c) }) {
				t.Errorf("%s: no %s", pt.Label, c)
			}
		}
	}
}

func bedOf(t *testing.T, sc Scenario, bed int) Patient {
	t.Helper()
	for _, p := range sc.Patients {
		if p.Bed == bed {
			return p
		}
	}
	t.Fatalf("no bed %d", bed)
	return Patient{}
}

// TestStoryInputs checks that each story's intended inputs are present.
func TestStoryInputs(t *testing.T) {
	sc, p := day(t, 1)
	of := func(ref string, keep func(value) bool) []value {
		var out []value
		for _, v := range p.values {
			if v.patient == ref && keep(v) {
				out = append(out, v)
			}
		}
		return out
	}
	isPCO2 := func(v value) bool { return v.has(sysLOINC, "2019-8") || v.has(sysLOINC, "2021-4") }
	isVent := func(v value) bool { return v.has(sysLOINC, "76008-2") }

	if n := len(sc.Patients); n < 8 || n > 12 {
		t.Errorf("%d patients, want 8 to 12", n)
	}
	for _, pt := range sc.Patients {
		t.Run(strings.ReplaceAll(pt.Label, " ", "_"), func(t *testing.T) {
			ids := map[string]bool{}
			for _, v := range of(pt.Ref, isPCO2) {
				ids[v.id] = true
			}
			if len(ids) != pt.Expect.BloodGases {
				t.Errorf("%d blood-gas reports, expectation says %d", len(ids), pt.Expect.BloodGases)
			}
			vco2 := len(of(pt.Ref, func(v value) bool { return v.has(sysLOINC, "60825-7") }))
			if (vco2 > 0) != pt.VCO2Measured {
				t.Errorf("%d VCO2 values, VCO2Measured %v", vco2, pt.VCO2Measured)
			}
			if !strings.HasPrefix(pt.Ref, "Patient/lg-icu-") || pt.Story == "" {
				t.Errorf("ref %q story %q", pt.Ref, pt.Story)
			}
		})
	}

	t.Run("venous_bed_has_only_2021-4", func(t *testing.T) {
		pt := bedOf(t, sc, 7)
		if got := of(pt.Ref, func(v value) bool { return v.has(sysLOINC, "2019-8") || v.has(sysLOINC, "24336-0") }); len(got) != 0 {
			t.Errorf("venous bed has %d arterial values", len(got))
		}
		if len(of(pt.Ref, func(v value) bool { return v.has(sysLOINC, "2021-4") })) == 0 {
			t.Error("no 2021-4")
		}
		if !slices.Equal(pt.Expect.Refusals, []string{ReasonVenous}) || pt.Expect.MinDerived != 0 {
			t.Errorf("expectation %+v", pt.Expect)
		}
	})

	t.Run("feed_stops", func(t *testing.T) {
		pt := bedOf(t, sc, 8)
		vent := of(pt.Ref, isVent)
		last := vent[len(vent)-1].effective
		var paired, unpaired int
		for _, g := range of(pt.Ref, isPCO2) {
			if g.effective.After(last.Add(PairingBefore)) {
				unpaired++
			} else {
				paired++
			}
		}
		if paired == 0 || unpaired == 0 {
			t.Errorf("%d gases with ventilator data, %d without; want both", paired, unpaired)
		}
		if last.After(sc.Start.Add(sc.Duration * 3 / 4)) {
			t.Errorf("feed runs until %v", last)
		}
		if !slices.Contains(pt.Expect.Refusals, ReasonNoVentInWindow) || pt.Expect.MinDerived != paired {
			t.Errorf("expectation %+v, %d paired gases", pt.Expect, paired)
		}
	})

	t.Run("amended", func(t *testing.T) {
		pt := bedOf(t, sc, 9)
		var v1, v2 []value
		for _, v := range of(pt.Ref, func(v value) bool { return v.has(sysLOINC, "2019-8") }) {
			switch {
			case v.status == "amended" && v.version == "2":
				v2 = append(v2, v)
			case v.status == "final" && v.version == "1":
				v1 = append(v1, v)
			}
		}
		if len(v2) != 1 || pt.Expect.Amended != 1 {
			t.Fatalf("%d amended versions, expectation %d", len(v2), pt.Expect.Amended)
		}
		i := slices.IndexFunc(v1, func(v value) bool { return v.id == v2[0].id })
		if i < 0 || !v2[0].at.After(v1[i].at) || v1[i].num-v2[0].num < 10 {
			t.Errorf("amendment does not follow and correct the first version: %+v", v2[0])
		}
	})

	t.Run("entered_in_error", func(t *testing.T) {
		pt := bedOf(t, sc, 10)
		eie := of(pt.Ref, func(v value) bool { return v.status == "entered-in-error" })
		if len(eie) == 0 || pt.Expect.Retracted != 1 {
			t.Fatalf("%d entered-in-error values, expectation %d", len(eie), pt.Expect.Retracted)
		}
		for _, v := range eie {
			if v.version != "2" {
				t.Errorf("%s: entered-in-error as version %q", v.id, v.version)
			}
		}
	})

	t.Run("late_ventilator_reading", func(t *testing.T) {
		pt := bedOf(t, sc, 1)
		gases := of(pt.Ref, func(v value) bool { return v.has(sysLOINC, "2019-8") })
		late := 0
		for _, v := range of(pt.Ref, isVent) {
			for _, g := range gases {
				inWindow := !v.effective.Before(g.effective.Add(-PairingBefore)) && !v.effective.After(g.effective)
				if inWindow && v.at.After(g.at) {
					late++
				}
			}
		}
		if late != 1 {
			t.Errorf("%d ventilator readings of a blood gas's window arrive after it, want 1", late)
		}
	})
}
