package consumer_test

import (
	"context"
	"fmt"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
)

// deepPoison is an Observation with an unknown field at the bottom of an
// extension nested levels deep (twice as many JSON levels): the decoder's
// field path of it was once longer than JetStream allows for a header.
func deepPoison(i, levels int) testMsg {
	ext := strings.Repeat(`{"url":"http://example.org/x","extension":[`, levels-1) +
		`{"url":"http://example.org/x","notAnElement":1}` + strings.Repeat(`]}`, levels-1)
	raw := fmt.Sprintf(`{"resourceType":"Observation","id":"t-bad-deep-%d","status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"subject":{"reference":"%s"},`+
		`"effectiveDateTime":"2026-11-20T08:00:00Z","extension":[%s]}`, i, patientRef(900), ext)
	return testMsg{subject: "fhir.input.lab", payload: []byte(raw), poison: "too-deep"}
}

// interleave puts one bad message before the good ones, the rest after.
func interleave(bad, good []testMsg) []testMsg {
	return append(append(append([]testMsg{}, bad[:1]...), good...), bad[1:]...)
}

// More deeply nested poison messages than the consumer's in-flight limit:
// each is dead-lettered once with a bounded detail and its copy, and the
// good input behind them is processed.
func TestPoisonDeepNestingDoesNotHaltIntake(t *testing.T) {
	h := newHarness(t)
	h.cfg.MaxAckPending = 8
	var bad []testMsg
	for i := range 12 {
		bad = append(bad, deepPoison(i, 4900))
	}
	msgs := interleave(bad, generate(genOpts{patients: 2, gases: 1}))
	h.startReplica(nil)
	h.publish(msgs)
	h.waitSettled(120 * time.Second)
	h.reconcile(msgs)
	h.assertDeadLetters(len(bad), "too-deep", "")
	assertNoPHI(t, h.logs.String())
}

// A dead-letter copy that can never be published (here: no stream takes
// the subject) must not bring the message back forever: after a few
// deliveries it is recorded, saying the copy is missing, and terminated,
// and intake goes on although there are more such messages than the
// in-flight limit.
func TestDeadLetterCopyUnpublishable(t *testing.T) {
	h := newHarness(t)
	h.cfg.MaxAckPending = 4
	h.cfg.DeadLetterSub = "nostream.deadletter"
	bad := poisonMsgs()
	bad = append(bad, deepPoison(1, 3), deepPoison(2, 3))
	good := generate(genOpts{patients: 2, gases: 1})
	msgs := interleave(bad, good)
	h.startReplica(nil)
	h.publish(msgs)
	h.waitSettled(120 * time.Second)

	var inbox int
	if err := h.pool.QueryRow(context.Background(), `SELECT count(*) FROM inbox`).Scan(&inbox); err != nil {
		t.Fatal(err)
	}
	if inbox != len(good) {
		t.Errorf("inbox holds %d, want the %d good inputs", inbox, len(good))
	}
	h.assertDeadLetters(len(bad), "", "copy not published")
	compareHeads(t, h.heads(), expectedHeads(t, h.site, msgs))
	if ci := h.consumerInfo(); ci.NumAckPending != 0 || ci.NumPending != 0 {
		t.Errorf("consumer: %d pending, %d ack pending; want none", ci.NumPending, ci.NumAckPending)
	}
	assertNoPHI(t, h.logs.String())
}

// assertDeadLetters checks the dead-letter table: n rows, each detail at
// most consumer.MaxDetailBytes, the reason (when given) and a part of the
// detail (when given).
func (h *harness) assertDeadLetters(n int, reason, inDetail string) {
	h.t.Helper()
	rows, err := h.pool.Query(context.Background(), `SELECT reason, detail FROM dead_letter`)
	if err != nil {
		h.t.Fatal(err)
	}
	defer rows.Close()
	got := 0
	for rows.Next() {
		var r, d string
		if err := rows.Scan(&r, &d); err != nil {
			h.t.Fatal(err)
		}
		got++
		if len(d) > consumer.MaxDetailBytes {
			h.t.Errorf("dead letter %s: detail of %d bytes, want at most %d", r, len(d), consumer.MaxDetailBytes)
		}
		if reason != "" && r != reason {
			h.t.Errorf("dead letter reason %q, want %q", r, reason)
		}
		if inDetail != "" && !strings.Contains(d, inDetail) {
			h.t.Errorf("dead letter %s: detail %q lacks %q", r, d, inDetail)
		}
	}
	if err := rows.Err(); err != nil {
		h.t.Fatal(err)
	}
	if got != n {
		h.t.Errorf("%d dead letters, want %d", got, n)
	}
}
