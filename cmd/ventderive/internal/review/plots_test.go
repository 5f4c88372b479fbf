package review

import (
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
)

// The reference lines drawn on the plots sit exactly where physio's
// published readings change (so a point above a line reads as the note
// says), and name the source physio cites. Values: Nunn & Hill 1960 (VD/VT
// about 0.3), Nuckton et al. NEJM 2002 (0.58 at ARDS onset), Tyburski et
// al. J Trauma 2002 (gradient 9 mmHg, alveolar dead-space fraction 0.20),
// Sinha et al. Br J Anaesth 2009 (VR 1.55) and the PETAL-ROSE secondary
// analysis, Crit Care 2022 (VR 2.0) [published; as physio records them].
func TestReferenceLinesMatchPhysio(t *testing.T) {
	for _, tc := range []struct {
		name   string
		kind   string
		read   func(float64) physio.Interpretation
		source string
	}{
		{"dead-space fraction", "deadspace", physio.InterpretDeadSpaceFraction, "Nunn & Hill"},
		{"Pa-ETCO2 gradient mmHg", fhirmap.KindPaCO2PETCO2Gradient, func(v float64) physio.Interpretation { return physio.InterpretEndTidalGradient(physio.MmHg(v)) }, "Tyburski"},
		{"alveolar dead-space fraction", fhirmap.KindAlveolarDeadSpace, physio.InterpretAlveolarDeadSpaceFraction, "Tyburski"},
		{"ventilatory ratio", fhirmap.KindVentilatoryRatio, physio.InterpretVentilatoryRatio, "Sinha"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			lines := refLines(tc.kind)
			if len(lines) == 0 {
				t.Fatal("no reference line")
			}
			for _, l := range lines {
				below, above := tc.read(l.value-1e-6), tc.read(l.value+1e-6)
				if below == above {
					t.Errorf("line at %g: physio reads the same on both sides (%q); the line is not a threshold", l.value, below.Text)
				}
				if !strings.Contains(l.label, firstSource(above.Source)) && !strings.Contains(l.label, lastSource(above.Source)) {
					t.Errorf("line at %g: label %q does not name physio's source %q", l.value, l.label, above.Source)
				}
			}
			if !strings.Contains(lines[0].label, tc.source) {
				t.Errorf("label %q lacks %s", lines[0].label, tc.source)
			}
		})
	}
	// The estimate gets no line: physio reads it against no threshold.
	if physio.InterpretEstimatedDeadSpaceFraction(0.25, false) != physio.InterpretEstimatedDeadSpaceFraction(0.65, false) {
		t.Errorf("physio reads the estimate against a threshold; the plot draws none for it")
	}
}

func TestSpanText(t *testing.T) {
	for _, tc := range []struct {
		in   string
		want string
	}{{"1m", "minute"}, {"2h", "2 hours"}, {"24h", "day"}, {"72h", "3 days"}, {"90s", "1m30s"}} {
		d, _ := timeParseDuration(tc.in)
		if got := spanText(d); got != tc.want {
			t.Errorf("spanText(%s) = %q, want %q", tc.in, got, tc.want)
		}
	}
}

func TestSplitKey(t *testing.T) {
	p, g, k := splitKey("Patient/lg-icu-0002|Observation/lg-0002-abg-00#http://loinc.org|2019-8|paco2-predicted")
	if p != "Patient/lg-icu-0002" || g != "Observation/lg-0002-abg-00#http://loinc.org|2019-8" || k != "paco2-predicted" {
		t.Errorf("splitKey: %q %q %q", p, g, k)
	}
}

var timeParseDuration = time.ParseDuration
