package fhirmap

import (
	"os"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/physio"
)

// firstListed returns whichever of a and b appears first in the refusal
// list of the kind (following "as <kind>" references), or "" when the list
// names neither.
func firstListed(t *testing.T, kind, a, b string) string {
	t.Helper()
	k, ok := LookupKind(kind)
	if !ok {
		t.Fatalf("unknown kind %s", kind)
	}
	list := k.Refused
	if ref, ok := strings.CutPrefix(list, "as "); ok {
		return firstListed(t, ref, a, b)
	}
	ia, ib := strings.Index(list, a), strings.Index(list, b)
	switch {
	case ia < 0 && ib < 0:
		return ""
	case ib < 0 || ia >= 0 && ia < ib:
		return a
	}
	return b
}

// TestRefusalOrderSexHeight is a regression test: with neither sex nor
// height, every kind that needs predicted body weight must refuse with the
// reason its catalogue entry lists first ("in the order checked", as the
// CodeSystem property says). The order itself is the service's contract
// [common practice: a documented order must match the code].
func TestRefusalOrderSexHeight(t *testing.T) {
	site := DefaultSite()
	site.TargetPaCO2mmHg = 40
	site.ApparatusDeadSpaceML, site.ApparatusDeadSpaceConfigured = 50, true
	_, rs := DeriveAll(without(vectorFacts(), "sex", "height"), site)
	_, rm := byKind(nil, rs)
	checked := 0
	for _, k := range Catalogue {
		want := firstListed(t, k.Code, ReasonNoSex, ReasonNoHeight)
		if want == "" {
			continue
		}
		checked++
		t.Run(k.Code, func(t *testing.T) {
			r, ok := rm[k.Code]
			if !ok {
				t.Fatalf("%s derived without sex and height", k.Code)
			}
			if r.Reason != want {
				t.Errorf("%s refused %q, the catalogue lists %q first (%s)", k.Code, r.Reason, want, k.Refused)
			}
		})
	}
	if checked < 5 {
		t.Errorf("only %d kinds list no-sex or no-height; the catalogue lost them", checked)
	}
}

// versionedObs is a PaCO2 Observation (invented patient) with a
// meta.versionId and a value, for Bundle tests.
func versionedObs(fullURL, id, version string, paco2 float64) string {
	idField := ""
	if id != "" {
		idField = `"id":"` + id + `",`
	}
	meta := ""
	if version != "" {
		meta = `"meta":{"versionId":"` + version + `"},`
	}
	return `{"fullUrl":"` + fullURL + `","resource":{"resourceType":"Observation",` + idField + meta +
		`"status":"final","code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},` +
		`"subject":{"reference":"Patient/lg-0009"},"effectiveDateTime":"2026-11-20T08:15:00+01:00",` +
		`"valueQuantity":{"value":` + strconv.FormatFloat(paco2, 'f', -1, 64) + `,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}}`
}

func collection(entries ...string) []byte {
	return []byte(`{"resourceType":"Bundle","type":"collection","entry":[` + strings.Join(entries, ",") + `]}`)
}

// TestBundleVersionsUnderOneFullURL is a regression test: FHIR R4 invariant
// bdl-7 ("FullUrl must be unique in a bundle, or else entries with the same
// fullUrl must have different meta.versionId", expression
// entry.where(fullUrl).select(fullUrl&resource.meta.versionId).isDistinct(),
// as the R4 Bundle invariants are listed in published R4 implementation
// guides' Bundle profiles [published]) allows
// two versions of one resource under one fullUrl. They are decoded as two
// versions and Current keeps the higher versionId.
func TestBundleVersionsUnderOneFullURL(t *testing.T) {
	const u = "http://example.org/fhir/Observation/lg-abg-0201"
	t.Run("different_versionId_accepted_as_two_versions", func(t *testing.T) {
		for _, order := range [][2]string{{"1", "2"}, {"2", "1"}} {
			vals := map[string]float64{"1": 44, "2": 47}
			d := mustDecode(t, collection(versionedObs(u, "lg-abg-0201", order[0], vals[order[0]]), versionedObs(u, "lg-abg-0201", order[1], vals[order[1]])))
			if len(d.Facts) != 2 {
				t.Fatalf("order %v: %d facts, want 2 versions", order, len(d.Facts))
			}
			cur := Current(d.Facts)
			if len(cur) != 1 || cur[0].VersionID != "2" || cur[0].Value != 47 {
				t.Fatalf("order %v: current %+v, want version 2 (47 mmHg)", order, cur)
			}
		}
	})
	t.Run("same_versionId_refused", func(t *testing.T) {
		wantRefusal(t, collection(versionedObs(u, "lg-abg-0201", "1", 44), versionedObs(u, "lg-abg-0201", "1", 47)),
			"bad-reference", "Bundle.entry[1].fullUrl", 1)
	})
	t.Run("no_versionId_refused", func(t *testing.T) {
		wantRefusal(t, collection(versionedObs(u, "lg-abg-0201", "", 44), versionedObs(u, "lg-abg-0201", "", 47)),
			"bad-reference", "Bundle.entry[1].fullUrl", 1)
	})
	t.Run("different_resources_refused", func(t *testing.T) {
		wantRefusal(t, collection(versionedObs(u, "lg-abg-0201", "1", 44), versionedObs(u, "lg-abg-0202", "2", 47)),
			"bad-reference", "Bundle.entry[1].fullUrl", 1)
	})
}

// at sets a fact's time and patient to those of the hasMember test Bundle.
func at(eff time.Time, p string) factOpt {
	return func(f *Fact) { f.Effective, f.Patient = eff, p }
}

// TestPanelMemberWithoutID is a regression test: a hasMember panel whose
// PaCO2 member has no id, only a urn:uuid fullUrl (allowed by the input
// contract). Its identity becomes Observation/<uuid>, which the stored
// Resources hold, every derivedFrom names and every Provenance entity
// names: nothing points at a urn:uuid that resolves only inside the
// incoming Bundle (a urn:uuid names a resource only within its Bundle, as
// FHIR's rules for resolving references in Bundles say [common practice;
// not re-read for this test]).
func TestPanelMemberWithoutID(t *testing.T) {
	raw, err := os.ReadFile("testdata/decode/bundle-transaction-hasmember.json")
	if err != nil {
		t.Fatal(err)
	}
	dec := mustDecode(t, raw)
	const want = "Observation/5a0c7c1e-2b0b-4c55-9d1e-000000000011"
	held := false
	for _, r := range dec.Resources {
		held = held || r.Reference == want
		if strings.HasPrefix(r.Reference, "urn:") {
			t.Errorf("resource stored under %q, which resolves only inside its Bundle", r.Reference)
		}
	}
	if !held {
		t.Fatalf("no resource stored as %s: %+v", want, dec.Resources)
	}
	var bg Fact
	for _, f := range dec.Facts {
		if f.Quantity == QPCO2 {
			bg = f
		}
	}
	if bg.Resource != want {
		t.Fatalf("PaCO2 fact resource %q, want %q", bg.Resource, want)
	}
	p, eff := bg.Patient, bg.Effective
	facts := append(dec.Facts,
		newFact("ve-m", QMinuteVol, 10, 0, detail("expired"), at(eff.Add(-5*time.Minute), p)),
		newFact("pe-m", QPECO2, 20, 0, at(eff.Add(-5*time.Minute), p)),
		newFact("vt-m", QTidalVol, 500, 0, detail("expired"), at(eff.Add(-5*time.Minute), p)),
		newFact("rr-m", QRespRate, 20, 0, detail("total"), at(eff.Add(-5*time.Minute), p)),
	)
	site := DefaultSite()
	ds, _ := DeriveAll(facts, site)
	if len(ds) == 0 {
		t.Fatal("nothing derived")
	}
	for _, d := range ds {
		obs, err := EncodeObservation(d, 1, site)
		if err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(string(obs), `"derivedFrom":[{"reference":"`+want+`"`) {
			t.Errorf("%s: derivedFrom leaves out the blood gas %s", d.Kind, want)
		}
		prov, err := EncodeProvenance(d, 1, eff, site)
		if err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(string(prov), `"reference":"`+want+`"`) || strings.Contains(string(prov), "urn:uuid") {
			t.Errorf("%s: Provenance does not name %s, or names a urn:uuid: %s", d.Kind, want, prov)
		}
	}
}

// TestDiscrepancyFrame checks, through DeriveAll, that the measured minus
// predicted PaCO2 is framed by what the prediction assumed: VCO2 was
// measured, so CO2 production is never named as a cause, and a measured
// PaCO2 materially below predicted is called physiologically implausible
// and flagged, since physiologic dead space (anatomic plus alveolar,
// Bohr-Enghoff, physiology.md s2 [published]) cannot be smaller than the
// anatomic (Radford 1955, physiology.md s7 [published]) plus apparatus dead
// space the prediction counts [derived].
func TestDiscrepancyFrame(t *testing.T) {
	site := DefaultSite()
	site.ApparatusDeadSpaceML, site.ApparatusDeadSpaceConfigured = 50, true
	site.AnatomicDeadSpace = physio.AnatomicWholeAirway // Radford 2.2 mL/kg, as the vector below
	// Vector of physiology.md s11 with VT 500 mL, RR 20 /min, PBW 70.566 kg:
	// VA = (500 - 155.2 - 50) x 20 / 1000 = 5.896 L/min, predicted PaCO2 =
	// 0.863 x 200 / 5.896 = 29.27 mm[Hg] [derived].
	for _, c := range []struct {
		name    string
		paco2   float64
		want    float64
		flagged bool
		text    string
	}{
		{"PaCO2_45_mmHg_15.7_above", 45, 45 - 29.274, false, "more dead space than assumed"},
		{"PaCO2_20_mmHg_9.3_below_implausible", 20, 20 - 29.274, true, "physiologically implausible"},
	} {
		t.Run(c.name, func(t *testing.T) {
			facts := append(without(vectorFacts(), "abg-1"), arterial("abg-1", c.paco2))
			ds, rs := DeriveAll(facts, site)
			dm, rm := byKind(ds, rs)
			d, ok := dm[KindPaCO2Discrepancy]
			if !ok {
				t.Fatalf("refused: %+v", rm[KindPaCO2Discrepancy])
			}
			if diff := d.Result.Value - c.want; diff > 0.01 || diff < -0.01 {
				t.Errorf("value %.3f, want %.3f [derived]", d.Result.Value, c.want)
			}
			txt := d.Result.Interpretation.Text
			if !strings.Contains(txt, c.text) || strings.Contains(txt, "higher CO2 production") || strings.Contains(txt, "lower CO2 production") {
				t.Errorf("text %q: want %q and no CO2-production cause (VCO2 measured)", txt, c.text)
			}
			if got := slices.Contains(d.Result.Flags(), physio.FlagPaCO2BelowPredicted); got != c.flagged {
				t.Errorf("flagged %v, want %v", got, c.flagged)
			}
		})
	}
}

// TestEstimatedDeadSpaceBesideMeasured checks the decision for an estimated
// dead-space fraction of a blood gas that also has a measured one: it is
// published (its trend does not break when measurement starts or stops)
// but flagged, and its reading sends the reader to the measured value. It
// never carries a threshold of measured dead space (Siddiki et al., Crit
// Care 2010, doi 10.1186/cc9206 [published]: no threshold given).
func TestEstimatedDeadSpaceBesideMeasured(t *testing.T) {
	for _, c := range []struct {
		name     string
		facts    []Fact
		measured bool
	}{
		{"measured_VCO2_in_window", vectorFacts(), true},
		{"no_VCO2_no_PECO2", without(vectorFacts(), "vco2-1"), false},
	} {
		t.Run(c.name, func(t *testing.T) {
			ds, rs := DeriveAll(c.facts, DefaultSite())
			dm, rm := byKind(ds, rs)
			d, ok := dm[KindDeadSpaceEstimated]
			if !ok {
				t.Fatalf("estimate refused: %+v", rm[KindDeadSpaceEstimated])
			}
			_, hasMeasured := dm[KindDeadSpaceVCO2]
			if hasMeasured != c.measured {
				t.Fatalf("measured fraction derived %v, want %v", hasMeasured, c.measured)
			}
			flagged := slices.Contains(d.Result.Flags(), physio.FlagMeasuredFractionExists)
			if flagged != c.measured {
				t.Errorf("flagged %v, want %v", flagged, c.measured)
			}
			in := d.Result.Interpretation
			if in.Code != "" || strings.Contains(in.Text+in.Source, "Nuckton") {
				t.Errorf("estimate read against measured-dead-space thresholds: %+v", in)
			}
			if c.measured != strings.Contains(in.Text, "read the measured value") {
				t.Errorf("text %q: mention of the measured value should be %v", in.Text, c.measured)
			}
		})
	}
}

// TestNoConfigurationPromised: the catalogue (published in the CodeSystem
// and every note's formula) must not promise a setting that no command
// offers; the energy equation is not a command setting, so its text names
// Harris-Benedict 1919 and points to the basis for the equation used
// [common practice: documentation describes what exists].
func TestNoConfigurationPromised(t *testing.T) {
	for _, k := range Catalogue {
		for _, txt := range []string{k.Display, k.Definition, k.Formula, k.Source} {
			if strings.Contains(txt, "when configured") || strings.Contains(txt, "unless configured") {
				t.Errorf("%s promises a configuration: %q", k.Code, txt)
			}
		}
	}
	ds, _ := DeriveAll(vectorFacts(), DefaultSite())
	dm, _ := byKind(ds, nil)
	if b := dm[KindDeadSpaceEstimated].Result.Basis(); !strings.Contains(b, "Harris-Benedict 1919") {
		t.Errorf("the basis does not name the energy equation used: %q", b)
	}
}

// TestForTargetBeyondModelRefused: through DeriveAll, a breath rate for the
// target above 80 /min (RespRateRange: high-frequency ventilation, outside
// the alveolar ventilation equation [common practice]) is a refusal with
// its own reason, not a flagged value. RR 35, PaCO2 100, target 40 -> 87.5
// /min (physiology.md s9 [derived]).
func TestForTargetBeyondModelRefused(t *testing.T) {
	site := DefaultSite()
	site.TargetPaCO2mmHg = 40
	facts := append(without(vectorFacts(), "abg-1", "rr-1"), arterial("abg-1", 100),
		newFact("rr-1", QRespRate, 35, -5*time.Minute, detail("total")))
	_, rs := DeriveAll(facts, site)
	_, rm := byKind(nil, rs)
	r, ok := rm[KindRateForTarget]
	if !ok || r.Reason != ReasonBeyondModel {
		t.Fatalf("rate for target: %+v, want refusal %s", r, ReasonBeyondModel)
	}
	if !strings.Contains(r.Detail, "87.5") || ReasonMeaning(r.Reason) == "" {
		t.Errorf("detail %q should name the answer; meaning %q", r.Detail, ReasonMeaning(r.Reason))
	}
}

// TestChronicHypercapniaCaution: bicarbonate and base excess are read from
// the blood gas's own sample; when they show metabolic compensation of a
// raised PaCO2 (bicarbonate above 30 mmol/L with PaCO2 above 45 mmHg:
// acute buffering adds about 1 mmol/L per 10 mmHg, Brandis, Acid-Base
// Physiology 4.5 [published]; base excess above +2 mmol/L without
// bicarbonate [common practice]) both values for a target are cautioned
// and the values read are their inputs. A venous bicarbonate, or one of
// another time, is not of the sample.
func TestChronicHypercapniaCaution(t *testing.T) {
	site := DefaultSite()
	site.TargetPaCO2mmHg = 40
	base := append(without(vectorFacts(), "abg-1"), arterial("abg-1", 60))
	hco3 := func(v float64, opts ...factOpt) Fact {
		return newFact("abg-1-hco3", QBicarbonate, v, 0, append([]factOpt{specimen(SpecimenArterial)}, opts...)...)
	}
	for _, c := range []struct {
		name     string
		extra    []Fact
		caution  bool
		inputHas Role
	}{
		{"HCO3_34_same_time_cautioned", []Fact{hco3(34)}, true, RoleBicarbonate},
		{"HCO3_26_acute_not_cautioned", []Fact{hco3(26)}, false, RoleBicarbonate},
		{"HCO3_34_venous_not_of_the_sample", []Fact{hco3(34, specimen(SpecimenVenous))}, false, ""},
		{"HCO3_34_ten_minutes_later_not_of_the_sample", []Fact{hco3(34, func(f *Fact) { f.Effective = f.Effective.Add(10 * time.Minute) })}, false, ""},
		{"BE_6_without_HCO3_cautioned", []Fact{newFact("abg-1-be", QBaseExcess, 6, 0, specimen(SpecimenArterial))}, true, RoleBaseExcess},
		{"nothing_sent_not_cautioned", nil, false, ""},
	} {
		t.Run(c.name, func(t *testing.T) {
			ds, rs := DeriveAll(append(slices.Clone(base), c.extra...), site)
			dm, rm := byKind(ds, rs)
			for _, k := range []string{KindRateForTarget, KindTidalVolumeForTarget} {
				d, ok := dm[k]
				if !ok {
					t.Fatalf("%s refused: %+v", k, rm[k])
				}
				if got := slices.Contains(d.Result.Flags(), physio.FlagChronicHypercapnia); got != c.caution {
					t.Errorf("%s cautioned %v, want %v", k, got, c.caution)
				}
				used := false
				for _, in := range d.Inputs {
					used = used || in.Role == c.inputHas
				}
				if c.inputHas != "" && !used {
					t.Errorf("%s: %s read but not recorded as an input", k, c.inputHas)
				}
			}
			if d := dm[KindDeadSpaceVCO2]; slices.Contains(d.Result.Flags(), physio.FlagChronicHypercapnia) {
				t.Errorf("a value not for a target was cautioned")
			}
		})
	}
}

// TestInputsFarApartFlagged: a value whose inputs were taken far apart (VE
// 29 min before the blood gas, VCO2 9 min after: 38 min, inside the default
// window) is flagged, since readings more than MaxInputSpan apart may
// straddle a ventilator change (PaO2 settles in about 10 min, Cakar et al.,
// Intensive Care Med 2001;27:655-9 [published]; PaCO2 more slowly [common
// practice]). Inputs 5 min before the gas are not flagged; patient-level
// inputs (height, days before) never count.
func TestInputsFarApartFlagged(t *testing.T) {
	if want := strconv.Itoa(int(MaxInputSpan.Minutes())) + " min"; !strings.Contains(physio.FlagInputsApart, want) {
		t.Fatalf("flag text %q does not state the limit %s", physio.FlagInputsApart, want)
	}
	apart := append(without(vectorFacts(), "ve-1", "vco2-1"),
		newFact("ve-1", QMinuteVol, 10, -29*time.Minute, detail("expired")),
		newFact("vco2-1", QVCO2, 200, 9*time.Minute))
	for _, c := range []struct {
		name  string
		facts []Fact
		kind  string
		want  bool
	}{
		{"VE_minus_29_VCO2_plus_9_min_flagged", apart, KindDeadSpaceVCO2, true},
		{"vector_all_minus_5_min_not_flagged", vectorFacts(), KindDeadSpaceVCO2, false},
		// The gradient uses only the blood gas and PETCO2 (5 min before).
		{"gradient_of_the_apart_set_not_flagged", apart, KindPaCO2PETCO2Gradient, false},
		// The ventilatory ratio uses VE (29 min before) and height (days before): 29 min.
		{"VR_VE_minus_29_min_flagged", apart, KindVentilatoryRatio, true},
	} {
		t.Run(c.name, func(t *testing.T) {
			ds, rs := DeriveAll(c.facts, DefaultSite())
			dm, rm := byKind(ds, rs)
			d, ok := dm[c.kind]
			if !ok {
				t.Fatalf("refused: %+v", rm[c.kind])
			}
			if got := slices.Contains(d.Result.Flags(), physio.FlagInputsApart); got != c.want {
				t.Errorf("flagged %v, want %v (span %s)", got, c.want, inputSpan(d.Inputs))
			}
		})
	}
}

// TestFullURLIdentity checks the identity of a Bundle Observation without
// id (FHIR R4 Bundle.entry.fullUrl: an absolute URL, or urn:uuid / urn:oid
// [published]); ventderive keeps urn forms and Observation/<id> and refuses
// an http(s) URL, which its store cannot key.
func TestFullURLIdentity(t *testing.T) {
	for _, c := range []struct{ in, want string }{
		{"urn:uuid:5A0C7C1E-2B0B-4C55-9D1E-000000000011", "Observation/5a0c7c1e-2b0b-4c55-9d1e-000000000011"},
		{"urn:oid:1.2.3.4", "Observation/1.2.3.4"},
		{"https://lab.example.org/fhir/Observation/abg-1", ""}, // valid FHIR, but not storable as an identity: refused
		{"Observation/abg-1", "Observation/abg-1"},
		{"urn:uuid:not a uuid", ""},
		{"ftp://x/y", ""},
	} {
		got, why := fullURLIdentity(c.in)
		if got != c.want || (c.want == "") != (why != "") {
			t.Errorf("fullURLIdentity(%q) = %q, %q; want %q", c.in, got, why, c.want)
		}
	}
}
