package consumer_test

import (
	"context"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/fhirmap"
)

// Times implausibly far in the future or past (a placeholder 9999-12-31, a
// broken clock's 1850) are refused at decode with the documented bounds
// (fhirmap.EarliestTime .. fhirmap.LatestTime, README "Input contract"),
// and they freeze nothing: the patient's sex and height arriving afterwards
// still complete the ventilatory ratio of the real blood gas, through the
// whole pipeline (NATS, the store, the relay).
func TestImplausibleTimesRefusedAndRecomputationGoesOn(t *testing.T) {
	h := newHarness(t)
	h.startReplica(nil)
	ref := patientRef(0)

	// A real blood gas with its ventilator readings, no patient data yet.
	first := append(ventMsgs(0, 0, 10*time.Minute), gasMsg(0, 0, 45, 1, "final"))
	h.publish(first)
	h.waitSettled(30 * time.Second)
	if vr := h.gasHeads(0, 0)[fhirmap.KindVentilatoryRatio]; !vr.refused ||
		(vr.reason != fhirmap.ReasonNoSex && vr.reason != fhirmap.ReasonNoHeight) {
		t.Fatalf("ventilatory ratio before sex and height: %+v, want refused no-sex or no-height", vr)
	}

	// Facts of the same patient at implausible times, each refused.
	far := time.Date(9999, 12, 31, 23, 59, 59, 0, time.UTC)
	past := time.Date(1850, 1, 1, 0, 0, 0, 0, time.UTC)
	poison := []testMsg{
		msgOf("fhir.input.lab", observation("t-0000-abg-far", ref, "2019-8", "mm[Hg]", 44, far, nil)),
		msgOf("fhir.input.adt", observation("t-0000-height-far", ref, "8302-2", "cm", 160, far, nil)),
		msgOf("fhir.input.device", observation("t-0000-ve-past", ref, "76008-2", "L/min", 9, past, nil)),
		msgOf("fhir.input.adt", map[string]any{"resourceType": "Patient", "id": "t-0000", "gender": "female", "birthDate": "9999-12-31"}),
	}
	for i := range poison {
		poison[i].poison = "bad-time"
	}
	h.publish(poison)
	h.waitSettled(30 * time.Second)
	rows, err := h.pool.Query(context.Background(), `SELECT reason, detail FROM dead_letter ORDER BY stream_seq`)
	if err != nil {
		t.Fatal(err)
	}
	var n int
	for rows.Next() {
		var reason, detail string
		if err := rows.Scan(&reason, &detail); err != nil {
			t.Fatal(err)
		}
		n++
		// The documented bounds, README "Input contract": 1900-01-01 .. 2100-01-01.
		if reason != "bad-time" || !strings.Contains(detail, "1900-01-01 .. 2100-01-01") {
			t.Errorf("dead letter %q %q, want bad-time naming the bounds 1900-01-01 .. 2100-01-01", reason, detail)
		}
	}
	rows.Close()
	if n != len(poison) {
		t.Errorf("%d dead letters, want %d", n, len(poison))
	}

	// Sex and height arrive: the ratio is derived.
	late := patientMsgs(0)
	h.publish(late)
	h.waitSettled(30 * time.Second)
	vr := h.gasHeads(0, 0)[fhirmap.KindVentilatoryRatio]
	if vr.refused {
		t.Fatalf("ventilatory ratio still refused after sex and height: %+v", vr)
	}
	// shared/reference/physiology.md §6 and §11 [derived]: man 175 cm (PBW
	// 70.566 kg), VE 10 L/min, PaCO2 45 mm[Hg] -> VR 1.7005.
	if math.Abs(vr.value-1.7005) > 0.00005 {
		t.Errorf("ventilatory ratio %v, want 1.7005 (physiology.md §6)", vr.value)
	}
	h.reconcile(append(append(first, poison...), late...))
}
