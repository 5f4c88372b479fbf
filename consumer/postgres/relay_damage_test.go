package postgres_test

import (
	"context"
	"crypto/sha256"
	"errors"
	"fmt"
	"strings"
	"testing"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/rawcodec"
)

// newerFrame re-stores the first outbox row of f as a frame of a
// dictionary this binary does not embed (as a newer replica would write
// it) and returns that row's seq and the dictionary (not stored).
func newerFrame(t *testing.T, f *fixture, want map[string][]byte, id uint32) (int64, []byte) {
	t.Helper()
	var samples [][]byte
	for _, p := range want {
		samples = append(samples, p)
	}
	for len(samples) < 8 {
		samples = append(samples, samples...)
	}
	d, err := rawcodec.Train(samples, id, 4<<10)
	if err != nil {
		t.Fatal(err)
	}
	c, err := rawcodec.New(d)
	if err != nil {
		t.Fatal(err)
	}
	var seq int64
	var msgID string
	if err := f.pool.QueryRow(f.ctx, `SELECT seq, msg_id FROM outbox ORDER BY seq LIMIT 1`).Scan(&seq, &msgID); err != nil {
		t.Fatal(err)
	}
	if _, err := f.pool.Exec(f.ctx, `UPDATE outbox SET stored_payload = $2 WHERE seq = $1`, seq, c.Encode(want[msgID])); err != nil {
		t.Fatal(err)
	}
	return seq, d
}

// A raw_dictionary row that does not hold the dictionary of its ID (here:
// the row of a newer replica's dictionary holding the embedded outbox
// dictionary instead) makes the one frame of that dictionary unreadable.
// The relay must still publish every other row of the page, and leave that
// one unpublished.
func TestRelayBadDictionaryRowSpoilsOnlyItsFrames(t *testing.T) {
	t.Parallel()
	f, want := outputStore(t)
	const newer = 0x6f75_7403
	seq, _ := newerFrame(t, f, want, newer)
	if _, err := f.pool.Exec(f.ctx, `INSERT INTO raw_dictionary (id, kind, dictionary) VALUES ($1, 'outbox', $2)`,
		int64(newer), rawcodec.OutboxDictionary); err != nil {
		t.Fatal(err)
	}
	var handed []int64
	res, err := f.store.RelayOutboxFrom(f.ctx, 0, 100, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
		handed = append(handed, seqs(ms)...)
		return seqs(ms), nil
	})
	t.Logf("relay: %+v, %v", res, err)
	if res.Claimed != len(want) || res.Marked != len(want)-1 {
		t.Errorf("relay claimed %d and marked %d of %d rows, want all claimed and all but the bad dictionary's frame marked", res.Claimed, res.Marked, len(want))
	}
	for _, s := range handed {
		if s == seq {
			t.Errorf("row %d, a frame of the bad dictionary row, was handed to publish", seq)
		}
	}
	if err != nil {
		t.Errorf("relay: %v, want no failure (the damaged row is reported in Skipped)", err)
	}
	if len(res.Skipped) != 1 || res.Skipped[0].Seq != seq || !errors.Is(res.Skipped[0].Err, consumer.ErrDamagedPayload) ||
		!strings.Contains(res.Skipped[0].Err.Error(), fmt.Sprintf("raw_dictionary row %d does not hold the dictionary of that ID", newer)) {
		t.Errorf("skipped %+v, want row %d as damaged, naming the raw_dictionary row", res.Skipped, seq)
	}
	if left := unpublished(t, f); len(left) != 1 || left[0] != seq {
		t.Errorf("unpublished rows %v, want only %d", left, seq)
	}
}

func unpublished(t *testing.T, f *fixture) []int64 {
	t.Helper()
	var left []int64
	if err := f.pool.QueryRow(f.ctx, `SELECT coalesce(array_agg(seq ORDER BY seq), '{}') FROM outbox WHERE published_at IS NULL`).Scan(&left); err != nil {
		t.Fatal(err)
	}
	return left
}

// relayAll relays every unpublished row in one call of up to 100 and
// returns the result with the seqs handed to publish (all acknowledged).
func relayAll(t *testing.T, f *fixture) (consumer.RelayResult, []int64, map[int64][]byte, error) {
	t.Helper()
	var handed []int64
	bytes := map[int64][]byte{}
	res, err := f.store.RelayOutboxFrom(f.ctx, 0, 100, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
		for _, m := range ms {
			handed = append(handed, m.Seq)
			bytes[m.Seq] = m.Payload
		}
		return seqs(ms), nil
	})
	return res, handed, bytes, err
}

// The relay publishes nothing but the stored payload: a frame whose
// decoded bytes are not the SHA-256 stored beside it, or not the size, and
// a row whose headers are not a JSON object of strings, are each skipped
// as damaged with what is wrong, and the undamaged row is published. (The
// size was not checked before: a row with the right digest and a wrong
// size went out; bad headers failed the whole page.)
func TestRelayChecksDigestSizeAndHeaders(t *testing.T) {
	t.Parallel()
	f, want := outputStore(t)
	var all []int64
	if err := f.pool.QueryRow(f.ctx, `SELECT array_agg(seq ORDER BY seq) FROM outbox`).Scan(&all); err != nil {
		t.Fatal(err)
	}
	if len(all) < 4 || len(all) != len(want) {
		t.Fatalf("%d outbox rows, want at least 4", len(all))
	}
	digest, size, headers := all[0], all[1], all[2]
	for _, u := range []struct {
		sql string
		seq int64
	}{
		{`UPDATE outbox SET payload_sha256 = sha256(payload_sha256) WHERE seq = $1`, digest},
		{`UPDATE outbox SET payload_size = payload_size + 1 WHERE seq = $1`, size},
		{`UPDATE outbox SET headers = '{"Ventderive-Kind": 7}' WHERE seq = $1`, headers},
	} {
		if tag, err := f.pool.Exec(f.ctx, u.sql, u.seq); err != nil || tag.RowsAffected() != 1 {
			t.Fatalf("%s: %v", u.sql, err)
		}
	}
	res, handed, _, err := relayAll(t, f)
	if err != nil {
		t.Errorf("relay: %v, want damage reported in Skipped only", err)
	}
	why := map[int64]string{digest: "SHA-256", size: "stored size", headers: "headers are not a JSON object of strings"}
	if len(res.Skipped) != len(why) {
		t.Errorf("skipped %+v, want the 3 damaged rows", res.Skipped)
	}
	for _, s := range res.Skipped {
		if !errors.Is(s.Err, consumer.ErrDamagedPayload) || !strings.Contains(s.Err.Error(), why[s.Seq]) ||
			!strings.Contains(s.Err.Error(), fmt.Sprintf("outbox %d:", s.Seq)) {
			t.Errorf("row %d skipped with %v, want damaged naming the row and %q", s.Seq, s.Err, why[s.Seq])
		}
	}
	for _, s := range handed {
		if why[s] != "" {
			t.Errorf("damaged row %d (%s) was handed to publish", s, why[s])
		}
	}
	if len(handed) != len(all)-3 || res.Marked != len(all)-3 {
		t.Errorf("%d rows handed to publish, %d marked, want the %d undamaged", len(handed), res.Marked, len(all)-3)
	}
	if left := unpublished(t, f); len(left) != 3 {
		t.Errorf("unpublished %v, want the 3 damaged rows", left)
	}
}

// insertOutbox stores an outbox row as the writer would, with stored
// bytes frame (the SHA-256 and size of payload beside it).
func insertOutbox(t *testing.T, f *fixture, msgID string, frame, payload []byte) int64 {
	t.Helper()
	sum := sha256.Sum256(payload)
	var seq int64
	if err := f.pool.QueryRow(f.ctx, `INSERT INTO outbox (subject, msg_id, headers, stored_payload, payload_sha256, payload_size, inbox_key, created_at)
		SELECT $1, $2, '{}'::jsonb, $3, $4, $5, inbox_key, now() FROM inbox ORDER BY inbox_key LIMIT 1 RETURNING seq`,
		consumer.DefaultObservationSub, msgID, frame, sum[:], len(payload)).Scan(&seq); err != nil {
		t.Fatal(err)
	}
	return seq
}

// A damaged version holds the later versions of its derivation in the
// page (Err nil: held, not damaged), and nothing else: another
// derivation's row behind it is published.
func TestRelayHoldsLaterVersionsBehindDamage(t *testing.T) {
	t.Parallel()
	f, _ := outputStore(t)
	if _, err := f.pool.Exec(f.ctx, `UPDATE outbox SET published_at = now()`); err != nil {
		t.Fatal(err)
	}
	body := func(n int) []byte { return []byte(fmt.Sprintf(`{"resourceType":"Observation","id":"invented-%d"}`, n)) }
	damagedFrame := append(append([]byte(nil), rawcodec.Magic...), 0x01, 0x02, 0x03, 0x04, 0x05, 0x06)
	a1 := insertOutbox(t, f, "Observation/hold-a/_history/1", damagedFrame, body(1))
	a2 := insertOutbox(t, f, "Observation/hold-a/_history/2", rawcodec.Outbox().Encode(body(2)), body(2))
	b1 := insertOutbox(t, f, "Observation/hold-b/_history/1", rawcodec.Outbox().Encode(body(3)), body(3))
	res, handed, got, err := relayAll(t, f)
	if err != nil {
		t.Errorf("relay: %v", err)
	}
	if len(res.Skipped) != 2 || res.Skipped[0].Seq != a1 || !errors.Is(res.Skipped[0].Err, consumer.ErrDamagedPayload) ||
		res.Skipped[1].Seq != a2 || res.Skipped[1].Err != nil {
		t.Errorf("skipped %+v, want %d damaged and %d held behind it", res.Skipped, a1, a2)
	}
	if len(handed) != 1 || handed[0] != b1 || string(got[b1]) != string(body(3)) {
		t.Errorf("handed %v, want only %d with its exact bytes", handed, b1)
	}
}

// When raw_dictionary cannot be read at all (here: the table is gone), a
// frame of a dictionary this binary does not embed cannot be checked: the
// row is skipped with that failure (not as damaged: nothing is known to be
// wrong with it), the call returns the failure, and every row that needs
// no stored dictionary is published. Once the table is back, the next
// relay publishes the row's exact bytes.
func TestRelayUnreadableDictionaries(t *testing.T) {
	t.Parallel()
	f, want := outputStore(t)
	const newer = 0x6f75_7404
	seq, d := newerFrame(t, f, want, newer)
	if _, err := f.pool.Exec(f.ctx, `INSERT INTO raw_dictionary (id, kind, dictionary) VALUES ($1, 'outbox', $2)`, int64(newer), d); err != nil {
		t.Fatal(err)
	}
	if _, err := f.pool.Exec(f.ctx, `ALTER TABLE raw_dictionary RENAME TO raw_dictionary_away`); err != nil {
		t.Fatal(err)
	}
	res, handed, _, err := relayAll(t, f)
	if err == nil || errors.Is(err, consumer.ErrDamagedPayload) || !strings.Contains(err.Error(), "read dictionaries") {
		t.Errorf("relay without raw_dictionary: %v, want the failure to read the dictionaries", err)
	}
	if len(res.Skipped) != 1 || res.Skipped[0].Seq != seq || res.Skipped[0].Err == nil || errors.Is(res.Skipped[0].Err, consumer.ErrDamagedPayload) {
		t.Errorf("skipped %+v, want row %d skipped as not checked (not damaged)", res.Skipped, seq)
	}
	if len(handed) != len(want)-1 || res.Marked != len(want)-1 || res.Claimed != len(want) {
		t.Errorf("relay %+v handed %v, want every other row published", res, handed)
	}
	if _, err := f.pool.Exec(f.ctx, `ALTER TABLE raw_dictionary_away RENAME TO raw_dictionary`); err != nil {
		t.Fatal(err)
	}
	res, handed, got, err := relayAll(t, f)
	var msgID string
	if err := f.pool.QueryRow(f.ctx, `SELECT msg_id FROM outbox WHERE seq = $1`, seq).Scan(&msgID); err != nil {
		t.Fatal(err)
	}
	if err != nil || len(handed) != 1 || handed[0] != seq || string(got[seq]) != string(want[msgID]) || len(res.Skipped) != 0 {
		t.Errorf("relay with raw_dictionary back: %+v, %v, handed %v; want row %d published with its exact bytes", res, err, handed, seq)
	}
}
