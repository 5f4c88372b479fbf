package fhirmap_test

import (
	"fmt"
	"time"

	"github.com/ventderive/ventderive/fhirmap"
)

// ExampleDeriveAll pairs an arterial blood gas with the ventilator readings
// of the 30 minutes before it and derives the dead-space fraction from
// measured CO2 production (values of the reference vector; invented patient).
func ExampleDeriveAll() {
	at := time.Date(2026, 3, 2, 8, 0, 0, 0, time.UTC)
	fact := func(id string, q fhirmap.Quantity, v float64, t time.Time, detail string) fhirmap.Fact {
		return fhirmap.Fact{Key: "Observation/" + id, Resource: "Observation/" + id, Patient: "Patient/demo-1",
			Quantity: q, Origin: fhirmap.OriginMeasured, Detail: detail, Value: v, Unit: q.Unit(),
			Status: fhirmap.StatusFinal, Effective: t, Digest: id}
	}
	abg := fact("abg", fhirmap.QPCO2, 45, at, "")
	abg.Specimen = fhirmap.SpecimenArterial
	facts := []fhirmap.Fact{
		abg,
		fact("ve", fhirmap.QMinuteVol, 10, at.Add(-5*time.Minute), "expired"),
		fact("vco2", fhirmap.QVCO2, 200, at.Add(-5*time.Minute), ""),
	}
	ds, rs := fhirmap.DeriveAll(facts, fhirmap.DefaultSite())
	for _, d := range ds {
		if d.Kind == fhirmap.KindDeadSpaceVCO2 {
			fmt.Println(d.Kind, fhirmap.FormatValue(d.Kind, d.Result.Value), d.Status)
		}
	}
	for _, r := range rs {
		if r.Kind == fhirmap.KindVentilatoryRatio {
			fmt.Println(r.Kind, "refused:", r.Reason)
		}
	}
	// Output:
	// deadspace-fraction-vco2 0.616 final
	// ventilatory-ratio refused: no-sex
}
