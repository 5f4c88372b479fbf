package fhirmap

import (
	"fmt"
	"testing"
	"time"
)

// benchFacts is one arterial blood gas with 60 ventilator readings in its
// window (six quantities every 4 min from 30 min before to 10 min after, as
// a device feed charts them) and the patient-level facts.
func benchFacts() (Fact, []Fact) {
	bg := arterial("abg-b", 45)
	facts := []Fact{bg}
	for i := range 10 {
		off := -30*time.Minute + time.Duration(i)*4*time.Minute
		id := fmt.Sprintf("%02d", i)
		facts = append(facts,
			newFact("ve-"+id, QMinuteVol, 10+float64(i)/10, off, detail("expired")),
			newFact("vco2-"+id, QVCO2, 200, off),
			newFact("et-"+id, QPETCO2, 35, off),
			newFact("vt-"+id, QTidalVol, 500, off, detail("expired")),
			newFact("rr-"+id, QRespRate, 20, off, detail("total")),
			newFact("rrset-"+id, QRespRate, 18, off, setting()),
		)
	}
	facts = append(facts,
		newFact("sex", QSex, 0, -72*time.Hour, fromPatient("sex"), text("male")),
		newFact("birth", QBirthDate, 0, -72*time.Hour, fromPatient("birthDate"), text("1985-06-01")),
		newFact("height-1", QHeight, 175, -48*time.Hour),
		newFact("weight-1", QWeight, 70, -48*time.Hour),
	)
	return bg, facts
}

func BenchmarkSelectDerive(b *testing.B) {
	bg, facts := benchFacts()
	site := goldenSite()
	b.ReportAllocs()
	for b.Loop() {
		ds, rs := Derive(Select(bg, facts, site), site)
		if len(ds)+len(rs) != len(Catalogue) {
			b.Fatal("missing results")
		}
	}
}

func BenchmarkEncodeObservation(b *testing.B) {
	bg, facts := benchFacts()
	site := goldenSite()
	ds, _ := Derive(Select(bg, facts, site), site)
	var d Derivation
	for _, x := range ds {
		if x.Kind == KindTidalVolumeForTarget { // the longest basis: three steps
			d = x
		}
	}
	b.ReportAllocs()
	for b.Loop() {
		if _, err := EncodeObservation(d, 1, site); err != nil {
			b.Fatal(err)
		}
	}
}
