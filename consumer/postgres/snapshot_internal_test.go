package postgres

import (
	"regexp"
	"slices"
	"testing"

	"github.com/ventderive/ventderive/fhirmap"
)

// TestVentilatorQuantitiesMatchFhirmap checks the store's list of
// ventilator-reading quantities (the nearest readings outside the window
// that a snapshot loads) against fhirmap's rule for every quantity it
// knows: the stored refusal detail must name the reading derive names.
func TestVentilatorQuantitiesMatchFhirmap(t *testing.T) {
	var listed []string
	for _, m := range regexp.MustCompile(`'([a-z0-9-]+)'`).FindAllStringSubmatch(ventilatorQuantitiesSQL, -1) {
		listed = append(listed, m[1])
	}
	all := []fhirmap.Quantity{fhirmap.QPCO2, fhirmap.QPO2, fhirmap.QPH, fhirmap.QBicarbonate, fhirmap.QBaseExcess,
		fhirmap.QPETCO2, fhirmap.QVCO2, fhirmap.QMinuteVol, fhirmap.QTidalVol, fhirmap.QRespRate, fhirmap.QFiO2,
		fhirmap.QPEEP, fhirmap.QPlateau, fhirmap.QMeanAirway, fhirmap.QPFRatio, fhirmap.QWeight, fhirmap.QHeight,
		fhirmap.QBodyTemp, fhirmap.QSex, fhirmap.QBirthDate, fhirmap.QPECO2, fhirmap.QFETCO2}
	for _, e := range fhirmap.DefaultCodes().Entries() {
		if !slices.Contains(all, e.Quantity) {
			all = append(all, e.Quantity)
		}
	}
	for _, q := range all {
		if got, want := slices.Contains(listed, string(q)), fhirmap.IsVentilatorReading(q); got != want {
			t.Errorf("quantity %s: listed as ventilator reading %v, fhirmap says %v", q, got, want)
		}
	}
}
