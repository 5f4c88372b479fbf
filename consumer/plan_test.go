package consumer

import (
	"strings"
	"testing"
	"time"

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

// A published blood gas that the laboratory re-codes (its current version
// is no longer a PCO2) has its derived values withdrawn, with the blood
// gas's time, instead of failing the plan on every retry.
func TestPlanRetractsRecodedBloodGas(t *testing.T) {
	at := time.Date(2026, 3, 2, 8, 0, 0, 0, time.UTC)
	pco2 := fhirmap.Fact{Key: "Observation/g1", Resource: "Observation/g1", VersionID: "1", Digest: strings.Repeat("a", 64),
		Patient: "Patient/p1", Quantity: fhirmap.QPCO2, Specimen: fhirmap.SpecimenArterial, Value: 45, Unit: "mm[Hg]",
		Status: fhirmap.StatusFinal, Effective: at}
	recoded := pco2
	recoded.VersionID, recoded.Digest = "2", strings.Repeat("b", 64)
	recoded.Quantity, recoded.Specimen, recoded.Status = fhirmap.QPO2, fhirmap.SpecimenArterial, fhirmap.StatusCorrected
	key := fhirmap.DerivationKey("Patient/p1", "Observation/g1", fhirmap.KindPaCO2PETCO2Gradient)
	site := fhirmap.DefaultSite()
	p := Planner{Site: site, ObservationSub: "o", ProvenanceSub: "p"}
	ch, err := p.Plan(Snapshot{
		Patient:  "Patient/p1",
		Facts:    []fhirmap.Fact{pco2, recoded},
		Affected: []string{"Observation/g1"},
		Current: []Stored{{Key: key, Kind: fhirmap.KindPaCO2PETCO2Gradient, Version: 1,
			Digest: strings.Repeat("c", 64), Status: fhirmap.StatusFinal, Value: 10}},
	}, at.Add(time.Hour))
	if err != nil {
		t.Fatalf("plan: %v", err)
	}
	if len(ch.Derivations) != 1 {
		t.Fatalf("%d derivation versions, want the one retraction", len(ch.Derivations))
	}
	d := ch.Derivations[0]
	if d.Key != key || d.Status != fhirmap.StatusEnteredInError || ch.Versions[0] != 2 || !d.Effective.Equal(at) {
		t.Errorf("retraction %s status %s version %d effective %s", d.Key, d.Status, ch.Versions[0], d.Effective)
	}
	if len(ch.Outbox) != 2 {
		t.Errorf("%d outbox messages, want Observation and Provenance", len(ch.Outbox))
	}
}
