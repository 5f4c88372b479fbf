package postgres_test

import (
	"context"
	"errors"
	"slices"
	"strconv"
	"strings"
	"testing"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/rawcodec"
)

// CheckOutputs verifies every stored outbox payload from the database
// alone: frames decode with a stored dictionary to the stored SHA-256 and
// size, a plain row from before 0018 counts as plain. A flipped byte of a
// frame, a wrong stored size, a frame of a stored dictionary row that does
// not hold the dictionary of its ID (and that row itself), and a row of no
// stored derivation version are each refused by name, the rest counted.
func TestCheckOutputs(t *testing.T) {
	t.Parallel()
	f, want := outputStore(t)
	var all []int64
	if err := f.pool.QueryRow(f.ctx, `SELECT array_agg(seq ORDER BY seq) FROM outbox`).Scan(&all); err != nil {
		t.Fatal(err)
	}
	if len(all) != 4 {
		t.Fatalf("%d outbox rows, want 4 (two versions, each an Observation and a Provenance)", len(all))
	}
	got, err := postgres.CheckOutputs(f.ctx, f.pool, 3) // pages of 3: a page boundary is crossed
	if err != nil {
		t.Fatal(err)
	}
	if got.Compressed != 4 || got.Plain != 0 || len(got.Failed) != 0 || got.StoredBytes >= got.PayloadBytes {
		t.Fatalf("CheckOutputs = %+v, want 4 compressed, none refused", got)
	}

	const newer = 0x6f75_7406
	newerSeq, _ := newerFrame(t, f, want, newer) // the first row, all[0]
	if _, err := f.pool.Exec(f.ctx, `INSERT INTO raw_dictionary (id, kind, dictionary) VALUES ($1, 'outbox', $2)`,
		int64(newer), rawcodec.OutboxDictionary); err != nil {
		t.Fatal(err)
	}
	flipped, resized, plain := all[1], all[2], all[3]
	var plainID string
	if err := f.pool.QueryRow(f.ctx, `SELECT msg_id FROM outbox WHERE seq = $1`, plain).Scan(&plainID); err != nil {
		t.Fatal(err)
	}
	for _, u := range []struct {
		sql  string
		args []any
	}{
		{`UPDATE outbox SET stored_payload = overlay(stored_payload PLACING
			decode(lpad(to_hex(get_byte(stored_payload, length(stored_payload) / 2) # 255), 2, '0'), 'hex')
			FROM length(stored_payload) / 2 + 1 FOR 1) WHERE seq = $1`, []any{flipped}},
		{`UPDATE outbox SET payload_size = payload_size - 1 WHERE seq = $1`, []any{resized}},
		{`UPDATE outbox SET stored_payload = $2, payload_sha256 = NULL, payload_size = NULL WHERE seq = $1`, []any{plain, want[plainID]}},
	} {
		if tag, err := f.pool.Exec(f.ctx, u.sql, u.args...); err != nil || tag.RowsAffected() != 1 {
			t.Fatalf("%s: %v", u.sql, err)
		}
	}
	var foreign int64
	if err := f.pool.QueryRow(f.ctx, `INSERT INTO outbox (subject, msg_id, headers, stored_payload, inbox_key, created_at)
		SELECT 'ventderive.elsewhere', 'Foreign/1', '{}', '\x7b7d', inbox_key, now() FROM inbox LIMIT 1 RETURNING seq`).Scan(&foreign); err != nil {
		t.Fatal(err)
	}
	got, err = postgres.CheckOutputs(f.ctx, f.pool, 1000)
	if err != nil {
		t.Fatal(err)
	}
	if got.Compressed != 0 || got.Plain != 1 || got.PayloadBytes != int64(len(want[plainID])) {
		t.Errorf("CheckOutputs = %+v, want only the plain row verified", got)
	}
	failed := strings.Join(got.Failed, "\n")
	for _, w := range []string{
		"review_dictionary row " + itoa(newer) + " does not hold the dictionary of that ID",
		"outbox " + itoa(newerSeq) + " (",
		"outbox " + itoa(flipped) + " (",
		"outbox " + itoa(resized) + " (",
		"outbox " + itoa(foreign) + " (Foreign/1): names no stored derivation version",
	} {
		if !strings.Contains(failed, w) {
			t.Errorf("refusals\n%s\ndo not name %q", failed, w)
		}
	}
	if len(got.Failed) != 5 {
		t.Errorf("%d refusals, want 5:\n%s", len(got.Failed), failed)
	}
}

func itoa(n int64) string { return strconv.FormatInt(n, 10) }

// The audit and the relay apply one check: a row whose headers are not a
// JSON object of strings (here a number, which the column's jsonb object
// check lets in) is held by the relay as damaged and named by CheckOutputs;
// so is a flipped frame byte. Every row the relay skips as damaged is
// among the audit's refusals, and the audit refuses no other row.
func TestCheckOutputsNamesEveryRowTheRelayHolds(t *testing.T) {
	t.Parallel()
	f, _ := outputStore(t)
	var all []int64
	if err := f.pool.QueryRow(f.ctx, `SELECT array_agg(seq ORDER BY seq) FROM outbox`).Scan(&all); err != nil {
		t.Fatal(err)
	}
	badHeaders, flipped := all[0], all[3]
	if _, err := f.pool.Exec(f.ctx, `UPDATE outbox SET headers = '{"Ventderive-Kind": 1}' WHERE seq = $1`, badHeaders); err != nil {
		t.Fatal(err)
	}
	if _, err := f.pool.Exec(f.ctx, `UPDATE outbox SET stored_payload = overlay(stored_payload PLACING
		decode(lpad(to_hex(get_byte(stored_payload, length(stored_payload) / 2) # 255), 2, '0'), 'hex')
		FROM length(stored_payload) / 2 + 1 FOR 1) WHERE seq = $1`, flipped); err != nil {
		t.Fatal(err)
	}
	got, err := postgres.CheckOutputs(f.ctx, f.pool, 1000)
	if err != nil {
		t.Fatal(err)
	}
	res, err := f.store.RelayOutboxFrom(f.ctx, 0, 100, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
		return nil, nil // publish nothing: the rows stay for the audit
	})
	if err != nil {
		t.Fatal(err)
	}
	var damaged []int64
	for _, s := range res.Skipped {
		if errors.Is(s.Err, consumer.ErrDamagedPayload) {
			damaged = append(damaged, s.Seq)
		}
	}
	if !slices.Equal(damaged, []int64{badHeaders, flipped}) {
		t.Fatalf("relay held %v as damaged, want %d (headers) and %d (frame)", damaged, badHeaders, flipped)
	}
	failed := strings.Join(got.Failed, "\n")
	for _, seq := range damaged {
		if !strings.Contains(failed, "outbox "+itoa(seq)+" (") {
			t.Errorf("audit refusals\n%s\ndo not name row %d, which the relay holds as damaged", failed, seq)
		}
	}
	if !strings.Contains(failed, "headers are not a JSON object of strings") {
		t.Errorf("audit refusals\n%s\ndo not give the headers as the reason", failed)
	}
	if len(got.Failed) != len(damaged) || got.Compressed != int64(len(all)-len(damaged)) {
		t.Errorf("CheckOutputs = %+v, want exactly the %d damaged rows refused", got, len(damaged))
	}
}
