package consumer_test

import (
	"math"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
)

// goalMsg is a FHIR R4 Goal of patient i (invented) whose target is arterial
// PaCO2 (LOINC 2019-8) in the range lo-hi mm[Hg], with the given
// lifecycleStatus and meta.versionId.
func goalMsg(i int, version int, lifecycle string, lo, hi float64) testMsg {
	ref := patientRef(i)
	return msgOf("fhir.input.adt", map[string]any{
		"resourceType":    "Goal",
		"id":              ref[len("Patient/"):] + "-paco2-goal",
		"meta":            map[string]any{"versionId": string(rune('0' + version))},
		"lifecycleStatus": lifecycle,
		"description":     map[string]any{"text": "PaCO2 goal while ventilated"},
		"subject":         map[string]any{"reference": ref},
		"startDate":       genStart.Add(-24 * time.Hour).Format("2006-01-02"),
		"target": []any{map[string]any{
			"measure": map[string]any{"coding": []any{map[string]any{"system": loinc, "code": "2019-8"}}},
			"detailRange": map[string]any{
				"low":  map[string]any{"value": lo, "unit": "mmHg", "system": ucum, "code": "mm[Hg]"},
				"high": map[string]any{"value": hi, "unit": "mmHg", "system": ucum, "code": "mm[Hg]"},
			},
		}},
	})
}

// circuitMsg is an Observation of the apparatus dead space of patient i's
// circuit (mL), with the site alias code of circuitAlias.
func circuitMsg(i int, ml float64, at time.Time) testMsg {
	ref := patientRef(i)
	o := observation(ref[len("Patient/"):]+"-circuit", ref, "", "mL", ml, at, map[string]any{
		"code": map[string]any{"coding": []any{map[string]any{"system": "https://larkspur-general.example/fhir/resp-codes", "code": "CIRCUIT-VD"}}},
	})
	return msgOf("fhir.input.device", o)
}

const circuitAlias = `{"system":"https://larkspur-general.example/fhir/resp-codes","code":"CIRCUIT-VD","quantity":"apparatus-dead-space"}`

// The apparatus dead space recorded for a patient's circuit gives the same
// final state before or after the blood gases (it is a standing, patient-level
// fact of the store), and is preferred over the site's 50 mL: the predicted
// PaCO2 of patient 0's first gas is K x VCO2 / ((VT - 2.2 x PBW - VDapp) x
// RR) = 0.863 x 200 / ((500 - 155.2 - 100) x 20 / 1000) = 35.26 mmHg with
// 100 mL (alveolar ventilation equation [published]; Radford 1955
// [published]; PBW men 50 + 0.91 x (175 - 152.4) kg, ARDS Network 2000
// [published]).
func TestCircuitDeadSpaceArrivalOrder(t *testing.T) {
	codes, err := fhirmap.DefaultCodes().WithAliases(strings.NewReader(circuitAlias))
	if err != nil {
		t.Fatal(err)
	}
	base := generate(genOpts{patients: 1, gases: 2})
	circuit := circuitMsg(0, 100, genStart.Add(-2*time.Hour))
	states := statesInEachOrder(t, [][]testMsg{append([]testMsg{circuit}, base...), append(append([]testMsg(nil), base...), circuit)},
		func(h *harness) { h.codes = codes })
	pbw := 50 + 0.91*(175-152.4)
	// Default anatomic model, tracheal tube: 0.43 mL per lb PBW (Nunn,
	// Campbell & Peckett, J Appl Physiol 1959;14:174-6 [published]).
	want := 0.760 * (273 + 37) / 273 * 200 / ((500 - 0.43/0.45359237*pbw - 100) * 20 / 1000)
	if s, ok := firstGasHead(t, states[0], fhirmap.KindPredictedPaCO2); ok && (s.refused || math.Abs(s.value-want) > 1e-6) {
		t.Errorf("predicted PaCO2 %+v, want %.3f mmHg", s, want)
	}
}

// A patient's PaCO2 Goal gives the same final state whether it arrives
// before or after the blood gases (a new Goal reopens the patient's recent
// blood gases, as height or sex do), and its withdrawal returns the values
// for a target to the site's target whatever the order of the versions. The
// expected state is the offline derivation of the same inputs; the rate for
// the target of patient 0's first gas is RR x PaCO2 / target = 20 x 45 / 50
// = 18.0 /min at the goal's midpoint and 22.5 /min at the site's 40 mm[Hg]
// (alveolar ventilation equation at constant VCO2, physiology.md s9
// [derived]).
func TestGoalArrivalOrder(t *testing.T) {
	base := generate(genOpts{patients: 1, gases: 2})
	active := goalMsg(0, 1, "active", 45, 55)
	cancelled := goalMsg(0, 2, "cancelled", 45, 55)
	for _, c := range []struct {
		name   string
		orders [][]testMsg
		wantRR float64
	}{
		{"goal_before_or_after_the_gases", [][]testMsg{
			append([]testMsg{active}, base...),
			append(append([]testMsg(nil), base...), active),
		}, 18.0},
		{"withdrawn_goal_either_order", [][]testMsg{
			append(append([]testMsg{active}, base...), cancelled),
			append(append([]testMsg{cancelled}, base...), active),
		}, 22.5},
	} {
		t.Run(c.name, func(t *testing.T) {
			states := statesInEachOrder(t, c.orders, func(h *harness) { h.site.TargetPaCO2mmHg = 40 })
			if s, ok := firstGasHead(t, states[0], fhirmap.KindRateForTarget); ok && (s.refused || math.Abs(s.value-c.wantRR) > 1e-9) {
				t.Errorf("rate for target %+v, want %v /min", s, c.wantRR)
			}
		})
	}
}

const airwayAlias = `{"system":"https://larkspur-general.example/fhir/resp-codes","code":"AIRWAY","quantity":"airway"}`

// airwayMsg is an Observation of patient i's airway (site alias code of
// airwayAlias) whose value is the SNOMED CT endotracheal tube (26412008) or
// the service's own whole-airway code.
func airwayMsg(i int, id string, tube bool, at time.Time) testMsg {
	ref := patientRef(i)
	value := map[string]any{"system": "http://snomed.info/sct", "code": "26412008", "display": "Endotracheal tube"}
	if !tube {
		value = map[string]any{"system": fhirmap.DefaultCodeSystemURL, "code": "whole-airway"}
	}
	o := observation(ref[len("Patient/"):]+"-"+id, ref, "", "", 0, at, map[string]any{
		"code":                 map[string]any{"coding": []any{map[string]any{"system": "https://larkspur-general.example/fhir/resp-codes", "code": "AIRWAY"}}},
		"valueCodeableConcept": map[string]any{"coding": []any{value}},
	})
	delete(o, "valueQuantity")
	return msgOf("fhir.input.adt", o)
}

// The patient's recorded airway gives the same final state whatever the
// order in which it and the blood gases arrive (it is a standing,
// patient-level fact of the store): a tracheal tube charted 5 h before the
// gases and a mask (whole airway) charted 2 h before them, in either order
// before or after the gases, leave the mask in force, preferred over the
// site's artificial-airway model. The predicted PaCO2 of patient 0's first
// gas is then K x VCO2 / ((VT - 2.2 mL/kg x PBW - VDapp) x RR) = 0.863 x 200
// / ((500 - 155.2 - 50) x 20 / 1000) = 29.28 mmHg (alveolar ventilation
// equation [published]; Radford, J Appl Physiol 1955, 2.2 mL/kg whole
// airway [published]; PBW men 50 + 0.91 x (175 - 152.4) kg, ARDS Network
// 2000 [published]) instead of the 22.53 mmHg of the site's tube model
// (0.43 mL per lb, Nunn, Campbell & Peckett 1959 [published]).
func TestAirwayArrivalOrder(t *testing.T) {
	codes, err := fhirmap.DefaultCodes().WithAliases(strings.NewReader(airwayAlias))
	if err != nil {
		t.Fatal(err)
	}
	base := generate(genOpts{patients: 1, gases: 2})
	tube := airwayMsg(0, "airway-tube", true, genStart.Add(-5*time.Hour))
	mask := airwayMsg(0, "airway-mask", false, genStart.Add(-2*time.Hour))
	states := statesInEachOrder(t, [][]testMsg{
		append([]testMsg{tube, mask}, base...),
		append(append([]testMsg(nil), base...), mask, tube),
	}, func(h *harness) {
		h.codes = codes
		if h.site.AnatomicDeadSpace != physio.AnatomicArtificialAirway || h.site.ApparatusDeadSpaceML != 50 {
			t.Fatalf("harness site %v, %v mL: the expected value assumes the artificial-airway model and 50 mL", h.site.AnatomicDeadSpace, h.site.ApparatusDeadSpaceML)
		}
	})
	pbw := 50 + 0.91*(175-152.4)
	want := 0.760 * (273 + 37) / 273 * 200 / ((500 - 2.2*pbw - 50) * 20 / 1000)
	if s, ok := firstGasHead(t, states[0], fhirmap.KindPredictedPaCO2); ok && (s.refused || math.Abs(s.value-want) > 1e-6 || math.Abs(s.value-29.28) > 0.005) {
		t.Errorf("predicted PaCO2 %+v, want %.3f mmHg", s, want)
	}
}

// statesInEachOrder publishes each order of messages, one at a time (the
// order is the test), to a fresh harness prepared by setup, reconciles it,
// and fails unless every order ends in the same heads; it returns the heads
// of each order.
func statesInEachOrder(t *testing.T, orders [][]testMsg, setup func(*harness)) []map[string]headState {
	t.Helper()
	var states []map[string]headState
	for _, msgs := range orders {
		h := newHarness(t)
		setup(h)
		h.startReplica(nil)
		for _, m := range msgs {
			h.publish([]testMsg{m})
			h.waitSettled(30 * time.Second)
		}
		h.reconcile(msgs)
		states = append(states, h.heads())
	}
	for _, other := range states[1:] {
		if len(other) != len(states[0]) {
			t.Errorf("%d heads in one order, %d in another", len(states[0]), len(other))
		}
		for k, a := range states[0] {
			b := other[k]
			if a.refused != b.refused || a.reason != b.reason || math.Abs(a.value-b.value) > 1e-12 {
				t.Errorf("%s: %+v vs %+v", k, a, b)
			}
		}
	}
	return states
}

// firstGasHead returns the head of kind for patient 0's first blood gas,
// failing the test when there is none.
func firstGasHead(t *testing.T, heads map[string]headState, kind string) (headState, bool) {
	t.Helper()
	for k, s := range heads {
		if strings.Contains(k, "|Observation/"+gasID(0, 0)+"|") && strings.HasSuffix(k, "|"+kind) {
			return s, true
		}
	}
	t.Errorf("no %s of the first blood gas", kind)
	return headState{}, false
}
