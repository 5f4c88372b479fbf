package consumer_test

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"net/http"
	"net/http/httptest"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// gasHeads returns the heads of one blood gas of patient i.
func (h *harness) gasHeads(i, j int) map[string]headState {
	prefix := patientRef(i) + "|Observation/" + gasID(i, j) + "|"
	out := map[string]headState{}
	for k, s := range h.heads() {
		if strings.HasPrefix(k, prefix) {
			out[strings.TrimPrefix(k, prefix)] = s
		}
	}
	if len(out) == 0 {
		var inbox, facts, heads, dead int
		_ = h.pool.QueryRow(context.Background(), `SELECT (SELECT count(*) FROM inbox), (SELECT count(*) FROM fact),
			(SELECT count(*) FROM head), (SELECT count(*) FROM dead_letter)`).Scan(&inbox, &facts, &heads, &dead)
		h.t.Fatalf("no derivation keys for %s (store: %d inputs, %d facts, %d heads, %d dead letters)", prefix, inbox, facts, heads, dead)
	}
	return out
}

// observations reads the published derived Observations of one blood gas.
func (h *harness) observations(i, j int) []map[string]any {
	var out []map[string]any
	for _, m := range h.readOutput() {
		if m.subject != h.cfg.ObservationSub {
			continue
		}
		var o map[string]any
		if err := json.Unmarshal(m.data, &o); err != nil {
			h.t.Fatal(err)
		}
		if strings.Contains(string(m.data), gasID(i, j)) {
			out = append(out, o)
		}
	}
	return out
}

// A ventilator reading that arrives after its blood gas completes it: the
// earlier refusal "no-ventilator-data-in-window" gives way to values.
func TestLateVentilatorReadingCompletesEarlierGas(t *testing.T) {
	h := newHarness(t)
	h.startReplica(nil)
	early := append(patientMsgs(0), gasMsg(0, 0, 45, 1, "final"))
	h.publish(early)
	h.waitSettled(30 * time.Second)
	before := h.gasHeads(0, 0)
	for kind, s := range before {
		if !s.refused {
			t.Errorf("%s derived without ventilator data: %+v", kind, s)
		}
	}
	if before[fhirmap.KindDeadSpaceVCO2].reason != "no-ventilator-data-in-window" && before[fhirmap.KindDeadSpaceVCO2].reason != "no-vco2" {
		t.Errorf("refusal before ventilator data: %+v", before[fhirmap.KindDeadSpaceVCO2])
	}

	late := ventMsgs(0, 0, 10*time.Minute)
	h.publish(late)
	h.waitSettled(30 * time.Second)
	after := h.gasHeads(0, 0)
	vdvt := after[fhirmap.KindDeadSpaceVCO2]
	if vdvt.refused {
		t.Fatalf("still refused after the late readings: %+v", vdvt)
	}
	// shared/reference/physiology.md §11 [derived]: VE 10 L/min, VCO2 200
	// mL/min, PaCO2 45 mm[Hg], K 0.863 -> VD/VT 0.61644 (to 5 digits).
	if math.Abs(vdvt.value-0.61644) > 0.000005 {
		t.Errorf("VD/VT %v, want 0.61644 (physiology.md §11)", vdvt.value)
	}
	h.reconcile(append(early, late...))
}

// An amended blood gas supersedes its derivations: new versions with status
// amended, computed from the new value, published.
func TestAmendedGasSupersedesDerivations(t *testing.T) {
	h := newHarness(t)
	h.startReplica(nil)
	msgs := generate(genOpts{patients: 1, gases: 1})
	h.publish(msgs)
	h.waitSettled(30 * time.Second)
	first := h.gasHeads(0, 0)[fhirmap.KindDeadSpaceVCO2]

	amended := gasMsg(0, 0, 50, 2, "amended")
	h.publish([]testMsg{amended})
	h.waitSettled(30 * time.Second)
	second := h.gasHeads(0, 0)[fhirmap.KindDeadSpaceVCO2]
	if second.status != "amended" || second.value <= first.value {
		t.Errorf("after amendment %+v (before %+v): want status amended and a higher VD/VT for a higher PaCO2", second, first)
	}
	// 1 - 0.863*200/(10*50) = 0.6548 [derived from physiology.md §2;
	// K = 0.863 (§1), tolerance 1e-4 covers K's fourth digit].
	if math.Abs(second.value-0.6548) > 1e-4 {
		t.Errorf("VD/VT %v after PaCO2 50, want 0.6548", second.value)
	}
	var versions int
	if err := h.pool.QueryRow(context.Background(),
		`SELECT max(version) FROM derivation WHERE key LIKE '%|deadspace-fraction-vco2' AND supersedes_id IS NOT NULL`).Scan(&versions); err != nil {
		t.Fatal(err)
	}
	if versions != 2 {
		t.Errorf("latest version %d, want 2 superseding 1", versions)
	}
	var amendedPublished bool
	for _, o := range h.observations(0, 0) {
		if o["status"] == "amended" {
			amendedPublished = true
		}
	}
	if !amendedPublished {
		t.Error("no amended Observation was published")
	}
	h.reconcile(append(msgs, amended))
}

// A blood gas entered in error retracts everything derived from it.
func TestEnteredInErrorRetractsDerivations(t *testing.T) {
	h := newHarness(t)
	h.startReplica(nil)
	msgs := generate(genOpts{patients: 1, gases: 1})
	h.publish(msgs)
	h.waitSettled(30 * time.Second)
	valid := 0
	for _, s := range h.gasHeads(0, 0) {
		if !s.refused {
			valid++
		}
	}
	if valid == 0 {
		t.Fatal("nothing derived before the retraction")
	}

	eie := gasMsg(0, 0, 45, 2, "entered-in-error")
	h.publish([]testMsg{eie})
	h.waitSettled(30 * time.Second)
	for kind, s := range h.gasHeads(0, 0) {
		if !s.refused && s.status != string(fhirmap.StatusEnteredInError) {
			t.Errorf("%s still valid after the blood gas was entered in error: %+v", kind, s)
		}
	}
	retracted := 0
	for _, o := range h.observations(0, 0) {
		if o["status"] == "entered-in-error" {
			retracted++
		}
	}
	if retracted != valid {
		t.Errorf("%d retractions published, want %d (one per value published)", retracted, valid)
	}
	h.reconcile(append(msgs, eie))
}

// The same inputs in two different orders give the same final state.
func TestArrivalOrderIndependence(t *testing.T) {
	msgs := generate(genOpts{patients: 3, gases: 2})
	var states []map[string]headState
	for _, seed := range []uint64{1, 2} {
		h := newHarness(t)
		h.startReplica(nil)
		h.startReplica(nil)
		h.publish(shuffled(msgs, seed))
		h.waitSettled(60 * time.Second)
		h.reconcile(msgs)
		states = append(states, h.heads())
	}
	if len(states[0]) != len(states[1]) {
		t.Fatalf("%d keys vs %d keys", len(states[0]), len(states[1]))
	}
	for k, a := range states[0] {
		b := states[1][k]
		if a.refused != b.refused || a.reason != b.reason || math.Abs(a.value-b.value) > 1e-12 {
			t.Errorf("%s: %+v vs %+v", k, a, b)
		}
	}
}

// A Bundle whose entries are identified by fullUrl only (urn:uuid, no
// resource id: valid FHIR R4) is recorded and derived like any other input.
func TestBundleEntriesIdentifiedByFullURL(t *testing.T) {
	h := newHarness(t)
	h.startReplica(nil)
	ref := patientRef(0)
	var entries []any
	add := func(uuid string, o map[string]any) {
		delete(o, "id")
		entries = append(entries, map[string]any{"fullUrl": "urn:uuid:" + uuid, "resource": o})
	}
	at := gasTime(0)
	add("0b0c6f1e-4a53-4c39-9a55-3d2b9a0e0001", observation("x", ref, "76008-2", "L/min", 10, at.Add(-5*time.Minute), nil))
	add("0b0c6f1e-4a53-4c39-9a55-3d2b9a0e0002", observation("x", ref, "60825-7", "mL/min", 200, at.Add(-5*time.Minute), nil))
	add("0b0c6f1e-4a53-4c39-9a55-3d2b9a0e0003", observation("x", ref, "2019-8", "mm[Hg]", 45, at, nil))
	bundle := msgOf("fhir.input.lab", map[string]any{"resourceType": "Bundle", "type": "collection", "entry": entries})
	msgs := append(patientMsgs(0), bundle)
	h.publish(msgs)
	h.waitSettled(30 * time.Second)
	var dead int
	if err := h.pool.QueryRow(context.Background(), `SELECT count(*) FROM dead_letter`).Scan(&dead); err != nil {
		t.Fatal(err)
	}
	if dead != 0 {
		t.Fatalf("%d dead letters for a valid Bundle", dead)
	}
	h.reconcile(msgs)
	found := false
	for k, s := range h.heads() {
		if strings.HasSuffix(k, "|"+fhirmap.KindDeadSpaceVCO2) && !s.refused {
			found = true
			// physiology.md §11 [derived]: 0.61644.
			if math.Abs(s.value-0.61644) > 0.000005 {
				t.Errorf("VD/VT %v, want 0.61644", s.value)
			}
		}
	}
	if !found {
		t.Error("no dead-space fraction derived from the Bundle")
	}
}

// The operations endpoints: liveness, readiness and Prometheus metrics that
// count what happened (by outcome, kind and reason, never by patient).
func TestHealthAndMetricsEndpoints(t *testing.T) {
	h := newHarness(t)
	reg := prometheus.NewRegistry()
	h.metrics = consumer.NewMetrics(reg)
	r := h.startReplica(nil)
	msgs := append(generate(genOpts{patients: 1, gases: 1}), poisonMsgs()[:2]...)
	h.publish(msgs)
	h.waitSettled(30 * time.Second)

	srv := httptest.NewServer(r.p.Handler(reg))
	defer srv.Close()
	get := func(path string) (int, string) {
		resp, err := http.Get(srv.URL + path)
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		b, _ := io.ReadAll(resp.Body)
		return resp.StatusCode, string(b)
	}
	if code, _ := get("/healthz"); code != http.StatusOK {
		t.Errorf("/healthz %d", code)
	}
	if code, body := get("/readyz"); code != http.StatusOK {
		t.Errorf("/readyz %d %s", code, body)
	}
	_, body := get("/metrics")
	good := len(msgs) - 2
	for _, want := range []string{
		fmt.Sprintf(`ventderive_inputs_total{outcome="accepted"} %d`, good),
		`ventderive_inputs_total{outcome="dead-letter"} 2`,
		`ventderive_dead_letters_total{reason="malformed-json"} 2`,
		`ventderive_derived_total{kind="deadspace-fraction-vco2"} 1`,
		`ventderive_outbox_backlog 0`,
		`ventderive_input_latency_seconds_count`,
	} {
		if !strings.Contains(body, want) {
			t.Errorf("/metrics lacks %q", want)
		}
	}
	if strings.Contains(body, "Patient/") || strings.Contains(body, "t-0000") {
		t.Error("/metrics carries a patient identifier")
	}
}

// A blood gas whose corrected version names another patient (the sample
// was labelled with the wrong patient) moves: the first patient's values
// from it are withdrawn and the second patient's are derived.
func TestBloodGasMovedToAnotherPatient(t *testing.T) {
	h := newHarness(t)
	h.startReplica(nil)
	msgs := generate(genOpts{patients: 2, gases: 1})
	h.publish(msgs)
	h.waitSettled(30 * time.Second)
	if s := h.gasHeads(0, 0)[fhirmap.KindDeadSpaceVCO2]; s.refused {
		t.Fatalf("patient 0 not derived before the move: %+v", s)
	}

	// Version 2 of patient 0's blood gas, now naming patient 1, at patient
	// 1's ventilator data (same time, same id).
	moved := observation(gasID(0, 0), patientRef(1), "2019-8", "mm[Hg]", 47, gasTime(0),
		map[string]any{"status": "corrected", "meta": map[string]any{"versionId": "2"}})
	msg := msgOf("fhir.input.lab", moved)
	h.publish([]testMsg{msg})
	h.waitSettled(30 * time.Second)

	for kind, s := range h.gasHeads(0, 0) {
		if !s.refused && s.status != string(fhirmap.StatusEnteredInError) {
			t.Errorf("patient 0 keeps %s from a blood gas that is no longer theirs: %+v", kind, s)
		}
	}
	prefix := patientRef(1) + "|Observation/" + gasID(0, 0) + "|"
	found := false
	for k, s := range h.heads() {
		if k == prefix+fhirmap.KindDeadSpaceVCO2 {
			found = !s.refused
		}
	}
	if !found {
		t.Error("patient 1 has no dead-space fraction from the moved blood gas")
	}
	h.reconcile(append(msgs, msg))
}

// The pipeline decodes a pull's messages in several decoders at once, but
// a lane must still see one patient's messages in stream order (a blood
// gas dealt ahead of the readings published before it would be derived
// from part of them and amended at once). The first message's decode is
// held back; every message of the one patient (one lane) must still reach
// the store in stream order.
func TestDecodersKeepStreamOrder(t *testing.T) {
	h := newHarness(t)
	var mu sync.Mutex
	var seen []uint64
	h.startReplica(&consumer.Hooks{
		BeforeDecode: func(seq uint64) {
			if seq == 1 {
				time.Sleep(100 * time.Millisecond)
			}
		},
		BeforeIngest: func(seq uint64) {
			mu.Lock()
			seen = append(seen, seq)
			mu.Unlock()
		},
	})
	msgs := generate(genOpts{patients: 1, gases: 1})
	h.publish(msgs)
	h.waitSettled(30 * time.Second)
	mu.Lock()
	defer mu.Unlock()
	if len(seen) < len(msgs) {
		t.Fatalf("%d messages reached the store, want at least %d", len(seen), len(msgs))
	}
	if !slices.IsSorted(seen[:len(msgs)]) {
		t.Errorf("one patient's messages reached the store out of stream order: %v", seen)
	}
}
