package fhirmap

import (
	"encoding/json"
	"strings"
	"testing"
	"time"
)

// endTidalFacts is a blood gas with one end-tidal reading, enough for the
// gradient and the alveolar dead-space fraction.
func endTidalFacts(paco2, petco2 float64) []Fact {
	return []Fact{arterial("abg-1", paco2), newFact("etco2-1", QPETCO2, petco2, -2*time.Minute)}
}

// enghoffFacts is a blood gas with a measured mixed-expired PCO2 giving the
// dead-space fraction vdvt: PECO2 = PaCO2 x (1 - VD/VT) (Enghoff
// [published]).
func enghoffFacts(paco2, vdvt float64) []Fact {
	return []Fact{arterial("abg-1", paco2), newFact("pe-1", QPECO2, paco2*(1-vdvt), -2*time.Minute)}
}

// vrFacts is a man of 175 cm (PBW 70.566 kg, ARDS Network [published]) with
// the minute volume that gives the ventilatory ratio vr at PaCO2 45:
// VE = VR x PBW x 100 mL/kg/min x 37.5 mm[Hg] / PaCO2 (Sinha 2009
// [published]).
func vrFacts(vr float64) []Fact {
	ve := vr * 70.566 * 100 * 37.5 / 45 / 1000
	return []Fact{arterial("abg-1", 45), newFact("ve-1", QMinuteVol, ve, -2*time.Minute, detail("expired")),
		newFact("sex", QSex, 0, -time.Hour, fromPatient("sex"), text("male")), newFact("h", QHeight, 175, -time.Hour)}
}

// TestInterpretationOfPublishedValue checks that the interpretation is read
// on the value as published (rounded to the kind's Decimals), at and beside
// every threshold, so that the number and its reading never disagree.
func TestInterpretationOfPublishedValue(t *testing.T) {
	tests := []struct {
		name      string
		facts     []Fact
		kind      string
		published string
		code      string
		text      string // substring of the interpretation text
		source    string
	}{
		{"gradient_9.04_published_9.0_is_N", endTidalFacts(45, 35.96), KindPaCO2PETCO2Gradient, "9.0", "N", "at or below 9", "Tyburski 2002 [published]: <= 9 mmHg"},
		{"gradient_9.06_published_9.1_is_H", endTidalFacts(45, 35.94), KindPaCO2PETCO2Gradient, "9.1", "H", "above 9", "Tyburski 2002 [published]"},
		{"gradient_minus_0.04_published_0.0_is_N", endTidalFacts(45, 45.04), KindPaCO2PETCO2Gradient, "0.0", "N", "at or below 9", "Tyburski 2002 [published]"},
		{"AVDSF_0.2004_published_0.200_is_N", endTidalFacts(50, 50*(1-0.2004)), KindAlveolarDeadSpace, "0.200", "N", "at or below 0.20", "Tyburski 2002 [published]: <= 0.20"},
		{"AVDSF_0.2006_published_0.201_is_H", endTidalFacts(50, 50*(1-0.2006)), KindAlveolarDeadSpace, "0.201", "H", "above 0.20", "Tyburski 2002 [published]"},
		{"VDVT_0.3004_published_0.300_is_N", enghoffFacts(50, 0.3004), KindDeadSpaceEnghoff, "0.300", "N", "at or below about 0.3", "Nunn & Hill 1960 [published]"},
		{"VDVT_0.3006_published_0.301_is_H", enghoffFacts(50, 0.3006), KindDeadSpaceEnghoff, "0.301", "H", "above about 0.3", "Nunn & Hill 1960 [published]"},
		{"VDVT_0.5796_published_0.580_is_ARDS_mean", enghoffFacts(50, 0.5796), KindDeadSpaceEnghoff, "0.580", "H", "0.58, the mean at ARDS onset", "Nuckton 2002 [published]"},
		{"VDVT_0.5794_published_0.579_is_not_ARDS_mean", enghoffFacts(50, 0.5794), KindDeadSpaceEnghoff, "0.579", "H", "above about 0.3, the value", "Nuckton 2002 [published]"},
		{"VDVT_0.1496_published_0.150_not_below_floor", enghoffFacts(50, 0.1496), KindDeadSpaceEnghoff, "0.150", "N", "at or below about 0.3", "floor 0.15 [derived from Radford 1955]"},
		{"VDVT_0.1494_published_0.149_below_floor", enghoffFacts(50, 0.1494), KindDeadSpaceEnghoff, "0.149", "", "below 0.15", "floor 0.15 [derived from Radford 1955]"},
		{"VR_1.5496_published_1.55_at_group_mean", vrFacts(1.5496), KindVentilatoryRatio, "1.55", "", "at or above 1.55", "Sinha 2009 [published group mean]"},
		{"VR_1.9996_published_2.00_at_group_median", vrFacts(1.9996), KindVentilatoryRatio, "2.00", "", "at or above 2", "PETAL-ROSE 2022 [published group median]"},
	}
	site := DefaultSite()
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			ds, rs := DeriveAll(tc.facts, site)
			dm, rm := byKind(ds, rs)
			d, ok := dm[tc.kind]
			if !ok {
				t.Fatalf("%s refused: %+v", tc.kind, rm[tc.kind])
			}
			if got := FormatValue(tc.kind, d.Result.Value); got != tc.published {
				t.Fatalf("published %s, want %s (test set-up)", got, tc.published)
			}
			in := d.Result.Interpretation
			if in.Code != tc.code || !strings.Contains(in.Text, tc.text) {
				t.Errorf("%s: interpretation [%s] %q, want [%s] with %q", tc.source, in.Code, in.Text, tc.code, tc.text)
			}
			// What a reader of the Observation sees.
			b, err := EncodeObservation(d, 1, site)
			if err != nil {
				t.Fatal(err)
			}
			var obs struct {
				ValueQuantity  struct{ Value json.Number }
				Interpretation []struct {
					Coding []struct{ Code string }
					Text   string
				}
			}
			if err := json.Unmarshal(b, &obs); err != nil {
				t.Fatal(err)
			}
			if obs.ValueQuantity.Value.String() != tc.published {
				t.Errorf("valueQuantity %s, want %s", obs.ValueQuantity.Value, tc.published)
			}
			if len(obs.Interpretation) != 1 || !strings.Contains(obs.Interpretation[0].Text, tc.text) {
				t.Fatalf("interpretation %+v, want text with %q", obs.Interpretation, tc.text)
			}
			var codes []string
			for _, c := range obs.Interpretation[0].Coding {
				codes = append(codes, c.Code)
			}
			if got := strings.Join(codes, ","); got != tc.code {
				t.Errorf("interpretation codes %q, want %q", got, tc.code)
			}
		})
	}
}

// TestNegativeEndTidalGradient: end-tidal above arterial PCO2 has no
// published reading: the gradient is published without interpretation code
// and with its flag down to -5 mm[Hg]; beyond that (about 4 SD below the
// normal 4.6 +/- 2.5 mm[Hg], Nunn & Hill 1960 [published; derived]) the pair
// is refused as inconsistent. AVDSF, a fraction, is refused for any
// negative gradient.
func TestNegativeEndTidalGradient(t *testing.T) {
	site := DefaultSite()
	t.Run("minus_3_mmHg_published_without_code", func(t *testing.T) {
		ds, rs := DeriveAll(endTidalFacts(35, 38), site)
		dm, rm := byKind(ds, rs)
		d, ok := dm[KindPaCO2PETCO2Gradient]
		if !ok {
			t.Fatalf("refused: %+v", rm[KindPaCO2PETCO2Gradient])
		}
		if in := d.Result.Interpretation; in.Code != "" || !strings.Contains(in.Text, "check sampling") {
			t.Errorf("interpretation %+v, want no code and a sampling check", in)
		}
		if !strings.Contains(strings.Join(d.Result.Flags(), ";"), "end-tidal PCO2 above arterial") {
			t.Errorf("flags %q", d.Result.Flags())
		}
		b, err := EncodeObservation(d, 1, site)
		if err != nil {
			t.Fatal(err)
		}
		if strings.Contains(string(b), "v3-ObservationInterpretation") || !strings.Contains(string(b), `"interpretation":[{"text":"negative: end-tidal PCO2 above arterial PCO2`) {
			t.Errorf("observation interpretation not text-only: %s", b)
		}
		if r := rm[KindAlveolarDeadSpace]; r.Reason != ReasonInconsistent {
			t.Errorf("AVDSF: %+v, want %s", r, ReasonInconsistent)
		}
	})
	t.Run("minus_6_mmHg_refused_inconsistent", func(t *testing.T) {
		ds, rs := DeriveAll(endTidalFacts(35, 41), site)
		dm, rm := byKind(ds, rs)
		if _, ok := dm[KindPaCO2PETCO2Gradient]; ok {
			t.Fatalf("derived, want refused")
		}
		if r := rm[KindPaCO2PETCO2Gradient]; r.Reason != ReasonInconsistent || !strings.Contains(r.Detail, "more than 5 mmHg above PaCO2") {
			t.Errorf("refusal %+v", r)
		}
	})
}

// TestEndTidalKPaAsMmHgRefused: 5.3 kPa (39.8 mm[Hg]) sent as "5.3 mm[Hg]"
// would give a gradient of about 40 mm[Hg]; PETCO2Range starts at 10 mm[Hg]
// [common practice], so it is refused as implausible.
func TestEndTidalKPaAsMmHgRefused(t *testing.T) {
	_, rs := DeriveAll(endTidalFacts(45, 5.3), DefaultSite())
	_, rm := byKind(nil, rs)
	for _, k := range []string{KindPaCO2PETCO2Gradient, KindAlveolarDeadSpace} {
		if r := rm[k]; r.Reason != ReasonImplausible || !strings.Contains(r.Detail, "PETCO2") {
			t.Errorf("%s: %+v, want %s naming PETCO2", k, r, ReasonImplausible)
		}
	}
}
