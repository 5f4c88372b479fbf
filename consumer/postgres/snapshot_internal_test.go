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

// TestRefusalVerifyQuantities checks that the refusal verification loads
// every quantity the code table can produce (a fact of a quantity left out
// would be missing from the re-derivation) and counts as ventilator
// readings exactly those the snapshot does.
func TestRefusalVerifyQuantities(t *testing.T) {
	for _, e := range fhirmap.DefaultCodes().Entries() {
		if e.Panel { // a panel code carries its quantities in components
			continue
		}
		if !slices.Contains(allQuantities, string(e.Quantity)) {
			t.Errorf("quantity %q of the code table (%s) is not loaded by refusal verification", e.Quantity, e.Code)
		}
	}
	for _, q := range []fhirmap.Quantity{fhirmap.QTargetPaCO2, fhirmap.QApparatusVD} {
		if !slices.Contains(allQuantities, string(q)) {
			t.Errorf("standing quantity %s is not loaded by refusal verification", q)
		}
	}
	for _, q := range patientLevel {
		if !slices.Contains(allQuantities, q) {
			t.Errorf("patient-level quantity %s is not loaded by refusal verification", q)
		}
	}
	var listed []string
	for _, m := range regexp.MustCompile(`'([a-z0-9-]+)'`).FindAllStringSubmatch(ventilatorQuantitiesSQL, -1) {
		listed = append(listed, m[1])
	}
	got := ventilatorQuantities()
	slices.Sort(got)
	slices.Sort(listed)
	if !slices.Equal(got, listed) {
		t.Errorf("refusal verification counts %q as ventilator readings, the snapshot %q", got, listed)
	}
}
