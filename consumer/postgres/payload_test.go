package postgres_test

import (
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/rawcodec"
	"github.com/ventderive/ventderive/fhirmap"
)

// TestPayloadsCompressedAndChecked: payloads written by the store are zstd
// frames that decode to the bytes received (SHA-256 = inbox key, the key's
// definition since 0011); a plain row from before 0015 still reads; a
// damaged frame and a frame naming a dictionary the database does not hold
// are refused, never returned; a plain row that does not match its key is
// still refused by the CHECK.
func TestPayloadsCompressedAndChecked(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	var p testPlan
	var msgs []consumer.Message
	for i := range 3 {
		at := t0.Add(time.Duration(i) * time.Minute)
		msgs = append(msgs, message("fhir.input.device", uint64(10+i), vent(p1, "ve-p"+string(rune('a'+i)), fhirmap.QMinuteVol, at, 10, "L/min")))
	}
	for _, r := range f.store.IngestBatch(f.ctx, msgs, p.plan) {
		if r.Err != nil {
			t.Fatal(r.Err)
		}
	}
	got, err := postgres.CheckPayloads(f.ctx, f.pool, 2) // batches of 2: the paging is crossed
	if err != nil {
		t.Fatal(err)
	}
	if got.Compressed != 3 || got.Plain != 0 || len(got.Failed) != 0 {
		t.Fatalf("CheckPayloads = %+v, want 3 compressed, none failed", got)
	}

	// A row as 0011 wrote it: plain bytes.
	plain := []byte(`{"resourceType":"Bundle","type":"collection","entry":[]}`)
	sum := sha256.Sum256(plain)
	plainKey := hex.EncodeToString(sum[:])
	if _, err := f.pool.Exec(f.ctx, `INSERT INTO inbox_subject (subject) VALUES ('fhir.input.device') ON CONFLICT DO NOTHING`); err != nil {
		t.Fatal(err)
	}
	insert := `INSERT INTO inbox (inbox_key, subject_id, stream_seq, received, recorded_at, resources, facts, raw)
		VALUES (decode($1, 'hex'), (SELECT id FROM inbox_subject WHERE subject = 'fhir.input.device'), 99, now(), now(), 0, 0, $2)`
	if _, err := f.pool.Exec(f.ctx, insert, plainKey, plain); err != nil {
		t.Fatal(err)
	}
	// A plain row whose bytes are not its key's: the CHECK still refuses it.
	if _, err := f.pool.Exec(f.ctx, insert, strings.Repeat("0", 64), plain); err == nil || !strings.Contains(err.Error(), "inbox_raw_matches") {
		t.Errorf("plain row with a wrong key: err %v, want inbox_raw_matches", err)
	}
	// A damaged frame: one byte of the compressed body flipped.
	victim := msgs[1].InboxKey
	if _, err := f.pool.Exec(f.ctx, `UPDATE inbox SET raw = overlay(raw placing decode(lpad(to_hex(get_byte(raw, 20) # 255), 2, '0'), 'hex') from 21 for 1) WHERE inbox_key = decode($1, 'hex')`, victim); err != nil {
		t.Fatal(err)
	}
	// A frame compressed with a dictionary the database does not hold.
	var samples [][]byte
	for i := range 40 {
		m := message("fhir.input.device", uint64(100+i), vent(p1, "ve-s"+string(rune('a'+i%26))+string(rune('a'+i/26)), fhirmap.QTidalVol, t0.Add(time.Duration(i)*time.Minute), float64(400+i), "mL"))
		samples = append(samples, m.Raw)
	}
	other, err := rawcodec.Train(samples, 0x7665_6eff, 4<<10)
	if err != nil {
		t.Fatal(err)
	}
	oc, err := rawcodec.New(other)
	if err != nil {
		t.Fatal(err)
	}
	stranger := msgs[2]
	if _, err := f.pool.Exec(f.ctx, `UPDATE inbox SET raw = $2 WHERE inbox_key = decode($1, 'hex')`, stranger.InboxKey, oc.Encode(stranger.Raw)); err != nil {
		t.Fatal(err)
	}
	got, err = postgres.CheckPayloads(f.ctx, f.pool, 1000)
	if err != nil {
		t.Fatal(err)
	}
	if got.Compressed != 1 || got.Plain != 1 || len(got.Failed) != 2 {
		t.Fatalf("CheckPayloads = %+v, want 1 compressed, 1 plain and 2 refused", got)
	}
	for _, key := range []string{victim, stranger.InboxKey} {
		if !strings.Contains(strings.Join(got.Failed, "\n"), key) {
			t.Errorf("refusals %q do not name %s", got.Failed, key)
		}
	}
	c, err := postgres.PayloadCodec(f.ctx, f.pool)
	if err != nil {
		t.Fatal(err)
	}
	// A frame that decodes but is not the payload received: refused.
	if _, err := postgres.DecodePayload(c, plainKey, rawcodec.Inbox().Encode([]byte("{}"))); !errors.Is(err, postgres.ErrPayloadMismatch) {
		t.Errorf("DecodePayload of other bytes: err %v, want ErrPayloadMismatch", err)
	}
	if _, err := postgres.DecodePayload(c, stranger.InboxKey, oc.Encode(stranger.Raw)); !errors.Is(err, rawcodec.ErrCorrupt) {
		t.Errorf("DecodePayload with an unknown dictionary: err %v, want rawcodec.ErrCorrupt", err)
	}
}
