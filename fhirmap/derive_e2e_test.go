package fhirmap

import (
	"math"
	"os"
	"testing"
)

// TestDeriveFromFHIRJSON runs the reference vector end to end: FHIR R4 JSON
// through Decode, Current, Select and Derive. The PaCO2 is sent as 5.99949
// kPa, which is 45.000 mm[Hg] with the UCUM factor 1 mm[Hg] = 133.322 Pa
// (shared/reference/codes.md, UCUM), so the unit conversion is exercised.
func TestDeriveFromFHIRJSON(t *testing.T) {
	raw, err := os.ReadFile("testdata/derive/vector.json")
	if err != nil {
		t.Fatal(err)
	}
	dec, err := Decode(raw, nil)
	if err != nil {
		t.Fatal(err)
	}
	ds, rs := DeriveAll(dec.Facts, DefaultSite())
	dm, _ := byKind(ds, nil)
	tests := []struct {
		name   string
		kind   string
		want   float64
		tol    float64
		source string
	}{
		{"vdvt_vco2_0.61644", KindDeadSpaceVCO2, 0.61644, 0.00005, "physiology.md s11 [derived]"},
		{"vdvt_estimated_0.64040", KindDeadSpaceEstimated, 0.64040, 0.00005, "physiology.md s3/s11 [derived]; Siddiki 2010 [published]"},
		{"ventilatory_ratio_1.7005", KindVentilatoryRatio, 1.7005, 0.00005, "physiology.md s6/s11 [derived]; Sinha 2009 [published]"},
		{"avdsf_0.2222", KindAlveolarDeadSpace, 0.2222, 0.00005, "physiology.md s8/s11 [derived]"},
		{"alveolar_ventilation_3.836_L_per_min", KindAlveolarVentilation, 3.836, 0.0005, "physiology.md s11 [derived]"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			d, ok := dm[tc.kind]
			if !ok {
				t.Fatalf("%s not derived", tc.kind)
			}
			if math.Abs(d.Result.Value-tc.want) > tc.tol {
				t.Errorf("%s = %.6f, want %.5f (%s)", tc.kind, d.Result.Value, tc.want, tc.source)
			}
			if d.Patient != "Patient/tv-0011" || d.Encounter != "Encounter/tv-enc-0011" || d.Effective.UTC().Format("15:04") != "08:00" {
				t.Errorf("identity %s %s %v", d.Patient, d.Encounter, d.Effective)
			}
			if in := d.Inputs[0].Fact; in.SourceUnit != "kPa" || math.Abs(in.Value-45) > 0.001 {
				t.Errorf("PaCO2 input %v %s (sent %v %s), want 45 mmHg", in.Value, in.Unit, in.SourceValue, in.SourceUnit)
			}
		})
	}
	venous := 0
	for _, r := range rs {
		if r.BloodGas == "Observation/tv-vbg" {
			if r.Reason != ReasonVenous {
				t.Errorf("venous gas %s: %s", r.Kind, r.Reason)
			}
			venous++
		}
	}
	if venous != len(Catalogue) {
		t.Errorf("%d refusals for the venous gas, want %d", venous, len(Catalogue))
	}
}
