package fhirmap

import (
	"crypto/sha256"
	"encoding/hex"
	"strings"
	"time"
)

// Invented test patient, encounter and times (no real data).
const (
	testPatient   = "Patient/demo-7f3a"
	testEncounter = "Encounter/demo-enc-1"
)

var t0 = time.Date(2026, 3, 2, 8, 0, 0, 0, time.UTC)

type factOpt func(*Fact)

// newFact builds a normalised fact by hand, as the decoder would.
func newFact(id string, q Quantity, v float64, off time.Duration, opts ...factOpt) Fact {
	f := Fact{
		Key:       "Observation/" + id,
		Resource:  "Observation/" + id,
		VersionID: "1",
		Patient:   testPatient,
		Encounter: testEncounter,
		Quantity:  q,
		Origin:    OriginMeasured,
		Value:     v,
		Unit:      q.Unit(),
		Status:    StatusFinal,
		Effective: t0.Add(off),
	}
	for _, o := range opts {
		o(&f)
	}
	sum := sha256.Sum256([]byte(f.Key + "|" + f.VersionID + "|" + string(f.Status) + "|" + f.Text + "|" + f.Effective.String()))
	f.Digest = hex.EncodeToString(sum[:])
	return f
}

func detail(d string) factOpt    { return func(f *Fact) { f.Detail = d } }
func setting() factOpt           { return func(f *Fact) { f.Origin, f.Detail = OriginSetting, "set" } }
func origin(o Origin) factOpt    { return func(f *Fact) { f.Origin = o } }
func status(s Status) factOpt    { return func(f *Fact) { f.Status = s } }
func encounter(e string) factOpt { return func(f *Fact) { f.Encounter = e } }
func patient(p string) factOpt   { return func(f *Fact) { f.Patient = p } }
func specimen(s Specimen) factOpt {
	return func(f *Fact) { f.Specimen = s }
}
func text(t string) factOpt { return func(f *Fact) { f.Text, f.Unit = t, "" } }
func fromPatient(attr string) factOpt {
	return func(f *Fact) {
		f.Key = testPatient + "#" + attr
		f.Resource = testPatient
		f.Encounter = ""
	}
}

// arterial is an arterial PaCO2 fact at t0.
func arterial(id string, paco2 float64, opts ...factOpt) Fact {
	base := []factOpt{specimen(SpecimenArterial), func(f *Fact) { f.Code = Coding{System: "http://loinc.org", Code: "2019-8"} }}
	return newFact(id, QPCO2, paco2, 0, append(base, opts...)...)
}

// vectorFacts is the end-to-end vector of the physiology reference (section
// 11, [derived]): man, 175 cm, 70 kg, 40 y; VE 10 L/min; PaCO2 45 mm[Hg];
// measured VCO2 200 mL/min; PETCO2 35 mm[Hg]. It adds, for the kinds that
// need them, a tidal volume of 500 mL at 20 /min (VE = 10 L/min) and no
// PECO2 (the Enghoff form is checked separately).
func vectorFacts() []Fact {
	return []Fact{
		arterial("abg-1", 45),
		newFact("ve-1", QMinuteVol, 10, -5*time.Minute, detail("expired")),
		newFact("vco2-1", QVCO2, 200, -5*time.Minute),
		newFact("etco2-1", QPETCO2, 35, -5*time.Minute),
		newFact("vt-1", QTidalVol, 500, -5*time.Minute, detail("expired")),
		newFact("rr-1", QRespRate, 20, -5*time.Minute, detail("total")),
		newFact("sex", QSex, 0, -72*time.Hour, fromPatient("sex"), text("male")),
		newFact("birth", QBirthDate, 0, -72*time.Hour, fromPatient("birthDate"), text("1985-06-01")),
		newFact("height-1", QHeight, 175, -48*time.Hour),
		newFact("weight-1", QWeight, 70, -48*time.Hour),
	}
}

// without returns facts minus those whose key contains any of ids.
func without(facts []Fact, ids ...string) []Fact {
	var out []Fact
next:
	for _, f := range facts {
		for _, id := range ids {
			if strings.Contains(f.Key, id) {
				continue next
			}
		}
		out = append(out, f)
	}
	return out
}
