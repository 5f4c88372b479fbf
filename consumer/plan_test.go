package consumer

import (
	"testing"

	"github.com/ventderive/ventderive/fhirmap"
)

// FHIR R4 ObservationStatus (hl7.org/fhir/R4/valueset-observation-status):
// "amended" and "corrected" are changes made after a result was final;
// "preliminary" results may be incomplete or unverified.
func TestRevisedStatus(t *testing.T) {
	const (
		pre = fhirmap.StatusPreliminary
		fin = fhirmap.StatusFinal
		amd = fhirmap.StatusAmended
		cor = fhirmap.StatusCorrected
	)
	for _, tc := range []struct {
		name                          string
		computed, published, bloodGas fhirmap.Status
		want                          fhirmap.Status
	}{
		{"still preliminary", pre, pre, pre, pre},
		{"preliminary becomes final", fin, pre, fin, fin},
		{"final value changed by a late ventilator reading", fin, fin, fin, amd},
		{"blood gas amended", fin, fin, amd, amd},
		{"blood gas corrected", fin, fin, cor, cor},
		{"amended again", fin, amd, amd, amd},
		{"an input turned preliminary after a final result", pre, fin, fin, pre},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if got := revisedStatus(tc.computed, tc.published, tc.bloodGas); got != tc.want {
				t.Errorf("revisedStatus(%s, %s, %s) = %s, want %s", tc.computed, tc.published, tc.bloodGas, got, tc.want)
			}
		})
	}
}
