package postgres

import (
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"slices"
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
SELECT seq, subject, msg_id, headers::text, stored_payload, payload_sha256
FROM outbox
WHERE published_at IS NULL AND seq > $2
ORDER BY seq
LIMIT $1
FOR UPDATE SKIP LOCKED`

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

// RelayOutboxFrom implements consumer.Store. Rows claimed by another relay
// are skipped, not waited for. Sequence numbers that publish returns but did
// not claim are ignored. When publish returns an error, the rows it reports
// as published are still marked, the transaction commits, and the error is
// returned wrapped ("publish outbox: ...") with the counts.
func (s *Store) RelayOutboxFrom(ctx context.Context, after int64, limit int, publish func(context.Context, []consumer.OutboxMessage) ([]int64, error)) (consumer.RelayResult, error) {
	var res consumer.RelayResult
	if limit <= 0 {
		return res, nil
	}
	var pubErr error
	err := s.inTx(ctx, "relay outbox", func(tx pgx.Tx) error {
		res = consumer.RelayResult{}
		rows, err := tx.Query(ctx, claimOutboxSQL, limit, after)
		if err != nil {
			return fmt.Errorf("claim outbox: %w", err)
		}
		var sums [][]byte
		msgs, err := pgx.CollectRows(rows, func(row pgx.CollectableRow) (consumer.OutboxMessage, error) {
			var m consumer.OutboxMessage
			var headers string
			var sum []byte
			if err := row.Scan(&m.Seq, &m.Subject, &m.MsgID, &headers, &m.Payload, &sum); err != nil {
				return m, err
			}
			if err := json.Unmarshal([]byte(headers), &m.Header); err != nil {
				return m, fmt.Errorf("outbox headers of seq %d: %w", m.Seq, err)
			}
			sums = append(sums, sum)
			return m, nil
		})
		if err != nil {
			return fmt.Errorf("claim outbox: %w", err)
		}
		if len(msgs) == 0 {
			return nil
		}
		res.Claimed, res.Last = len(msgs), msgs[len(msgs)-1].Seq
		// The exact bytes recorded, whether stored compressed (0018) or
		// plain. A row that does not decode to the SHA-256 stored with it
		// is never published: it stays unpublished with the later versions
		// of its derivation in this page (as a failed publish leaves them),
		// the pass reports it, and the rest are published.
		ready := msgs[:0:0]
		var decodeErr error
		failed := map[string]bool{}
		for i, m := range msgs {
			chain := m.MsgID
			if j := strings.LastIndex(chain, "/_history/"); j >= 0 {
				chain = chain[:j]
			}
			p, err := decodePublished(ctx, tx, writerDictionariesSQL, m.Seq, m.Payload, sums[i])
			switch {
			case err != nil && !errors.Is(err, rawcodec.ErrCorrupt) && !errors.Is(err, ErrOutputMismatch):
				return fmt.Errorf("claim outbox: %w", err)
			case err != nil:
				decodeErr = cmp.Or(decodeErr, err)
				failed[chain] = true
				continue
			case failed[chain]:
				continue
			}
			m.Payload = p
			ready = append(ready, m)
		}
		var published []int64
		if len(ready) > 0 {
			published, pubErr = publish(ctx, ready)
		}
		if decodeErr != nil {
			pubErr = errors.Join(fmt.Errorf("not published: %w", decodeErr), pubErr)
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

const backlogSQL = `SELECT count(*) FROM outbox WHERE published_at IS NULL`

// OutboxBacklog implements consumer.Store.
func (s *Store) OutboxBacklog(ctx context.Context) (int64, error) {
	var n int64
	err := s.pool.QueryRow(ctx, backlogSQL).Scan(&n)
	return n, translate("outbox backlog", err, false)
}

// Ping implements consumer.Store: a round trip on a pooled connection.
func (s *Store) Ping(ctx context.Context) error {
	return translate("ping", s.pool.Ping(ctx), false)
}
