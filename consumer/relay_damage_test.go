package consumer_test

import (
	"context"
	"crypto/sha256"
	"encoding/json"
	"fmt"
	"io"
	"net/http/httptest"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/prometheus/client_golang/prometheus"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/rawcodec"
)

// invented is an invented Observation body for a hand-written outbox row.
func invented(id string) []byte {
	return []byte(fmt.Sprintf(`{"resourceType":"Observation","id":%q,"status":"final"}`, id))
}

// insertRow stores one outbox row as the writer would (a frame with the
// SHA-256 and size of payload beside it; frame nil: payload plain) and
// returns its seq.
func insertRow(t *testing.T, ctx context.Context, tx pgx.Tx, msgID string, frame, payload []byte) int64 {
	t.Helper()
	var sum []byte
	var size any
	stored := payload
	if frame != nil {
		s := sha256.Sum256(payload)
		sum, size, stored = s[:], len(payload), frame
	}
	var seq int64
	if err := tx.QueryRow(ctx, `INSERT INTO outbox (subject, msg_id, headers, stored_payload, payload_sha256, payload_size, inbox_key, created_at)
		SELECT $1, $2, '{}'::jsonb, $3, $4, $5, inbox_key, now() FROM inbox ORDER BY inbox_key LIMIT 1 RETURNING seq`,
		consumer.DefaultObservationSub, msgID, stored, sum, size).Scan(&seq); err != nil {
		t.Fatal(err)
	}
	return seq
}

func (h *harness) unpublished() []int64 {
	h.t.Helper()
	var left []int64
	if err := h.pool.QueryRow(context.Background(), `SELECT coalesce(array_agg(seq ORDER BY seq), '{}') FROM outbox WHERE published_at IS NULL`).Scan(&left); err != nil {
		h.t.Fatal(err)
	}
	return left
}

func (h *harness) waitFor(what string, timeout time.Duration, ok func() bool) {
	h.t.Helper()
	deadline := time.Now().Add(timeout)
	for !ok() {
		if time.Now().After(deadline) {
			h.t.Fatalf("not within %s: %s", timeout, what)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// One damaged outbox row (a frame that does not decode) among more than a
// relay page of good rows: the relay publishes every other row, holds the
// later versions of the damaged row's derivation (also one on a later
// page), and keeps the damaged row unpublished and visible: one log line
// with its seq, ventderive_outbox_damaged 1 and ventderive_outbox_held 2,
// /readyz 200 "degraded" naming the count and seq, while the relay is not
// reported failing and the replica stays ready; new input is still
// published. Once the row is repaired the three versions go out, in order,
// and the report clears.
func TestRelayDamagedRowIsVisibleAndStallsNothingElse(t *testing.T) {
	h := newHarness(t)
	h.cfg.FailingAfter = time.Second
	reg := prometheus.NewRegistry()
	h.metrics = consumer.NewMetrics(reg)
	r := h.startReplica(nil)
	h.publish(generate(genOpts{patients: 1, gases: 1}))
	h.waitSettled(60 * time.Second)
	ctx := context.Background()

	good := func(id string) []byte { return rawcodec.Outbox().Encode(invented(id)) }
	damaged := append(append([]byte(nil), rawcodec.Magic...), 0x00, 0x11, 0x22, 0x33, 0x44, 0x55, 0x66)
	tx, err := h.pool.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	a1 := insertRow(t, ctx, tx, "Observation/dmg-a/_history/1", damaged, invented("dmg-a-1"))
	a2 := insertRow(t, ctx, tx, "Observation/dmg-a/_history/2", good("dmg-a-2"), invented("dmg-a-2"))
	if _, err := tx.Exec(ctx, `INSERT INTO outbox (subject, msg_id, headers, stored_payload, inbox_key, created_at)
		SELECT $1, 'Observation/fill-' || i || '/_history/1', '{}'::jsonb,
		       convert_to('{"resourceType":"Observation","id":"fill-' || i || '"}', 'UTF8'), k.inbox_key, now()
		FROM generate_series(1, 300) i, (SELECT inbox_key FROM inbox ORDER BY inbox_key LIMIT 1) k`, consumer.DefaultObservationSub); err != nil {
		t.Fatal(err)
	}
	a3 := insertRow(t, ctx, tx, "Observation/dmg-a/_history/3", good("dmg-a-3"), invented("dmg-a-3"))
	insertRow(t, ctx, tx, "Observation/dmg-b/_history/1", good("dmg-b-1"), invented("dmg-b-1"))
	if err := tx.Commit(ctx); err != nil {
		t.Fatal(err)
	}
	if a3-a1 <= 256 {
		t.Fatalf("version 3 (seq %d) is on the damaged row's page (seq %d)", a3, a1)
	}
	held := []int64{a1, a2, a3}
	h.waitFor("only the damaged derivation left unpublished", 60*time.Second, func() bool { return slices.Equal(h.unpublished(), held) })
	h.waitFor("ventderive_outbox_damaged 1 and ventderive_outbox_held 2", 10*time.Second, func() bool {
		return metricValue(t, h.metrics.OutboxDamaged) == 1 && metricValue(t, h.metrics.OutboxHeld) == 2
	})
	out := map[string]string{}
	for _, m := range h.readOutput() {
		out[m.msgID] = string(m.data)
	}
	for _, id := range []string{"Observation/dmg-a/_history/1", "Observation/dmg-a/_history/2", "Observation/dmg-a/_history/3"} {
		if _, ok := out[id]; ok {
			t.Errorf("%s published while version 1 is damaged", id)
		}
	}
	if out["Observation/dmg-b/_history/1"] != string(invented("dmg-b-1")) || out["Observation/fill-300/_history/1"] == "" {
		t.Errorf("the rows behind the damaged one were not all published with their bytes")
	}

	time.Sleep(2 * h.cfg.FailingAfter) // many passes, each meeting the row again
	if got := r.p.Ready(ctx); len(got) != 0 {
		t.Errorf("readiness %v: a damaged row must not make the replica unready", got)
	}
	if metricValue(t, h.metrics.RelayFailing) != 0 {
		t.Error("ventderive_relay_failing is 1: damage backs the relay off for every row")
	}
	deg := r.p.Degraded()["outbox"]
	if !strings.Contains(deg, "1 outbox row(s) not published: stored payload damaged") || !strings.Contains(deg, fmt.Sprintf("seq %d;", a1)) ||
		!strings.Contains(deg, "2 later version(s) held") {
		t.Errorf("degraded reason %q, want the count, seq %d and the 2 held versions", deg, a1)
	}
	if n := strings.Count(h.logs.String(), `"msg":"outbox row not published: stored payload damaged"`); n != 1 ||
		!strings.Contains(h.logs.String(), fmt.Sprintf(`"seq":%d`, a1)) {
		t.Errorf("%d log lines for the damaged row, want 1 with its seq", n)
	}
	srv := httptest.NewServer(r.p.Handler(reg))
	defer srv.Close()
	resp, err := srv.Client().Get(srv.URL + "/readyz")
	if err != nil {
		t.Fatal(err)
	}
	var body struct {
		Status   string
		Degraded map[string]string
	}
	if err := json.NewDecoder(resp.Body).Decode(&body); err != nil || resp.StatusCode != 200 || body.Status != "degraded" || body.Degraded["outbox"] != deg {
		t.Errorf("/readyz %d %+v (%v), want 200 degraded with the outbox reason", resp.StatusCode, body, err)
	}
	resp.Body.Close()
	resp, err = srv.Client().Get(srv.URL + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	text, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if !strings.Contains(string(text), "\nventderive_outbox_damaged 1\n") {
		t.Error("/metrics lacks ventderive_outbox_damaged 1")
	}

	// New input is still published.
	before := len(h.readOutput())
	h.publish(generate(genOpts{patients: 2, gases: 1}))
	h.waitFor("the new input's outputs published", 30*time.Second, func() bool {
		return len(h.readOutput()) > before && slices.Equal(h.unpublished(), held)
	})

	// The repair: the row's frame as the writer made it.
	if _, err := h.pool.Exec(ctx, `UPDATE outbox SET stored_payload = $2 WHERE seq = $1`, a1, good("dmg-a-1")); err != nil {
		t.Fatal(err)
	}
	h.waitFor("the repaired derivation published", 30*time.Second, func() bool { return len(h.unpublished()) == 0 })
	var order []string
	for _, m := range h.readOutput() {
		if strings.HasPrefix(m.msgID, "Observation/dmg-a/") {
			order = append(order, m.msgID)
		}
	}
	if !slices.Equal(order, []string{"Observation/dmg-a/_history/1", "Observation/dmg-a/_history/2", "Observation/dmg-a/_history/3"}) {
		t.Errorf("the repaired derivation went out as %v, want versions 1, 2, 3 in order", order)
	}
	h.waitFor("the damage report cleared", 10*time.Second, func() bool {
		return metricValue(t, h.metrics.OutboxDamaged) == 0 && len(r.p.Degraded()) == 0
	})
	h.waitLog("outbox row no longer found damaged", 5*time.Second)
	assertNoPHI(t, h.logs.String())
}

// raw_dictionary cannot be read at all (here: renamed away) while a row
// waits whose frame needs a stored dictionary (a newer replica's): that
// row is not judged damaged, the relay reports the failure (relay failing,
// /readyz "relay" naming the read after FailingAfter), retries with
// back-off, and publishes every row that needs no stored dictionary; the
// replica keeps running. Once the table is back the row is published.
func TestRelayUnreadableDictionariesFailVisibly(t *testing.T) {
	h := newHarness(t)
	h.cfg.FailingAfter = time.Second
	h.metrics = consumer.NewMetrics(prometheus.NewRegistry())
	r := h.startReplica(nil)
	h.publish(generate(genOpts{patients: 1, gases: 1}))
	h.waitSettled(60 * time.Second)
	ctx := context.Background()

	var samples [][]byte
	for _, m := range h.readOutput() {
		samples = append(samples, m.data)
	}
	for len(samples) < 8 {
		samples = append(samples, samples...)
	}
	const newer = 0x6f75_7405
	d, err := rawcodec.Train(samples, newer, 4<<10)
	if err != nil {
		t.Fatal(err)
	}
	c, err := rawcodec.New(d)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := h.pool.Exec(ctx, `INSERT INTO raw_dictionary (id, kind, dictionary) VALUES ($1, 'outbox', $2)`, int64(newer), d); err != nil {
		t.Fatal(err)
	}
	if _, err := h.pool.Exec(ctx, `ALTER TABLE raw_dictionary RENAME TO raw_dictionary_away`); err != nil {
		t.Fatal(err)
	}
	tx, err := h.pool.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	n1 := insertRow(t, ctx, tx, "Observation/newer-a/_history/1", c.Encode(invented("newer-a")), invented("newer-a"))
	insertRow(t, ctx, tx, "Observation/plain-b/_history/1", nil, invented("plain-b"))
	if err := tx.Commit(ctx); err != nil {
		t.Fatal(err)
	}
	h.waitFor("relay named in readiness", 30*time.Second, func() bool { return r.p.Ready(ctx)["relay"] != "" })
	if got := r.p.Ready(ctx)["relay"]; !strings.Contains(got, "read dictionaries") || !strings.Contains(got, "raw_dictionary") {
		t.Errorf("relay reason %q does not name the failed read of raw_dictionary", got)
	}
	if !slices.Equal(h.unpublished(), []int64{n1}) {
		t.Errorf("unpublished %v, want only row %d", h.unpublished(), n1)
	}
	if metricValue(t, h.metrics.RelayFailing) != 1 || metricValue(t, h.metrics.OutboxDamaged) != 0 || len(r.p.Degraded()) != 0 {
		t.Errorf("relay failing %v, damaged %v, degraded %v: want failing, and the row not called damaged",
			metricValue(t, h.metrics.RelayFailing), metricValue(t, h.metrics.OutboxDamaged), r.p.Degraded())
	}
	select {
	case err := <-r.done:
		t.Fatalf("the replica stopped: %v", err)
	default:
	}
	if _, err := h.pool.Exec(ctx, `ALTER TABLE raw_dictionary_away RENAME TO raw_dictionary`); err != nil {
		t.Fatal(err)
	}
	h.waitSettled(60 * time.Second)
	var data string
	for _, m := range h.readOutput() {
		if m.msgID == "Observation/newer-a/_history/1" {
			data = string(m.data)
		}
	}
	if data != string(invented("newer-a")) {
		t.Errorf("row of the stored dictionary published as %q, want its exact bytes", data)
	}
	h.waitReady(r)
}
