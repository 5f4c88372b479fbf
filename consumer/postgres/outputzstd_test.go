package postgres_test

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/rawcodec"
	"github.com/ventderive/ventderive/fhirmap"
)

// outputStore ingests one invented blood gas with ventilator readings
// through the service's planner, so that several values are derived with
// their published Observations and Provenance, and returns the bytes the
// planner handed the store for each outbox message id.
func outputStore(t *testing.T) (*fixture, map[string][]byte) {
	t.Helper()
	f := newFixture(t)
	site := fhirmap.DefaultSite()
	site.Window = window
	site.TargetPaCO2mmHg = 40
	pl := consumer.Planner{Site: site, ObservationSub: "ventderive.out.observation", ProvenanceSub: "ventderive.out.provenance"}
	var mu sync.Mutex
	want := map[string][]byte{}
	plan := func(s consumer.Snapshot) (consumer.Changes, error) {
		ch, err := pl.Plan(s, t0.Add(2*time.Hour))
		mu.Lock()
		defer mu.Unlock()
		for _, o := range ch.Outbox {
			want[o.MsgID] = append([]byte(nil), o.Payload...)
		}
		return ch, err
	}
	for i, m := range []consumer.Message{
		message("fhir.input.device", 1, vent(p1, "ve-1", fhirmap.QMinuteVol, t0.Add(-2*time.Minute), 8, "L/min"),
			vent(p1, "et-1", fhirmap.QPETCO2, t0.Add(-2*time.Minute), 38, "mm[Hg]")),
		message("fhir.input.lab", 2, abg(p1, "abg-1", t0, 45)),
	} {
		if _, err := f.store.Ingest(f.ctx, m, plan); err != nil {
			t.Fatalf("message %d: %v", i, err)
		}
	}
	if len(want) < 2 {
		t.Fatalf("the planner published %d messages, want at least an Observation and its Provenance", len(want))
	}
	return f, want
}

func hexSHA(b []byte) string {
	s := sha256.Sum256(b)
	return hex.EncodeToString(s[:])
}

// Migration 0018: every outbox payload the service writes is a zstd frame
// of the outbox dictionary with the exact bytes' SHA-256 and size beside
// it; a row written before (plain) reads as it is. The relay
// publishes, and the reviewer reads, the exact bytes the planner made, for
// compressed and plain rows alike, with the same digest in the review view.
func TestCompressedOutputsReadBackExactly(t *testing.T) {
	t.Parallel()
	f, want := outputStore(t)

	rows, err := f.pool.Query(f.ctx, `SELECT seq, msg_id, stored_payload, payload_sha256, payload_size FROM outbox ORDER BY seq`)
	if err != nil {
		t.Fatal(err)
	}
	type stored struct {
		seq   int64
		msgID string
		frame []byte
		sum   []byte
		size  int
	}
	var all []stored
	for rows.Next() {
		var s stored
		if err := rows.Scan(&s.seq, &s.msgID, &s.frame, &s.sum, &s.size); err != nil {
			t.Fatal(err)
		}
		all = append(all, s)
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	if len(all) != len(want) {
		t.Fatalf("%d outbox rows, the planner made %d", len(all), len(want))
	}
	for _, s := range all {
		w := want[s.msgID]
		if rawcodec.FrameDictID(s.frame) != rawcodec.OutboxDictionaryID {
			t.Errorf("%s: stored form is not a frame of the outbox dictionary", s.msgID)
		}
		if hex.EncodeToString(s.sum) != hexSHA(w) || s.size != len(w) {
			t.Errorf("%s: stored SHA-256 %x and size %d, the payload's %s and %d", s.msgID, s.sum, s.size, hexSHA(w), len(w))
		}
		if len(s.frame) >= len(w) {
			t.Errorf("%s: %d bytes stored for %d", s.msgID, len(s.frame), len(w))
		}
	}

	// A mixed store: the first row back as a binary before 0018 wrote it
	// (plain bytes, no digest).
	plain := all[0]
	if _, err := f.pool.Exec(f.ctx, `UPDATE outbox SET stored_payload = $2, payload_sha256 = NULL, payload_size = NULL WHERE seq = $1`,
		plain.seq, want[plain.msgID]); err != nil {
		t.Fatal(err)
	}

	// The review view's digest and size are the exact bytes' for both.
	for _, s := range all {
		var digest string
		var size int
		var payload, frame []byte
		if err := f.pool.QueryRow(f.ctx, `SELECT payload_digest, size_bytes, payload, payload_zstd FROM review_published WHERE seq = $1`, s.seq).
			Scan(&digest, &size, &payload, &frame); err != nil {
			t.Fatal(err)
		}
		w := want[s.msgID]
		if digest != hexSHA(w) || size != len(w) {
			t.Errorf("review_published %s: digest %s size %d, want %s %d", s.msgID, digest, size, hexSHA(w), len(w))
		}
		if s.seq == plain.seq && (!bytes.Equal(payload, w) || frame != nil) {
			t.Errorf("plain row: payload %q frame %x, want the bytes and no frame", payload, frame)
		}
		if s.seq != plain.seq && (payload != nil || !rawcodec.IsCompressed(frame)) {
			t.Errorf("compressed row %s: payload %q, want NULL and the frame in payload_zstd", s.msgID, payload)
		}
	}

	// The relay publishes the planner's bytes.
	var published []consumer.OutboxMessage
	n, err := f.store.RelayOutbox(f.ctx, 100, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
		published = append(published, ms...)
		return seqs(ms), nil
	})
	if err != nil || n != len(all) || len(published) != len(all) {
		t.Fatalf("relay marked %d and published %d (%v), want %d", n, len(published), err, len(all))
	}
	for _, m := range published {
		if !bytes.Equal(m.Payload, want[m.MsgID]) {
			t.Errorf("relay published %d bytes for %s (plain row: %v), the planner made %d", len(m.Payload), m.MsgID,
				m.Seq == plain.seq, len(want[m.MsgID]))
		}
	}

	// The reviewer (console, audit show and published) reads the same
	// bytes and digests, and the records as they are stored (jsonb).
	r := postgres.NewReviewer(f.pool)
	versions, err := r.List(f.ctx, postgres.Filter{})
	if err != nil {
		t.Fatal(err)
	}
	seen, records := 0, 0
	for _, v := range versions.Rows {
		h, err := r.Show(f.ctx, v.Key)
		if err != nil {
			t.Fatal(err)
		}
		for _, hv := range h.Versions {
			if hv.Record == nil {
				t.Errorf("%s v%d: no record", hv.Key, hv.Version)
			} else {
				records++
			}
			for _, m := range hv.Messages {
				w := want[m.MsgID]
				if !bytes.Equal(m.Payload, w) || m.PayloadText != string(w) || m.Digest != hexSHA(w) || m.SizeBytes != len(w) {
					t.Errorf("Show %s: %d bytes, digest %s, size %d; want %d, %s", m.MsgID, len(m.Payload), m.Digest, m.SizeBytes, len(w), hexSHA(w))
				}
				seen++
			}
		}
	}
	if seen < len(all) || records == 0 {
		t.Errorf("the reviewer showed %d messages of %d, %d records", seen, len(all), records)
	}
}

// A damaged compressed value is never published and never shown as
// published: audit verify reports the version a mismatch naming what is
// damaged (an Observation, a Provenance), the relay leaves the
// row unpublished and says why, and Show refuses. The refusals, which name
// none of it, verify as before.
func TestDamagedCompressedOutputsAreRefused(t *testing.T) {
	t.Parallel()
	f, _ := outputStore(t)
	r := postgres.NewReviewer(f.pool)
	before, err := r.Verify(f.ctx, postgres.Filter{})
	if err != nil {
		t.Fatal(err)
	}
	reproduced := 0
	for _, v := range before.Rows {
		if v.Status != postgres.StatusRefused && v.Outcome != postgres.OutcomeReproduced {
			t.Errorf("%s before any damage: %s %v %s", v.Key, v.Outcome, v.Findings, v.Why)
		}
		if v.Status != postgres.StatusRefused && v.Outcome == postgres.OutcomeReproduced {
			reproduced++
		}
	}
	if reproduced < 2 {
		t.Fatalf("%d versions reproduced from compressed rows, want at least 2", reproduced)
	}

	// One version's Observation frame, a byte.
	var obsKey, provKey string
	var obsSeq int64
	if err := f.pool.QueryRow(f.ctx, `
		SELECT o.seq, d.key FROM outbox o JOIN derivation d ON o.msg_id = 'Observation/' || d.observation_id || '/_history/' || d.version
		ORDER BY o.seq LIMIT 1`).Scan(&obsSeq, &obsKey); err != nil {
		t.Fatal(err)
	}
	if _, err := f.pool.Exec(f.ctx, `UPDATE outbox SET stored_payload = overlay(stored_payload PLACING
		decode(lpad(to_hex(get_byte(stored_payload, length(stored_payload) / 2) # 255), 2, '0'), 'hex')
		FROM length(stored_payload) / 2 + 1 FOR 1) WHERE seq = $1`, obsSeq); err != nil {
		t.Fatal(err)
	}
	// And another version's Provenance (audit verify checks every message
	// published for a version).
	if err := f.pool.QueryRow(f.ctx, `SELECT min(key) FROM derivation WHERE key <> $1`, obsKey).Scan(&provKey); err != nil {
		t.Fatal(err)
	}
	if tag, err := f.pool.Exec(f.ctx, `
		UPDATE outbox o SET stored_payload = overlay(o.stored_payload PLACING '\xffff'::bytea FROM length(o.stored_payload) / 2 FOR 2)
		FROM derivation d WHERE o.msg_id = 'Provenance/' || d.observation_id || '/_history/' || d.version AND d.key = $1`, provKey); err != nil || tag.RowsAffected() == 0 {
		t.Fatalf("damage the Provenance of %s: %v rows, %v", provKey, tag.RowsAffected(), err)
	}

	after, err := r.Verify(f.ctx, postgres.Filter{})
	if err != nil {
		t.Fatal(err)
	}
	refusedBefore := map[string]string{}
	for _, v := range before.Rows {
		if v.Status == postgres.StatusRefused {
			refusedBefore[v.Key] = v.Outcome
		}
	}
	for _, v := range after.Rows {
		if v.Status == postgres.StatusRefused {
			if v.Outcome != refusedBefore[v.Key] {
				t.Errorf("refusal %s: %s after the damage, %s before", v.Key, v.Outcome, refusedBefore[v.Key])
			}
			continue
		}
		found := strings.Join(v.Findings, "; ")
		switch v.Key {
		case obsKey:
			if v.Outcome != postgres.OutcomeMismatch || !strings.Contains(found, "published: the stored published bytes are damaged: Observation: outbox") {
				t.Errorf("damaged Observation %s: %s, %q", v.Key, v.Outcome, found)
			}
		case provKey:
			if v.Outcome != postgres.OutcomeMismatch || !strings.Contains(found, "damaged: Provenance: outbox") {
				t.Errorf("damaged Provenance %s: %s, %q", v.Key, v.Outcome, found)
			}
		default:
			if v.Outcome != postgres.OutcomeReproduced {
				t.Errorf("undamaged %s: %s %q", v.Key, v.Outcome, found)
			}
		}
	}
	if _, err := r.Show(f.ctx, obsKey); !errors.Is(err, rawcodec.ErrCorrupt) {
		t.Errorf("Show of the damaged Observation: %v, want ErrCorrupt", err)
	}

	var published []int64
	res, err := f.store.RelayOutboxFrom(f.ctx, 0, 100, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
		for _, m := range ms {
			published = append(published, m.Seq)
		}
		return seqs(ms), nil
	})
	if err != nil {
		t.Errorf("relay over a damaged row: %v, want the damage reported in Skipped, not as a failure", err)
	}
	skipped := false
	for _, s := range res.Skipped {
		if s.Seq == obsSeq {
			skipped = errors.Is(s.Err, rawcodec.ErrCorrupt) && errors.Is(s.Err, consumer.ErrDamagedPayload)
		}
	}
	if !skipped {
		t.Errorf("the damaged row %d is not skipped as damaged (ErrCorrupt): %+v", obsSeq, res.Skipped)
	}
	for _, s := range published {
		if s == obsSeq {
			t.Errorf("the damaged row %d was handed to publish", obsSeq)
		}
	}
	var left int
	if err := f.pool.QueryRow(f.ctx, `SELECT count(*) FROM outbox WHERE published_at IS NULL`).Scan(&left); err != nil || left == 0 {
		t.Errorf("%d rows left unpublished (%v), want the damaged one", left, err)
	}
	if len(published) == 0 {
		t.Errorf("the relay published nothing beside the damaged row")
	}
}

// review_dictionary gives the reviewer the outbox dictionary migrate
// stored, never the inbox one (made of input payloads); raw_dictionary
// holds no other kind (derivation records are not compressed).
func TestReviewDictionaryView(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	rows, err := f.pool.Query(f.ctx, `SELECT id, kind, dictionary FROM review_dictionary ORDER BY id`)
	if err != nil {
		t.Fatal(err)
	}
	got := map[string][]byte{}
	for rows.Next() {
		var id int64
		var kind string
		var d []byte
		if err := rows.Scan(&id, &kind, &d); err != nil {
			t.Fatal(err)
		}
		if did, err := rawcodec.DictID(d); err != nil || int64(did) != id {
			t.Errorf("review_dictionary row %d holds dictionary %#x (%v)", id, did, err)
		}
		got[kind] = d
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	if len(got) != 1 || !bytes.Equal(got["outbox"], rawcodec.OutboxDictionary) {
		t.Errorf("review_dictionary kinds %v, want exactly the embedded outbox dictionary", keys(got))
	}
	var kinds []string
	if err := f.pool.QueryRow(f.ctx, `SELECT array_agg(DISTINCT kind ORDER BY kind) FROM raw_dictionary`).Scan(&kinds); err != nil {
		t.Fatal(err)
	}
	if len(kinds) != 2 || kinds[0] != "inbox" || kinds[1] != "outbox" {
		t.Errorf("raw_dictionary kinds %v, want inbox and outbox", kinds)
	}
	if _, err := f.pool.Exec(f.ctx, `INSERT INTO raw_dictionary (id, kind, dictionary) VALUES (1, 'record', '\x37a430ec00')`); err == nil ||
		!strings.Contains(err.Error(), "raw_dictionary_kind_check") {
		t.Errorf("a 'record' dictionary: %v, want refused by raw_dictionary's kind CHECK (inbox and outbox only)", err)
	}
	var inbox int
	if err := f.pool.QueryRow(f.ctx, `SELECT count(*) FROM raw_dictionary WHERE kind = 'inbox' AND id = $1`, int64(rawcodec.InboxDictionaryID)).Scan(&inbox); err != nil || inbox != 1 {
		t.Errorf("raw_dictionary holds the inbox dictionary %d times (%v), want once", inbox, err)
	}
}

func keys[V any](m map[string]V) []string {
	var out []string
	for k := range m {
		out = append(out, k)
	}
	return out
}

// A frame made with a dictionary this binary does not embed (a newer
// replica's retrained one) is decoded with the dictionary migrate of that
// replica stored: by the relay through raw_dictionary, by the reviewer
// through review_dictionary.
func TestFrameOfAStoredDictionaryDecodes(t *testing.T) {
	t.Parallel()
	f, want := outputStore(t)
	var samples [][]byte
	for _, p := range want {
		samples = append(samples, p)
	}
	for len(samples) < 8 {
		samples = append(samples, samples...)
	}
	const newer = 0x6f75_7402
	d, err := rawcodec.Train(samples, newer, 4<<10)
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
	frame := c.Encode(want[msgID])
	if _, err := rawcodec.Outbox().Decode(frame); !errors.Is(err, rawcodec.ErrCorrupt) {
		t.Fatalf("the embedded codecs decode a frame of dictionary %#x: %v", newer, err)
	}
	if _, err := f.pool.Exec(f.ctx, `INSERT INTO raw_dictionary (id, kind, dictionary) VALUES ($1, 'outbox', $2)`, int64(newer), d); err != nil {
		t.Fatal(err)
	}
	if _, err := f.pool.Exec(f.ctx, `UPDATE outbox SET stored_payload = $2 WHERE seq = $1`, seq, frame); err != nil {
		t.Fatal(err)
	}

	h, err := postgres.NewReviewer(f.pool).Show(f.ctx, strings.TrimSuffix(strings.TrimPrefix(strings.TrimPrefix(msgID, "Observation/"), "Provenance/"), "/_history/1"))
	if err != nil {
		t.Fatal(err)
	}
	shown := false
	for _, v := range h.Versions {
		for _, m := range v.Messages {
			if m.Seq == seq {
				shown = bytes.Equal(m.Payload, want[msgID]) && m.Digest == hexSHA(want[msgID])
			}
		}
	}
	if !shown {
		t.Errorf("Show did not return the exact bytes of the row stored with dictionary %#x", newer)
	}
	var got []byte
	if _, err := f.store.RelayOutbox(f.ctx, 100, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
		for _, m := range ms {
			if m.Seq == seq {
				got = m.Payload
			}
		}
		return seqs(ms), nil
	}); err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(got, want[msgID]) {
		t.Errorf("relay published %d bytes for the row of dictionary %#x, want the planner's %d", len(got), newer, len(want[msgID]))
	}
}

// A zstd frame in outbox.stored_payload must carry the SHA-256 and size of
// the exact bytes (outbox_compressed_described, migration 0018): a NULL in
// either would pass a CHECK written as a plain AND, leave review_published
// without a digest and the row unpublishable. A plain row needs neither.
func TestOutboxFrameNeedsDigestAndSize(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	in := message("fhir.input.vent", 1, vent("Patient/lg-icu-0091", "ck-mv", fhirmap.QMinuteVol, t0, 7.5, "L/min"))
	if _, err := f.store.Ingest(f.ctx, in, (&testPlan{}).plan); err != nil {
		t.Fatal(err)
	}
	frame := rawcodec.Outbox().Encode([]byte(`{"resourceType":"Observation"}`))
	sum := bytes.Repeat([]byte{7}, 32)
	size := 30
	for _, c := range []struct {
		name    string
		payload []byte
		sum     []byte
		size    *int
		ok      bool
	}{
		{"frame without digest", frame, nil, &size, false},
		{"frame without size", frame, sum, nil, false},
		{"frame with a short digest", frame, sum[:31], &size, false},
		{"frame with digest and size", frame, sum, &size, true},
		{"plain row without either", []byte(`{}`), nil, nil, true},
	} {
		_, err := f.pool.Exec(f.ctx, `INSERT INTO outbox (subject, msg_id, headers, stored_payload, payload_sha256, payload_size, inbox_key, created_at)
VALUES ('vd.test', $1, '{}'::jsonb, $2, $3, $4, decode($5, 'hex'), now())`, "check-"+c.name, c.payload, c.sum, c.size, in.InboxKey)
		switch {
		case c.ok && err != nil:
			t.Errorf("%s: refused: %v", c.name, err)
		case !c.ok && (err == nil || !strings.Contains(err.Error(), "outbox_compressed_described")):
			t.Errorf("%s: stored (err %v), want outbox_compressed_described to refuse it", c.name, err)
		}
	}
}
