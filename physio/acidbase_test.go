package physio_test

import (
	"slices"
	"testing"

	"github.com/ventderive/ventderive/physio"
)

// TestChronicHypercapnia: compensation is read from bicarbonate above 30
// mmol/L with PaCO2 above 45 mmHg (acute buffering adds about 1 mmol/L per
// 10 mmHg, chronic 3.5-4: Brandis, Acid-Base Physiology 4.5 [published];
// 24 + (100 - 40)/10 = 30 [derived]), or base excess above +2 mmol/L when
// no bicarbonate is sent [common practice: normal -2 to +2].
func TestChronicHypercapnia(t *testing.T) {
	for _, c := range []struct {
		name             string
		paco2            physio.MmHg
		hco3, be         physio.MmolPerL
		haveHCO3, haveBE bool
		want             bool
	}{
		// Chronic: 24 + 3.5 x (60 - 40)/10 = 31 mmol/L [derived, Boston rule].
		{"PaCO2_60_HCO3_31_chronic", 60, 31, 0, true, false, true},
		// Acute: 24 + (60 - 40)/10 = 26 mmol/L [derived].
		{"PaCO2_60_HCO3_26_acute", 60, 26, 0, true, false, false},
		{"PaCO2_60_HCO3_30_not_above", 60, 30, 0, true, false, false},
		{"PaCO2_45_HCO3_34_not_hypercapnic", 45, 34, 0, true, false, false},
		{"PaCO2_58_BE_6_no_HCO3", 58, 0, 6, false, true, true},
		{"PaCO2_58_BE_2_no_HCO3", 58, 0, 2, false, true, false},
		{"PaCO2_58_HCO3_26_BE_6_HCO3_decides", 58, 26, 6, true, true, false},
		{"PaCO2_70_nothing_sent", 70, 0, 0, false, false, false},
	} {
		t.Run(c.name, func(t *testing.T) {
			if got := physio.ChronicHypercapnia(c.paco2, c.hco3, c.haveHCO3, c.be, c.haveBE); got != c.want {
				t.Errorf("got %v, want %v", got, c.want)
			}
		})
	}
	r, err := physio.RateForTarget(14, 60, 40, 420, 70.566)
	if err != nil {
		t.Fatal(err)
	}
	r.CautionChronicHypercapnia()
	if !slices.Contains(r.Flags(), physio.FlagChronicHypercapnia) {
		t.Errorf("rate for target not cautioned: %q", r.Flags())
	}
	o, _ := physio.DeadSpaceEnghoff(40, 27)
	o.CautionChronicHypercapnia()
	if len(o.Flags()) != 0 {
		t.Errorf("a dead-space fraction was cautioned: %q", o.Flags())
	}
}
