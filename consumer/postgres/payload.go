package postgres

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/rawcodec"
)

// storedRaw is an inbox payload as the store keeps it (migration 0015): a
// zstd frame compressed with the embedded inbox dictionary, whose ID the
// frame names. Every writer of inbox.raw goes through it; nil stays NULL.
func storedRaw(raw []byte) []byte {
	if raw == nil {
		return nil
	}
	return rawcodec.Inbox().Encode(raw)
}

const (
	dictionariesSQL = `SELECT id, dictionary FROM raw_dictionary ORDER BY id DESC`
	payloadsSQL     = `
SELECT encode(inbox_key, 'hex'), raw FROM inbox
WHERE raw IS NOT NULL AND inbox_key > decode($1, 'hex') ORDER BY inbox_key LIMIT $2`
)

// PayloadCodec is the decoder of stored payloads over every dictionary the
// database holds (raw_dictionary), so that a reader needs only the
// database, not the binary that wrote the payloads.
func PayloadCodec(ctx context.Context, pool *pgxpool.Pool) (*rawcodec.Codec, error) {
	return storedCodec(ctx, pool, dictionariesSQL)
}

// DecodePayload is the one way to read a stored inbox payload: it decodes
// a compressed value (a plain one, written before 0015, is returned as it
// is) and checks that its SHA-256 is the inbox key. A payload that does not
// decode or does not match is refused, never returned.
func DecodePayload(c *rawcodec.Codec, inboxKey string, stored []byte) ([]byte, error) {
	raw, err := c.Decode(stored)
	if err != nil {
		return nil, fmt.Errorf("inbox %s: %w", inboxKey, err)
	}
	sum := sha256.Sum256(raw)
	if hex.EncodeToString(sum[:]) != inboxKey {
		return nil, fmt.Errorf("inbox %s: %w: its SHA-256 is %x", inboxKey, ErrPayloadMismatch, sum)
	}
	return raw, nil
}

// ErrPayloadMismatch: a stored payload whose SHA-256 is not its inbox key.
var ErrPayloadMismatch = errors.New("stored payload is not the payload received")

// PayloadCheck is what CheckPayloads found.
type PayloadCheck struct {
	Plain, Compressed int64    // payloads that decode and match their key
	StoredBytes       int64    // their stored bytes
	PayloadBytes      int64    // their bytes as received
	Failed            []string // inbox keys refused, with the reason
}

// CheckPayloads reads every stored inbox payload through DecodePayload, in
// key order and batches of batch rows (a bounded read, no long snapshot of
// the table in memory). It needs a role that reads inbox.raw: the service's
// writer and the reviewer roles do not.
func CheckPayloads(ctx context.Context, pool *pgxpool.Pool, batch int) (PayloadCheck, error) {
	var out PayloadCheck
	c, err := PayloadCodec(ctx, pool)
	if err != nil {
		return out, err
	}
	after := ""
	for {
		rows, err := pool.Query(ctx, payloadsSQL, after, batch)
		if err != nil {
			return out, fmt.Errorf("read payloads: %w", err)
		}
		n := 0
		for rows.Next() {
			var key string
			var stored []byte
			if err := rows.Scan(&key, &stored); err != nil {
				rows.Close()
				return out, fmt.Errorf("read payloads: %w", err)
			}
			n, after = n+1, key
			raw, err := DecodePayload(c, key, stored)
			if err != nil {
				out.Failed = append(out.Failed, err.Error())
				continue
			}
			if rawcodec.IsCompressed(stored) {
				out.Compressed++
			} else {
				out.Plain++
			}
			out.StoredBytes += int64(len(stored))
			out.PayloadBytes += int64(len(raw))
		}
		if err := rows.Err(); err != nil {
			return out, fmt.Errorf("read payloads: %w", err)
		}
		if n < batch {
			return out, nil
		}
	}
}
