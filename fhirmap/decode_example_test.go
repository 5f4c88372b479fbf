package fhirmap_test

import (
	"errors"
	"fmt"

	"github.com/ventderive/ventderive/fhirmap"
)

func ExampleDecode() {
	raw := []byte(`{"resourceType":"Observation","id":"lg-abg-0001-pco2","status":"final",
	  "code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},
	  "subject":{"reference":"Patient/lg-0001"},
	  "effectiveDateTime":"2026-11-20T08:15:00+01:00",
	  "valueQuantity":{"value":6.1,"unit":"kPa","system":"http://unitsofmeasure.org","code":"kPa"}}`)
	d, err := fhirmap.Decode(raw, nil)
	if err != nil {
		fmt.Println(err)
		return
	}
	f := d.Facts[0]
	fmt.Printf("%s %s %s %.2f %s at %s\n", f.Key, f.Quantity, f.Specimen, f.Value, f.Unit, f.Effective.Format("15:04Z07:00"))

	// A misspelled field is refused, naming it.
	_, err = fhirmap.Decode([]byte(`{"resourceType":"Observation","id":"x","stauts":"final"}`), nil)
	if de, ok := errors.AsType[*fhirmap.DecodeError](err); ok {
		fmt.Println(de.Reason, de.Field)
	}
	// Output:
	// Observation/lg-abg-0001-pco2 pco2 arterial 45.75 mm[Hg] at 07:15Z
	// unknown-field Observation.stauts
}
