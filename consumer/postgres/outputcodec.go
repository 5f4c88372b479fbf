package postgres

import (
	"context"
	"crypto/sha256"
	"errors"
	"fmt"
	"maps"
	"slices"

	"github.com/jackc/pgx/v5"

	"github.com/ventderive/ventderive/consumer/rawcodec"
)

// Outbox payloads as the store keeps them (migration 0018): zstd frames
// made with the embedded outbox dictionary. Rows written before stay plain;
// every reader goes through decodeOutput, which returns a plain value as it
// is. Derivation records are not compressed: derivation.record stays jsonb,
// which the reviewer's review_derivation_step view expands in SQL.

// storedOutbox is the stored form of an outbox payload with the SHA-256 and
// length of the exact bytes, which outbox.payload_sha256 and payload_size
// keep beside the frame (PostgreSQL cannot decompress it).
func storedOutbox(payload []byte) (stored, sum []byte, size int32) {
	s := sha256.Sum256(payload)
	return rawcodec.Outbox().Encode(payload), s[:], int32(len(payload))
}

// ErrOutputMismatch: a stored outbox payload whose decoded bytes are not
// the SHA-256 stored with it.
var ErrOutputMismatch = errors.New("stored outbox payload is not the bytes recorded for it")

// querier is what decodeOutput reads raw_dictionary through (a pool or a
// transaction).
type querier interface {
	Query(ctx context.Context, sql string, args ...any) (pgx.Rows, error)
}

// decodeOutput returns the exact bytes of a stored outbox payload: a plain
// value as it is, a frame decoded with the embedded dictionaries or, when
// it names one this binary does not embed (a newer replica's), with the
// dictionaries in the database (dictSQL: the rows id, dictionary of
// raw_dictionary or review_dictionary). A frame that does not decode is an
// error wrapping rawcodec.ErrCorrupt.
func decodeOutput(ctx context.Context, q querier, dictSQL string, stored []byte) ([]byte, error) {
	if !rawcodec.IsCompressed(stored) {
		return stored, nil
	}
	id := rawcodec.FrameDictID(stored)
	if id == 0 || slices.ContainsFunc(rawcodec.Embedded(), func(d rawcodec.Dictionary) bool { return d.ID == id }) {
		return rawcodec.Outbox().Decode(stored)
	}
	c, err := storedCodec(ctx, q, dictSQL)
	if err != nil {
		return nil, err
	}
	return c.Decode(stored)
}

const (
	writerDictionariesSQL   = `SELECT id, dictionary FROM raw_dictionary WHERE kind = 'outbox' ORDER BY id DESC`
	reviewerDictionariesSQL = `SELECT id, dictionary FROM review_dictionary ORDER BY id DESC`
)

// storedCodec decodes with every dictionary dictSQL returns (id,
// dictionary rows), each checked to hold the dictionary of its ID.
func storedCodec(ctx context.Context, q querier, dictSQL string) (*rawcodec.Codec, error) {
	ds, err := readDictionaryRows(ctx, q, dictSQL)
	if err != nil {
		return nil, err
	}
	if len(ds) == 0 {
		return nil, errors.New("read dictionaries: none stored in raw_dictionary (run ventderive migrate)")
	}
	var all [][]byte
	for _, d := range ds {
		if id, err := rawcodec.DictID(d.Dictionary); err != nil || int64(id) != d.ID {
			return nil, fmt.Errorf("raw_dictionary row %d does not hold the dictionary of that ID", d.ID)
		}
		all = append(all, d.Dictionary)
	}
	return rawcodec.New(all[0], all[1:]...)
}

// dictionaryRow is one (id, dictionary) row of raw_dictionary or
// review_dictionary, as stored: not yet checked to hold the dictionary of
// its ID.
type dictionaryRow struct {
	ID         int64
	Dictionary []byte
}

// readDictionaryRows reads the (id, dictionary) rows dictSQL returns.
func readDictionaryRows(ctx context.Context, q querier, dictSQL string) ([]dictionaryRow, error) {
	rows, err := q.Query(ctx, dictSQL)
	if err != nil {
		return nil, fmt.Errorf("read dictionaries: %w", err)
	}
	ds, err := pgx.CollectRows(rows, pgx.RowToStructByPos[dictionaryRow])
	if err != nil {
		return nil, fmt.Errorf("read dictionaries: %w", err)
	}
	return ds, nil
}

// decodePublished returns the exact bytes of a stored outbox payload and
// checks them against the SHA-256 stored with a compressed one (sum; nil
// for a plain row, whose bytes are their own record).
func decodePublished(ctx context.Context, q querier, dictSQL string, seq int64, stored, sum []byte) ([]byte, error) {
	b, err := decodeOutput(ctx, q, dictSQL, stored)
	if err != nil {
		return nil, fmt.Errorf("outbox %d: %w", seq, err)
	}
	if rawcodec.IsCompressed(stored) {
		got := sha256.Sum256(b)
		if len(sum) != len(got) || !slices.Equal(sum, got[:]) {
			return nil, fmt.Errorf("outbox %d: %w: decoded bytes SHA-256 %x, stored %x", seq, ErrOutputMismatch, got, sum)
		}
	}
	return b, nil
}

// dictionarySet decodes outbox frames with the dictionaries of stored
// rows (raw_dictionary, review_dictionary), one codec per intact row. A
// row that does not hold the dictionary of its ID spoils only the frames
// of that ID: it is kept in bad with the reason, never used.
type dictionarySet struct {
	codecs map[int64]*rawcodec.Codec
	bad    map[int64]string
	table  string // where the rows came from, for the reasons
}

// loadDictionaries reads the (id, dictionary) rows dictSQL returns. An
// error is a failure to read them at all (no table, no right, the
// connection): no frame it would decode is judged then.
func loadDictionaries(ctx context.Context, q querier, dictSQL, table string) (*dictionarySet, error) {
	ds, err := readDictionaryRows(ctx, q, dictSQL)
	if err != nil {
		return nil, err
	}
	set := &dictionarySet{codecs: map[int64]*rawcodec.Codec{}, bad: map[int64]string{}, table: table}
	for _, d := range ds {
		id, err := rawcodec.DictID(d.Dictionary)
		if err != nil || int64(id) != d.ID {
			set.bad[d.ID] = fmt.Sprintf("%s row %d does not hold the dictionary of that ID", table, d.ID)
			continue
		}
		c, err := rawcodec.New(d.Dictionary)
		if err != nil {
			set.bad[d.ID] = fmt.Sprintf("%s row %d: %v", table, d.ID, err)
			continue
		}
		set.codecs[d.ID] = c
	}
	return set, nil
}

// decode decodes a frame with the stored dictionary it names. A frame of
// no intact stored dictionary, or that does not decode, is an error
// wrapping rawcodec.ErrCorrupt.
func (ds *dictionarySet) decode(stored []byte) ([]byte, error) {
	id := int64(rawcodec.FrameDictID(stored))
	if c := ds.codecs[id]; c != nil {
		return c.Decode(stored)
	}
	if why, ok := ds.bad[id]; ok {
		return nil, fmt.Errorf("%w: frame of dictionary %#x: %s", rawcodec.ErrCorrupt, id, why)
	}
	return nil, fmt.Errorf("%w: frame names dictionary %#x, which %s does not hold", rawcodec.ErrCorrupt, id, ds.table)
}

// badRows lists the stored dictionary rows that are not usable, by ID.
func (ds *dictionarySet) badRows() []string {
	ids := slices.Sorted(maps.Keys(ds.bad))
	out := make([]string, len(ids))
	for i, id := range ids {
		out[i] = ds.bad[id]
	}
	return out
}
