package postgres

import (
	"context"
	"encoding/hex"
	"fmt"
)

// OutputCheck is what CheckOutputs found.
type OutputCheck struct {
	// Compressed and Plain count the outbox rows whose stored form is
	// verified: a frame that decodes with a stored dictionary to bytes of
	// the stored SHA-256 and size, or plain bytes (rows written before
	// migration 0018) of the digest and size the view gives.
	Compressed, Plain int64
	StoredBytes       int64    // their stored bytes (frame or plain)
	PayloadBytes      int64    // their exact bytes
	Failed            []string // each row (and dictionary row) refused, with the reason
}

const (
	outputsSQL = `
SELECT derivation_id, seq, msg_id, headers::text, payload, payload_digest, size_bytes, payload_zstd
FROM review_published
WHERE derivation_id > $1
ORDER BY derivation_id, resource_type
LIMIT $2`

	// Outbox rows of no stored derivation version: review_published,
	// which carries the bytes, does not show them.
	unmatchedOutputsSQL = `
SELECT o.seq, o.msg_id FROM review_outbox o
WHERE NOT EXISTS (SELECT 1 FROM review_published p WHERE p.seq = o.seq)
ORDER BY o.seq`
)

// CheckOutputs re-verifies every stored outbox payload through the
// reviewer's views alone (review_published, review_outbox,
// review_dictionary): a frame must decode with a dictionary the database
// stores (never the one this binary embeds: the database must suffice), to
// bytes whose SHA-256 and size are payload_digest and size_bytes (the
// payload_sha256 and payload_size stored beside the frame). A stored
// dictionary row that does not hold the dictionary of its ID is refused,
// and so is each frame that needed it; an outbox row that names no stored
// derivation version is refused as unverifiable (the views do not show
// its bytes). It reads in derivation order and pages of batch rows (at
// least 3: a version's Observation and Provenance stay in one page).
func CheckOutputs(ctx context.Context, q querier, batch int) (OutputCheck, error) {
	var out OutputCheck
	batch = max(batch, 3)
	ds, err := loadDictionaries(ctx, q, reviewerDictionariesSQL, "review_dictionary")
	if err != nil {
		return out, err
	}
	out.Failed = append(out.Failed, ds.badRows()...)
	var after int64
	for {
		rows, err := q.Query(ctx, outputsSQL, after, batch)
		if err != nil {
			return out, fmt.Errorf("read outputs: %w", err)
		}
		type row struct {
			derivation, seq int64
			msgID, headers  string
			payload         []byte
			digest          string
			size            int64
			frame           []byte
		}
		var page []row
		for rows.Next() {
			var r row
			if err := rows.Scan(&r.derivation, &r.seq, &r.msgID, &r.headers, &r.payload, &r.digest, &r.size, &r.frame); err != nil {
				rows.Close()
				return out, fmt.Errorf("read outputs: %w", err)
			}
			page = append(page, r)
		}
		if err := rows.Err(); err != nil {
			return out, fmt.Errorf("read outputs: %w", err)
		}
		full := len(page) == batch
		if full {
			// The last derivation may go on in the next page.
			last := page[len(page)-1].derivation
			for len(page) > 0 && page[len(page)-1].derivation == last {
				page = page[:len(page)-1]
			}
		}
		for _, r := range page {
			after = r.derivation
			stored := r.payload
			if r.frame != nil {
				stored = r.frame
			}
			var sum []byte
			if r.frame != nil {
				// The view gives the stored payload_sha256 of a frame, and
				// the SHA-256 of the bytes themselves of a plain row.
				if sum, err = hex.DecodeString(r.digest); err != nil {
					sum = nil // then no digest matches
				}
			}
			_, b, compressed, err := verifyStored(r.headers, stored, sum, &r.size, ds.decode)
			if err != nil {
				out.Failed = append(out.Failed, fmt.Sprintf("outbox %d (%s): %v", r.seq, r.msgID, err))
				continue
			}
			if compressed {
				out.Compressed++
			} else {
				out.Plain++
			}
			out.StoredBytes += int64(len(stored))
			out.PayloadBytes += int64(len(b))
		}
		if !full {
			break
		}
	}
	rows, err := q.Query(ctx, unmatchedOutputsSQL)
	if err != nil {
		return out, fmt.Errorf("read outputs: %w", err)
	}
	defer rows.Close()
	for rows.Next() {
		var seq int64
		var msgID string
		if err := rows.Scan(&seq, &msgID); err != nil {
			return out, fmt.Errorf("read outputs: %w", err)
		}
		out.Failed = append(out.Failed, fmt.Sprintf("outbox %d (%s): names no stored derivation version: its bytes are not in review_published, not verified", seq, msgID))
	}
	if err := rows.Err(); err != nil {
		return out, fmt.Errorf("read outputs: %w", err)
	}
	return out, nil
}
