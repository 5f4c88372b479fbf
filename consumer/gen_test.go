package consumer_test

import (
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"math/rand/v2"
	"time"
)

// Synthetic input for the pipeline tests. The values are not clinical
// data: they are built around the end-to-end vector of
// shared/reference/physiology.md §11 (VE 10 L/min, PaCO2 45 mm[Hg], VCO2
// 200 mL/min, PETCO2 35 mm[Hg], man 175 cm) with small deterministic
// variation, so that every derivation has inputs and the expected results
// come from the offline derivation of the same inputs.

const (
	loinc = "http://loinc.org"
	ucum  = "http://unitsofmeasure.org"
)

var genStart = time.Date(2026, 3, 2, 6, 0, 0, 0, time.UTC)

type genOpts struct {
	patients  int
	gases     int // blood gases per patient, two hours apart
	ventEvery time.Duration
}

func patientRef(i int) string { return fmt.Sprintf("Patient/t-%04d", i) }

func observation(id, patient, code, unit string, value float64, at time.Time, extra map[string]any) map[string]any {
	o := map[string]any{
		"resourceType":      "Observation",
		"id":                id,
		"status":            "final",
		"code":              map[string]any{"coding": []any{map[string]any{"system": loinc, "code": code}}},
		"subject":           map[string]any{"reference": patient},
		"effectiveDateTime": at.Format(time.RFC3339),
		"valueQuantity":     map[string]any{"value": value, "unit": unit, "system": ucum, "code": unit},
	}
	for k, v := range extra {
		o[k] = v
	}
	return o
}

func msgOf(subject string, resource map[string]any) testMsg {
	b := mustJSON(resource)
	return testMsg{subject: subject, msgID: inboxKey(b)[:32], payload: b}
}

func inboxKey(b []byte) string {
	s := sha256.Sum256(b)
	return hex.EncodeToString(s[:])
}

// patientMsgs are a patient's demographic and body-size inputs.
func patientMsgs(i int) []testMsg {
	ref := patientRef(i)
	id := ref[len("Patient/"):]
	return []testMsg{
		msgOf("fhir.input.adt", map[string]any{
			"resourceType": "Patient", "id": id, "gender": "male", "birthDate": "1986-01-15",
		}),
		msgOf("fhir.input.adt", observation(id+"-height", ref, "8302-2", "cm", 175, genStart.Add(-time.Hour), nil)),
		msgOf("fhir.input.adt", observation(id+"-weight", ref, "29463-7", "kg", 70, genStart.Add(-time.Hour), nil)),
	}
}

// gasTime is the time of patient i's blood gas j.
func gasTime(j int) time.Time { return genStart.Add(time.Duration(j) * 2 * time.Hour) }

// ventMsgs are the ventilator readings around blood gas j of patient i.
func ventMsgs(i, j int, every time.Duration) []testMsg {
	ref := patientRef(i)
	t := gasTime(j)
	var out []testMsg
	for k, at := 0, t.Add(-25*time.Minute); !at.After(t.Add(5 * time.Minute)); k, at = k+1, at.Add(every) {
		// The reading nearest the gas (offset 0 or -5 min) carries the
		// reference vector exactly for patient 0, gas 0.
		w := float64((i+j+k)%5) * 0.1
		if i == 0 && j == 0 {
			w = 0
		}
		id := fmt.Sprintf("t-%04d-v%02d-%02d", i, j, k)
		out = append(out,
			msgOf("fhir.input.device", observation(id+"-ve", ref, "76008-2", "L/min", 10+w, at, nil)),
			msgOf("fhir.input.device", observation(id+"-vt", ref, "76222-9", "mL", 500+10*w, at, nil)),
			msgOf("fhir.input.device", observation(id+"-rr", ref, "19840-8", "/min", 20, at, nil)),
			msgOf("fhir.input.device", observation(id+"-etco2", ref, "19891-1", "mm[Hg]", 35+w, at, nil)),
			msgOf("fhir.input.device", observation(id+"-vco2", ref, "60825-7", "mL/min", 200+10*w, at, nil)),
		)
	}
	return out
}

// gasID is the Observation id of patient i's blood gas j.
func gasID(i, j int) string { return fmt.Sprintf("t-%04d-abg-%02d", i, j) }

func gasMsg(i, j int, paco2 float64, version int, status string) testMsg {
	extra := map[string]any{"status": status}
	if version > 1 {
		extra["meta"] = map[string]any{"versionId": fmt.Sprint(version)}
	}
	return msgOf("fhir.input.lab", observation(gasID(i, j), patientRef(i), "2019-8", "mm[Hg]", paco2, gasTime(j), extra))
}

func gasValue(i, j int) float64 {
	if i == 0 && j == 0 {
		return 45
	}
	return 40 + float64(i%7) + 0.5*float64(j)
}

// generate builds every input of a run: patients, then for each blood gas
// its ventilator readings and the gas itself, in a natural order.
func generate(o genOpts) []testMsg {
	if o.ventEvery == 0 {
		o.ventEvery = 10 * time.Minute
	}
	var out []testMsg
	for i := range o.patients {
		out = append(out, patientMsgs(i)...)
		for j := range o.gases {
			out = append(out, ventMsgs(i, j, o.ventEvery)...)
			out = append(out, gasMsg(i, j, gasValue(i, j), 1, "final"))
		}
	}
	return out
}

// shuffled returns a copy of msgs in a random order fixed by seed.
func shuffled(msgs []testMsg, seed uint64) []testMsg {
	out := append([]testMsg(nil), msgs...)
	r := rand.New(rand.NewPCG(seed, seed^0x9e3779b97f4a7c15))
	r.Shuffle(len(out), func(a, b int) { out[a], out[b] = out[b], out[a] })
	return out
}

// poisonMsgs are inputs that can never succeed, one per reason.
func poisonMsgs() []testMsg {
	ref := patientRef(900)
	noSubject := observation("t-bad-nosubject", ref, "2019-8", "mm[Hg]", 40, genStart, nil)
	delete(noSubject, "subject")
	badUnit := observation("t-bad-unit", ref, "2019-8", "mm[Hg]", 40, genStart, nil)
	badUnit["valueQuantity"] = map[string]any{"value": 40, "unit": "furlong", "system": ucum, "code": "[fur_us]"}
	return []testMsg{
		{subject: "fhir.input.lab", payload: []byte(`{"resourceType":"Observation","id":"t-bad-json",`), poison: "malformed-json"},
		{subject: "fhir.input.lab", payload: []byte(`{"resourceType":"Observation","id":"t-bad-nan","valueQuantity":{"value":NaN}}`), poison: "malformed-json"},
		{subject: "fhir.input.lab", payload: mustJSON(map[string]any{"resourceType": "Medication", "id": "t-bad-type"}), poison: "wrong-resource-type"},
		{subject: "fhir.input.lab", payload: mustJSON(noSubject), poison: "missing-field"},
		{subject: "fhir.input.lab", payload: mustJSON(badUnit), poison: "unknown-unit"},
	}
}
