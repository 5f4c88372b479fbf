package fhirmap

import (
	"math"
	"strings"
	"testing"
	"time"

	"github.com/google/uuid"
	"github.com/ventderive/ventderive/physio"
)

// byKind indexes derivations and refusals by kind.
func byKind(ds []Derivation, rs []Refusal) (map[string]Derivation, map[string]Refusal) {
	dm := map[string]Derivation{}
	for _, d := range ds {
		dm[d.Kind] = d
	}
	rm := map[string]Refusal{}
	for _, r := range rs {
		rm[r.Kind] = r
	}
	return dm, rm
}

// TestDeriveReferenceVector checks every kind against the end-to-end vector
// of the physiology reference (shared/reference/physiology.md section 11,
// [derived] from the published formulas) and the section checks it builds on.
func TestDeriveReferenceVector(t *testing.T) {
	site := DefaultSite()
	site.TargetPaCO2mmHg = 40
	ds, rs := DeriveAll(vectorFacts(), site)
	dm, rm := byKind(ds, rs)
	tests := []struct {
		name   string
		kind   string
		want   float64
		tol    float64
		source string
	}{
		{"vdvt_vco2_K0.863_is_0.61644", KindDeadSpaceVCO2, 0.61644, 0.00005, "physiology.md s11: VD/VT (K 0.863) 0.61644 [derived]"},
		{"vdvt_estimated_HB1919_K0.86_is_0.64040", KindDeadSpaceEstimated, 0.64040, 0.00005, "physiology.md s3/s11: Harris-Benedict VCO2 188.16 mL/min -> 0.64040 [derived]; Siddiki 2010 [published]"},
		{"ventilatory_ratio_is_1.7005", KindVentilatoryRatio, 1.7005, 0.00005, "physiology.md s6/s11: PBW 70.566 kg, VE 10 L/min, PaCO2 45 -> VR 1.7005 [derived]; Sinha 2009 [published]"},
		{"avdsf_is_0.2222", KindAlveolarDeadSpace, 0.2222, 0.00005, "physiology.md s8/s11: PaCO2 45, PETCO2 35 -> 0.222 [derived]"},
		{"gradient_is_10_mmHg", KindPaCO2PETCO2Gradient, 10, 1e-9, "physiology.md s8: PaCO2 45, PETCO2 35 -> 10 mmHg [derived]"},
		{"alveolar_ventilation_is_3.836_L_per_min", KindAlveolarVentilation, 3.836, 0.0005, "physiology.md s11: VA = 10 x (1 - 0.61644) = 3.836 L/min [derived]"},
		{"deadspace_volume_is_308.2_mL", KindDeadSpaceVolume, 0.61644 * 500, 0.03, "physiology.md s11 VD/VT 0.61644 x VT 500 mL [derived]"},
		{"rate_for_target_40_is_22.5_per_min", KindRateForTarget, 22.5, 1e-9, "physiology.md s9: RR_new = RR x PaCO2 / target = 20 x 45/40 [derived]"},
		{"vt_for_target_40_is_524.0_mL", KindTidalVolumeForTarget, 308.222 + (500-308.222)*45/40, 0.05, "physiology.md s9: VT_new = VD + (VT - VD) x PaCO2/target, VD = 0.61644 x 500 [derived]"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			d, ok := dm[tc.kind]
			if !ok {
				t.Fatalf("%s not derived: refused %+v", tc.kind, rm[tc.kind])
			}
			if math.Abs(d.Result.Value-tc.want) > tc.tol {
				t.Errorf("%s = %.6f, want %.6f +/- %g (%s)", tc.kind, d.Result.Value, tc.want, tc.tol, tc.source)
			}
			if d.Result.Unit != KindUnit(tc.kind) {
				t.Errorf("unit %q, want %q", d.Result.Unit, KindUnit(tc.kind))
			}
			if d.Status != StatusFinal {
				t.Errorf("status %q, want final", d.Status)
			}
		})
	}
	// The default site has no apparatus dead space: predicted PaCO2 and the
	// discrepancy must be refused, never computed with a silent zero.
	for _, k := range []string{KindPredictedPaCO2, KindPaCO2Discrepancy} {
		if r, ok := rm[k]; !ok || r.Reason != ReasonApparatusNotSet {
			t.Errorf("%s: refusal %+v, want %s", k, r, ReasonApparatusNotSet)
		}
	}
	// No PECO2 in the vector.
	if r := rm[KindDeadSpaceEnghoff]; r.Reason != ReasonNoPECO2 {
		t.Errorf("enghoff: reason %q, want %s", r.Reason, ReasonNoPECO2)
	}
	if len(ds)+len(rs) != len(Catalogue) {
		t.Errorf("%d derivations + %d refusals, want one per catalogue kind (%d)", len(ds), len(rs), len(Catalogue))
	}
}

// TestDeriveSectionChecks reproduces the single-formula checks of the
// physiology reference through selection and derivation.
func TestDeriveSectionChecks(t *testing.T) {
	site := DefaultSite()
	site.TargetPaCO2mmHg = 40
	tests := []struct {
		name   string
		facts  []Fact
		site   func(*Site)
		kind   string
		want   float64
		tol    float64
		source string
	}{
		{
			name:  "enghoff_PaCO2_40_PECO2_27_is_0.325",
			facts: []Fact{arterial("abg", 40), newFact("pe", QPECO2, 27, -2*time.Minute)},
			kind:  KindDeadSpaceEnghoff, want: 0.325, tol: 1e-9,
			source: "physiology.md s2: PaCO2 40, PECO2 27 -> 0.325 [derived]; Enghoff [published]",
		},
		{
			name:  "deadspace_volume_VT_500_mL_is_162.5_mL",
			facts: []Fact{arterial("abg", 40), newFact("pe", QPECO2, 27, -2*time.Minute), newFact("vt", QTidalVol, 500, -2*time.Minute, detail("expired"))},
			kind:  KindDeadSpaceVolume, want: 162.5, tol: 1e-9,
			source: "physiology.md s2: 0.325 x VT 500 mL -> VD 162.5 mL [derived]",
		},
		{
			name: "rate_for_target_RR_14_PaCO2_55_to_40_is_19.25_per_min",
			facts: []Fact{arterial("abg", 55), newFact("rr", QRespRate, 14, -2*time.Minute, detail("total")),
				newFact("vt", QTidalVol, 420, -2*time.Minute, detail("expired")),
				newFact("sex", QSex, 0, -time.Hour, fromPatient("sex"), text("male")), newFact("h", QHeight, 175, -time.Hour)},
			kind: KindRateForTarget, want: 19.25, tol: 1e-9,
			source: "physiology.md s9: RR 14, PaCO2 55 -> 40: 19.25 /min [published rule; derived]",
		},
		{
			// VD/VT 180/420 from PECO2 = 55 x (1 - 180/420) gives VD 180 mL.
			name: "vt_for_target_VT_420_VD_180_PaCO2_55_to_40_is_510_mL",
			facts: []Fact{arterial("abg", 55), newFact("pe", QPECO2, 55*(1-180.0/420), -2*time.Minute),
				newFact("vt", QTidalVol, 420, -2*time.Minute, detail("expired")),
				newFact("sex", QSex, 0, -time.Hour, fromPatient("sex"), text("male")), newFact("h", QHeight, 175, -time.Hour)},
			kind: KindTidalVolumeForTarget, want: 510, tol: 1e-6,
			source: "physiology.md s9: VT 420, VD 180, PaCO2 55 -> 40: 510 mL (not 577.5) [derived]",
		},
		{
			// Man of 172.38 cm: PBW 68.18 kg, anatomic dead space 2.2 mL/kg = 150 mL.
			name: "predicted_PaCO2_VT_420_RR_20_VD_150_is_31.96_mmHg",
			facts: []Fact{arterial("abg", 45), newFact("vco2", QVCO2, 200, -2*time.Minute),
				newFact("vt", QTidalVol, 420, -2*time.Minute, detail("expired")), newFact("rr", QRespRate, 20, -2*time.Minute, detail("total")),
				newFact("sex", QSex, 0, -time.Hour, fromPatient("sex"), text("male")), newFact("h", QHeight, 172.38, -time.Hour)},
			site: func(s *Site) {
				s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 0, true
				s.AnatomicDeadSpace = physio.AnatomicWholeAirway // Radford 2.2 mL/kg x PBW 68.18 kg = 150 mL
			},
			kind: KindPredictedPaCO2, want: 0.863004 * 200 / 5.4, tol: 0.01,
			source: "physiology.md s7: VT 420, RR 20, VD 150 -> VA 5.4 L/min [derived]; s1: K 0.863 [published]",
		},
		{
			name: "predicted_PaCO2_with_120_mL_apparatus_is_57.53_mmHg",
			facts: []Fact{arterial("abg", 45), newFact("vco2", QVCO2, 200, -2*time.Minute),
				newFact("vt", QTidalVol, 420, -2*time.Minute, detail("expired")), newFact("rr", QRespRate, 20, -2*time.Minute, detail("total")),
				newFact("sex", QSex, 0, -time.Hour, fromPatient("sex"), text("male")), newFact("h", QHeight, 172.38, -time.Hour)},
			site: func(s *Site) {
				s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 120, true
				s.AnatomicDeadSpace = physio.AnatomicWholeAirway
			},
			kind: KindPredictedPaCO2, want: 0.863004 * 200 / 3.0, tol: 0.02,
			source: "physiology.md s7: with 120 mL more apparatus dead space VA 3.0 L/min [derived]",
		},
		{
			name: "measured_minus_predicted_45_minus_31.96_is_13.04_mmHg",
			facts: []Fact{arterial("abg", 45), newFact("vco2", QVCO2, 200, -2*time.Minute),
				newFact("vt", QTidalVol, 420, -2*time.Minute, detail("expired")), newFact("rr", QRespRate, 20, -2*time.Minute, detail("total")),
				newFact("sex", QSex, 0, -time.Hour, fromPatient("sex"), text("male")), newFact("h", QHeight, 172.38, -time.Hour)},
			site: func(s *Site) {
				s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 0, true
				s.AnatomicDeadSpace = physio.AnatomicWholeAirway
			},
			kind: KindPaCO2Discrepancy, want: 45 - 0.863004*200/5.4, tol: 0.01,
			source: "physiology.md s7 predicted 31.96 mmHg [derived]; difference [derived]",
		},
		{
			// The site default, a tracheal tube or tracheostomy: VDanat =
			// 0.43 mL/lb (0.948 mL/kg) x PBW 68.18 kg = 64.64 mL (Nunn,
			// Campbell & Peckett, J Appl Physiol 1959;14:174-6 [published]),
			// VA = (420 - 64.64) x 20 / 1000 = 7.107 L/min [derived].
			name: "predicted_PaCO2_artificial_airway_default_is_24.29_mmHg",
			facts: []Fact{arterial("abg", 45), newFact("vco2", QVCO2, 200, -2*time.Minute),
				newFact("vt", QTidalVol, 420, -2*time.Minute, detail("expired")), newFact("rr", QRespRate, 20, -2*time.Minute, detail("total")),
				newFact("sex", QSex, 0, -time.Hour, fromPatient("sex"), text("male")), newFact("h", QHeight, 172.38, -time.Hour)},
			site: func(s *Site) { s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 0, true },
			kind: KindPredictedPaCO2, want: 0.863004 * 200 / ((420 - 0.43/0.45359237*(50+0.91*(172.38-152.4))) * 20 / 1000), tol: 0.001,
			source: "Nunn, Campbell & Peckett 1959, 0.43 mL/lb intrathoracic [published]; ARDS Network PBW [published]; alveolar equation [derived]",
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			s := site
			if tc.site != nil {
				tc.site(&s)
			}
			ds, rs := DeriveAll(tc.facts, s)
			dm, rm := byKind(ds, rs)
			d, ok := dm[tc.kind]
			if !ok {
				t.Fatalf("%s not derived: %+v", tc.kind, rm[tc.kind])
			}
			if math.Abs(d.Result.Value-tc.want) > tc.tol {
				t.Errorf("%s = %.6f, want %.6f +/- %g (%s)", tc.kind, d.Result.Value, tc.want, tc.tol, tc.source)
			}
		})
	}
}

// TestDeriveRefusals checks the reason of each refusal. Each case removes or
// spoils one input of the reference vector.
func TestDeriveRefusals(t *testing.T) {
	site := DefaultSite()
	site.ApparatusDeadSpaceML, site.ApparatusDeadSpaceConfigured = 50, true
	site.TargetPaCO2mmHg = 40
	base := vectorFacts()
	replace := func(f Fact) []Fact {
		out := without(base, f.Key)
		return append(out, f)
	}
	tests := []struct {
		name   string
		facts  []Fact
		kind   string
		reason string
		detail string // substring expected in Detail
	}{
		{"venous_gas_refuses_every_kind", replace(arterial("abg-1", 45, specimen(SpecimenVenous))), KindDeadSpaceVCO2, ReasonVenous, "venous"},
		{"capillary_gas", replace(arterial("abg-1", 45, specimen(SpecimenCapillary))), KindVentilatoryRatio, ReasonCapillary, "capillary"},
		{"mixed_venous_gas", replace(arterial("abg-1", 45, specimen(SpecimenMixedVenous))), KindAlveolarDeadSpace, ReasonMixedVenous, "mixed venous"},
		{"unspecified_blood", replace(arterial("abg-1", 45, specimen(SpecimenUnknown))), KindDeadSpaceVCO2, ReasonUnknownSpecimen, "unspecified"},
		{"blood_gas_entered_in_error", replace(arterial("abg-1", 45, status(StatusEnteredInError))), KindDeadSpaceVCO2, ReasonEnteredInError, ""},
		{"blood_gas_cancelled", replace(arterial("abg-1", 45, status(StatusCancelled))), KindDeadSpaceVCO2, ReasonBloodGasNotUsable, "cancelled"},
		{"temperature_corrected_paco2", replace(arterial("abg-1", 45, func(f *Fact) { f.TempCorrected = true })), KindDeadSpaceVCO2, ReasonTemperatureAdjusted, "37 °C"},
		{"PaCO2_300_mmHg_implausible", replace(arterial("abg-1", 300)), KindAlveolarDeadSpace, ReasonImplausible, "PaCO2"},
		{"no_ventilator_data_only_stale_reading_45_min_before", append(without(base, "ve-1", "vco2-1", "etco2-1", "vt-1", "rr-1"),
			newFact("ve-old", QMinuteVol, 10, -45*time.Minute, detail("expired"))), KindDeadSpaceVCO2, ReasonNoVentilatorData, "45 min before"},
		{"no_minute_volume", without(base, "ve-1"), KindDeadSpaceVCO2, ReasonNoMinuteVolume, "minute volume"},
		{"no_vco2", without(base, "vco2-1"), KindDeadSpaceVCO2, ReasonNoVCO2, "VCO2"},
		{"no_vco2_nor_peco2_for_deadspace_volume", without(base, "vco2-1"), KindDeadSpaceVolume, ReasonNoVCO2, "mixed-expired"},
		{"no_peco2", base, KindDeadSpaceEnghoff, ReasonNoPECO2, ""},
		{"no_etco2", without(base, "etco2-1"), KindPaCO2PETCO2Gradient, ReasonNoETCO2, ""},
		{"no_tidal_volume", without(base, "vt-1"), KindDeadSpaceVolume, ReasonNoTidalVolume, ""},
		{"no_resp_rate", without(base, "rr-1"), KindRateForTarget, ReasonNoRespRate, ""},
		{"no_height_for_PBW", without(base, "height-1"), KindVentilatoryRatio, ReasonNoHeight, ""},
		{"no_sex", without(base, "#sex"), KindVentilatoryRatio, ReasonNoSex, ""},
		{"sex_other_is_no_sex", replace(newFact("sex", QSex, 0, -72*time.Hour, fromPatient("sex"), text("other"))), KindVentilatoryRatio, ReasonNoSex, "other"},
		{"no_age", without(base, "#birthDate"), KindDeadSpaceEstimated, ReasonNoAge, ""},
		{"age_12_y_implausible_for_energy_equation", replace(newFact("birth", QBirthDate, 0, -72*time.Hour, fromPatient("birthDate"), text("2014-01-01"))), KindDeadSpaceEstimated, ReasonImplausible, "age"},
		{"no_weight", without(base, "weight-1"), KindDeadSpaceEstimated, ReasonNoWeight, ""},
		{"minute_volume_250_L_per_min_implausible", replace(newFact("ve-1", QMinuteVol, 250, -5*time.Minute, detail("expired"))), KindDeadSpaceVCO2, ReasonImplausible, "Observation/ve-1"},
		{"VCO2_too_high_for_VE_inconsistent", replace(newFact("vco2-1", QVCO2, 900, -5*time.Minute)), KindDeadSpaceVCO2, ReasonInconsistent, ""},
		{"PETCO2_above_PaCO2_inconsistent_for_AVDSF", replace(newFact("etco2-1", QPETCO2, 50, -5*time.Minute)), KindAlveolarDeadSpace, ReasonInconsistent, ""},
		{"PECO2_above_PaCO2_inconsistent", append(base, newFact("pe", QPECO2, 50, -2*time.Minute)), KindDeadSpaceEnghoff, ReasonInconsistent, ""},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			ds, rs := DeriveAll(tc.facts, site)
			dm, rm := byKind(ds, rs)
			r, ok := rm[tc.kind]
			if !ok {
				t.Fatalf("%s derived (%v), want refusal %s", tc.kind, dm[tc.kind].Result.Value, tc.reason)
			}
			if r.Reason != tc.reason {
				t.Errorf("reason %q (%s), want %q", r.Reason, r.Detail, tc.reason)
			}
			if !strings.Contains(r.Detail, tc.detail) {
				t.Errorf("detail %q does not mention %q", r.Detail, tc.detail)
			}
			if strings.Contains(r.Detail, testPatient) {
				t.Errorf("detail %q names the patient", r.Detail)
			}
			if r.Key != DerivationKey(testPatient, "Observation/abg-1", tc.kind) || r.Digest == "" {
				t.Errorf("refusal key %q digest %q", r.Key, r.Digest)
			}
			if len(r.Considered) == 0 || r.Considered[0].Role != RoleBloodGas {
				t.Errorf("considered inputs %v do not start with the blood gas", r.Considered)
			}
		})
	}

	t.Run("apparatus_dead_space_not_configured", func(t *testing.T) {
		_, rs := DeriveAll(base, DefaultSite())
		_, rm := byKind(nil, rs)
		if r := rm[KindPredictedPaCO2]; r.Reason != ReasonApparatusNotSet {
			t.Errorf("reason %q, want %s", r.Reason, ReasonApparatusNotSet)
		}
	})
	t.Run("blood_gas_refusal_applies_to_every_kind", func(t *testing.T) {
		ds, rs := DeriveAll(replace(arterial("abg-1", 45, specimen(SpecimenVenous))), site)
		if len(ds) != 0 || len(rs) != len(Catalogue) {
			t.Fatalf("%d derivations, %d refusals; want 0 and %d", len(ds), len(rs), len(Catalogue))
		}
		for _, r := range rs {
			if r.Reason != ReasonVenous {
				t.Errorf("%s: reason %q", r.Kind, r.Reason)
			}
		}
	})
}

func TestDeriveZeroSelectionIsRefused(t *testing.T) {
	ds, rs := Derive(Selection{}, DefaultSite())
	if len(ds) != 0 || len(rs) != len(Catalogue) || rs[0].Reason != ReasonNotBloodGas {
		t.Errorf("zero selection: %d derivations, refusals %+v", len(ds), rs)
	}
}

func TestDeriveStatusFollowsInputs(t *testing.T) {
	tests := []struct {
		name  string
		facts []Fact
		want  Status
	}{
		{"all_final", vectorFacts(), StatusFinal},
		{"preliminary_blood_gas", append(without(vectorFacts(), "abg-1"), arterial("abg-1", 45, status(StatusPreliminary))), StatusPreliminary},
		{"preliminary_minute_volume", append(without(vectorFacts(), "ve-1"), newFact("ve-1", QMinuteVol, 10, -5*time.Minute, detail("expired"), status(StatusPreliminary))), StatusPreliminary},
		{"amended_blood_gas_gives_final", append(without(vectorFacts(), "abg-1"), arterial("abg-1", 45, status(StatusAmended))), StatusFinal},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			ds, _ := DeriveAll(tc.facts, DefaultSite())
			dm, _ := byKind(ds, nil)
			if got := dm[KindDeadSpaceVCO2].Status; got != tc.want {
				t.Errorf("status %q, want %q", got, tc.want)
			}
			// A kind that does not use the minute volume stays final.
			if tc.name == "preliminary_minute_volume" && dm[KindAlveolarDeadSpace].Status != StatusFinal {
				t.Errorf("AVDSF status %q, want final (it does not use the minute volume)", dm[KindAlveolarDeadSpace].Status)
			}
		})
	}
}

func TestDerivationIdentity(t *testing.T) {
	ds, _ := DeriveAll(vectorFacts(), DefaultSite())
	dm, _ := byKind(ds, nil)
	d := dm[KindDeadSpaceVCO2]
	wantKey := testPatient + "|Observation/abg-1|" + KindDeadSpaceVCO2
	if d.Key != wantKey {
		t.Fatalf("key %q, want %q", d.Key, wantKey)
	}
	// RFC 9562: a name-based SHA-1 UUID has version 5 and the RFC variant;
	// google/uuid is the reference implementation used here.
	u, err := uuid.Parse(d.ID)
	if err != nil || u.Version() != 5 || u.Variant() != uuid.RFC4122 {
		t.Fatalf("id %q: version %v variant %v err %v, want a version 5 RFC UUID", d.ID, u.Version(), u.Variant(), err)
	}
	if d.ID != uuid.NewSHA1(IDNamespace, []byte(wantKey)).String() {
		t.Errorf("id %q is not the v5 UUID of the key", d.ID)
	}
	if d.Algorithm != Algorithm {
		t.Errorf("algorithm %q", d.Algorithm)
	}
	roles := make([]Role, len(d.Inputs))
	for i, in := range d.Inputs {
		roles[i] = in.Role
	}
	if got := strings.Join(rolesStrings(roles), ","); got != "paco2,vco2,minute-volume" {
		t.Errorf("inputs %s, want paco2,vco2,minute-volume", got)
	}

	// Same inputs give the same digest; each hashed field changes it.
	again, _ := DeriveAll(vectorFacts(), DefaultSite())
	da, _ := byKind(again, nil)
	if da[KindDeadSpaceVCO2].Digest != d.Digest {
		t.Errorf("digest not stable")
	}
	changed := map[string]func(*Derivation){
		"status":       func(x *Derivation) { x.Status = StatusAmended },
		"value":        func(x *Derivation) { x.Result.Value += 0.001 },
		"unit":         func(x *Derivation) { x.Result.Unit = "%" },
		"input_digest": func(x *Derivation) { x.Inputs = append([]Input(nil), x.Inputs...); x.Inputs[1].Fact.Digest = "other" },
		"input_role":   func(x *Derivation) { x.Inputs = append([]Input(nil), x.Inputs...); x.Inputs[1].Role = RolePECO2 },
	}
	for name, change := range changed {
		t.Run("digest_changes_with_"+name, func(t *testing.T) {
			x := d
			change(&x)
			x.Seal()
			if x.Digest == d.Digest {
				t.Errorf("digest unchanged")
			}
		})
	}
	t.Run("digest_ignores_value_below_output_precision", func(t *testing.T) {
		x := d
		x.Result.Value += 0.00001
		x.Seal()
		if x.Digest != d.Digest {
			t.Errorf("digest changed by 1e-5, below the 3 decimals published")
		}
	})
}

func rolesStrings(rs []Role) []string {
	out := make([]string, len(rs))
	for i, r := range rs {
		out[i] = string(r)
	}
	return out
}

func TestDeriveBloodGas(t *testing.T) {
	facts := append(vectorFacts(), arterial("abg-2", 50, func(f *Fact) { f.Effective = t0.Add(3 * time.Hour) }))
	ds, rs := DeriveBloodGas("Observation/abg-1", facts, DefaultSite())
	for _, d := range ds {
		if d.BloodGas != "Observation/abg-1" {
			t.Errorf("derivation for %s", d.BloodGas)
		}
	}
	if len(ds)+len(rs) != len(Catalogue) {
		t.Errorf("%d+%d results, want %d", len(ds), len(rs), len(Catalogue))
	}
	// The second gas, 3 h later, has no ventilator data in its window.
	_, rs2 := DeriveBloodGas("Observation/abg-2", facts, DefaultSite())
	_, rm := byKind(nil, rs2)
	if rm[KindDeadSpaceVCO2].Reason != ReasonNoVentilatorData {
		t.Errorf("abg-2: %+v", rm[KindDeadSpaceVCO2])
	}
	if ds, rs := DeriveBloodGas("Observation/absent", facts, DefaultSite()); ds != nil || rs != nil {
		t.Errorf("unknown key gave results")
	}
}

func TestDeriveAllSeveralPatientsAndVersions(t *testing.T) {
	facts := vectorFacts()
	// A second patient's venous gas and an old version of the minute volume.
	facts = append(facts,
		arterial("vbg-9", 50, patient("Patient/demo-other"), encounter("Encounter/demo-enc-9"), specimen(SpecimenVenous)),
		newFact("ve-1", QMinuteVol, 20, -5*time.Minute, detail("expired"), func(f *Fact) { f.VersionID = "0" }),
	)
	ds, rs := DeriveAll(facts, DefaultSite())
	dm, _ := byKind(ds, nil)
	if v := dm[KindDeadSpaceVCO2].Result.Value; math.Abs(v-0.61644) > 0.00005 {
		t.Errorf("VD/VT %.5f: the old minute-volume version was used", v)
	}
	venous := 0
	for _, r := range rs {
		if r.Patient == "Patient/demo-other" {
			if r.Reason != ReasonVenous {
				t.Errorf("other patient: %s", r.Reason)
			}
			venous++
		}
	}
	if venous != len(Catalogue) {
		t.Errorf("%d venous refusals, want %d", venous, len(Catalogue))
	}
	for i := 1; i < len(rs); i++ {
		if rs[i-1].Key > rs[i].Key {
			t.Fatalf("refusals not sorted by key")
		}
	}
}
