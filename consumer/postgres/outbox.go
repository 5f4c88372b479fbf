package postgres

import (
	"cmp"
	"context"
	"crypto/sha256"
	"encoding/json"
	"errors"
	"fmt"
	"slices"
	"strconv"
	"strings"

	"github.com/jackc/pgx/v5"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/rawcodec"
)

const deadLetterSQL = `
INSERT INTO dead_letter (inbox_key, subject, stream_seq, raw, reason, detail, created_at)
VALUES (decode($1, 'hex'), $2, $3, $4, $5, $6, $7)
ON CONFLICT (inbox_key) DO NOTHING`

// DeadLetter implements consumer.Store: it keeps the message as received
// with its reason code (lower-case words joined by "-", e.g. "invalid-json")
// and a detail that must name the field or entry at fault, never a value.
// A second call for the same InboxKey does nothing.
func (s *Store) DeadLetter(ctx context.Context, msg consumer.Message, reason, detail string) error {
	_, err := s.pool.Exec(ctx, deadLetterSQL, msg.InboxKey, msg.Subject, int64(msg.StreamSeq), orNil(msg.Raw),
		reason, detail, s.now().UTC())
	return translate("dead letter", err, false)
}

func orNil(b []byte) []byte {
	if b == nil {
		return []byte{}
	}
	return b
}

const (
	claimOutboxSQL = `
SELECT seq, subject, msg_id, headers::text, stored_payload, payload_sha256, payload_size
FROM outbox
WHERE published_at IS NULL AND seq > $2
ORDER BY seq
LIMIT $1
FOR UPDATE SKIP LOCKED`

	// Claimed rows whose previous version (either resource of it) is
	// unpublished and not in this claim: another relay holds it locked
	// (SKIP LOCKED passed it), or an earlier page of this pass left it.
	// The message ids are looked up by their unique index.
	heldBehindSQL = `
SELECT DISTINCT c.seq
FROM unnest($1::bigint[], $2::text[]) AS c(seq, prev)
JOIN outbox e ON e.msg_id = c.prev
WHERE e.published_at IS NULL AND NOT e.seq = ANY($3::bigint[])`

	markPublishedSQL = `
UPDATE outbox SET published_at = $2
WHERE seq = ANY($1::bigint[]) AND published_at IS NULL`
)

// RelayOutbox relays the first unpublished rows (RelayOutboxFrom from the
// start) and returns how many it marked.
func (s *Store) RelayOutbox(ctx context.Context, limit int, publish func(context.Context, []consumer.OutboxMessage) ([]int64, error)) (int, error) {
	res, err := s.RelayOutboxFrom(ctx, 0, limit, publish)
	return res.Marked, err
}

// claimedRow is an outbox row as claimed, before it is checked.
type claimedRow struct {
	m       consumer.OutboxMessage
	headers string
	stored  []byte
	sum     []byte
	size    *int32
}

// RelayOutboxFrom implements consumer.Store. Rows claimed by another relay
// are skipped, not waited for. Sequence numbers that publish returns but did
// not claim are ignored. When publish returns an error, the rows it reports
// as published are still marked, the transaction commits, and the error is
// returned wrapped ("publish outbox: ...") with the counts.
//
// Each claimed row is checked before publish sees it (checkOutbox): the
// exact bytes recorded, whether stored compressed (0018) or plain. A row
// that is not verifiably those bytes is never published: it is returned in
// Skipped (wrapping consumer.ErrDamagedPayload), with the later versions
// of its derivation in this page, and the other rows are published; damage
// alone is not an error of the call. A row whose previous version (of
// either resource) is unpublished and not in this claim is skipped as held
// (Err nil), with the later versions of its derivation in this page
// (heldBehind): another relay may hold that version locked. The stored dictionaries are read
// once, and only for a frame of a dictionary this binary does not embed,
// in a savepoint: when they cannot be read at all, the rows that need them
// are skipped with that error, which the call also returns, while the
// rows that do not need them are published.
func (s *Store) RelayOutboxFrom(ctx context.Context, after int64, limit int, publish func(context.Context, []consumer.OutboxMessage) ([]int64, error)) (consumer.RelayResult, error) {
	var res consumer.RelayResult
	if limit <= 0 {
		return res, nil
	}
	var pubErr error
	err := s.inTx(ctx, "relay outbox", func(tx pgx.Tx) error {
		res, pubErr = consumer.RelayResult{}, nil
		rows, err := tx.Query(ctx, claimOutboxSQL, limit, after)
		if err != nil {
			return fmt.Errorf("claim outbox: %w", err)
		}
		claimed, err := pgx.CollectRows(rows, func(row pgx.CollectableRow) (claimedRow, error) {
			var c claimedRow
			err := row.Scan(&c.m.Seq, &c.m.Subject, &c.m.MsgID, &c.headers, &c.stored, &c.sum, &c.size)
			return c, err
		})
		if err != nil {
			return fmt.Errorf("claim outbox: %w", err)
		}
		if len(claimed) == 0 {
			return nil
		}
		res.Claimed, res.Last = len(claimed), claimed[len(claimed)-1].m.Seq
		var dicts *dictionarySet
		var dictErr error
		loaded := false
		stored := func() (*dictionarySet, error) {
			if !loaded {
				loaded = true
				dicts, dictErr = savepointDictionaries(ctx, tx)
			}
			return dicts, dictErr
		}
		behind, err := heldBehind(ctx, tx, claimed)
		if err != nil {
			return err
		}
		ready := make([]consumer.OutboxMessage, 0, len(claimed))
		var unavailable error
		failed := map[string]bool{}
		for _, c := range claimed {
			chain := c.m.MsgID
			if j := strings.LastIndex(chain, "/_history/"); j >= 0 {
				chain = chain[:j]
			}
			if behind[c.m.Seq] {
				failed[chain] = true
			}
			if failed[chain] {
				res.Skipped = append(res.Skipped, consumer.SkippedRow{Seq: c.m.Seq, MsgID: c.m.MsgID})
				continue
			}
			m, err := checkOutbox(c, stored)
			if err != nil {
				failed[chain] = true
				res.Skipped = append(res.Skipped, consumer.SkippedRow{Seq: c.m.Seq, MsgID: c.m.MsgID, Err: err})
				if !errors.Is(err, consumer.ErrDamagedPayload) {
					unavailable = cmp.Or(unavailable, err)
				}
				continue
			}
			ready = append(ready, m)
		}
		var published []int64
		if len(ready) > 0 {
			published, pubErr = publish(ctx, ready)
		}
		if unavailable != nil {
			pubErr = errors.Join(fmt.Errorf("not published: %w", unavailable), pubErr)
		}
		var seqs []int64
		for _, seq := range published {
			if slices.ContainsFunc(ready, func(m consumer.OutboxMessage) bool { return m.Seq == seq }) {
				seqs = append(seqs, seq)
			}
		}
		if len(seqs) == 0 {
			return nil
		}
		tag, err := tx.Exec(ctx, markPublishedSQL, seqs, s.now().UTC())
		if err != nil {
			return fmt.Errorf("mark published: %w", err)
		}
		res.Marked = int(tag.RowsAffected())
		return nil
	})
	if err != nil {
		return consumer.RelayResult{}, err
	}
	if pubErr != nil {
		return res, fmt.Errorf("publish outbox: %w", pubErr)
	}
	return res, nil
}

// heldBehind returns the claimed rows that must wait for an unpublished
// earlier version outside the claim: version N of "<Type>/<id>/_history/N"
// waits while "Observation/<id>/_history/N-1" or "Provenance/<id>/_history/N-1"
// is unpublished. Checking the previous version suffices: no version is
// published while its previous one is not. This keeps the order across
// relays, which SKIP LOCKED alone does not.
func heldBehind(ctx context.Context, tx pgx.Tx, claimed []claimedRow) (map[int64]bool, error) {
	var seqs []int64
	var prevs []string
	for _, c := range claimed {
		rest, ok := strings.CutPrefix(c.m.MsgID, "Observation/")
		if !ok {
			if rest, ok = strings.CutPrefix(c.m.MsgID, "Provenance/"); !ok {
				continue
			}
		}
		j := strings.LastIndex(rest, "/_history/")
		if j < 0 {
			continue
		}
		v, err := strconv.Atoi(rest[j+len("/_history/"):])
		if err != nil || v <= 1 {
			continue
		}
		prev := rest[:j] + "/_history/" + strconv.Itoa(v-1)
		seqs = append(seqs, c.m.Seq, c.m.Seq)
		prevs = append(prevs, "Observation/"+prev, "Provenance/"+prev)
	}
	held := map[int64]bool{}
	if len(seqs) == 0 {
		return held, nil
	}
	all := make([]int64, len(claimed))
	for i, c := range claimed {
		all[i] = c.m.Seq
	}
	rows, err := tx.Query(ctx, heldBehindSQL, seqs, prevs, all)
	if err != nil {
		return nil, fmt.Errorf("claim outbox: earlier versions: %w", err)
	}
	got, err := pgx.CollectRows(rows, pgx.RowTo[int64])
	if err != nil {
		return nil, fmt.Errorf("claim outbox: earlier versions: %w", err)
	}
	for _, seq := range got {
		held[seq] = true
	}
	return held, nil
}

// savepointDictionaries reads the writer's stored outbox dictionaries in a
// savepoint of tx, so that a failure to read them (the table gone, the
// right revoked) does not abort the relay's transaction.
func savepointDictionaries(ctx context.Context, tx pgx.Tx) (*dictionarySet, error) {
	sp, err := tx.Begin(ctx)
	if err != nil {
		return nil, fmt.Errorf("read dictionaries: %w", err)
	}
	ds, err := loadDictionaries(ctx, sp, writerDictionariesSQL, "raw_dictionary")
	if err != nil {
		_ = sp.Rollback(ctx) // a broken connection fails the marking after it
		return nil, err
	}
	if err := sp.Commit(ctx); err != nil {
		return nil, fmt.Errorf("read dictionaries: %w", err)
	}
	return ds, nil
}

// checkOutbox returns a claimed row as it is published: its headers, and
// the exact bytes recorded for it (verifyStored). A frame is decoded with
// the embedded outbox dictionary, or the stored one it names. Anything
// wrong with the row is an error wrapping consumer.ErrDamagedPayload,
// except a failure to read the stored dictionaries, which says nothing
// about the row.
func checkOutbox(c claimedRow, stored func() (*dictionarySet, error)) (consumer.OutboxMessage, error) {
	m := c.m
	decode := func(frame []byte) ([]byte, error) {
		id := rawcodec.FrameDictID(frame)
		if id == 0 || slices.ContainsFunc(rawcodec.Embedded(), func(d rawcodec.Dictionary) bool { return d.ID == id }) {
			return rawcodec.Outbox().Decode(frame)
		}
		ds, err := stored()
		if err != nil {
			return nil, notChecked{fmt.Errorf("frame of dictionary %#x not checked: %w", id, err)}
		}
		return ds.decode(frame)
	}
	var size *int64
	if c.size != nil {
		n := int64(*c.size)
		size = &n
	}
	h, b, _, err := verifyStored(c.headers, c.stored, c.sum, size, decode)
	if err != nil {
		return m, fmt.Errorf("outbox %d: %w", m.Seq, err)
	}
	m.Header, m.Payload = h, b
	return m, nil
}

// notChecked is a failure of a decode function of verifyStored that says
// nothing about the row (the stored dictionaries could not be read).
type notChecked struct{ error }

func (e notChecked) Unwrap() error { return e.error }

// verifyStored is the one check of an outbox row's stored form, used by
// the relay (checkOutbox) and by the audit (CheckOutputs), so that the
// audit names every row the relay holds back as damaged: the headers
// (jsonb as text) must be a JSON object of strings; a frame must decode
// (decode: with the relay's dictionaries, or the audit's stored ones) to
// bytes whose SHA-256 and size are sum and size, stored beside it; plain
// bytes (a row written before migration 0018) are their own record and
// have no stored digest. It returns the headers, the exact bytes, and
// whether the row was a frame. An error wraps consumer.ErrDamagedPayload,
// except a notChecked error of decode, returned as it is.
func verifyStored(headers string, stored, sum []byte, size *int64, decode func([]byte) ([]byte, error)) (map[string]string, []byte, bool, error) {
	damaged := func(format string, a ...any) error {
		return fmt.Errorf("%w: %w", consumer.ErrDamagedPayload, fmt.Errorf(format, a...))
	}
	var h map[string]string
	if err := json.Unmarshal([]byte(headers), &h); err != nil {
		return nil, nil, false, damaged("headers are not a JSON object of strings: %w", err)
	}
	if !rawcodec.IsCompressed(stored) {
		return h, stored, false, nil
	}
	b, err := decode(stored)
	if err != nil {
		if errors.As(err, new(notChecked)) {
			return nil, nil, true, err
		}
		return nil, nil, true, damaged("%w", err)
	}
	got := sha256.Sum256(b)
	if len(sum) != len(got) || !slices.Equal(sum, got[:]) {
		return nil, nil, true, damaged("%w: decoded bytes SHA-256 %x, stored %x", ErrOutputMismatch, got, sum)
	}
	if size == nil || *size != int64(len(b)) {
		n := "none"
		if size != nil {
			n = strconv.FormatInt(*size, 10)
		}
		return nil, nil, true, damaged("%w: decoded %d bytes, stored size %s", ErrOutputMismatch, len(b), n)
	}
	return h, b, true, nil
}

const backlogSQL = `SELECT count(*) FROM outbox WHERE published_at IS NULL`

// OutboxBacklog implements consumer.Store.
func (s *Store) OutboxBacklog(ctx context.Context) (int64, error) {
	var n int64
	err := s.pool.QueryRow(ctx, backlogSQL).Scan(&n)
	return n, translate("outbox backlog", err, false)
}

const unpublishedSQL = `
SELECT coalesce(array_agg(seq ORDER BY seq), '{}') FROM outbox
WHERE seq = ANY($1::bigint[]) AND published_at IS NULL`

// OutboxUnpublished implements consumer.Store.
func (s *Store) OutboxUnpublished(ctx context.Context, seqs []int64) ([]int64, error) {
	var left []int64
	err := s.pool.QueryRow(ctx, unpublishedSQL, seqs).Scan(&left)
	return left, translate("outbox unpublished", err, false)
}

// Ping implements consumer.Store: a round trip on a pooled connection.
func (s *Store) Ping(ctx context.Context) error {
	return translate("ping", s.pool.Ping(ctx), false)
}
