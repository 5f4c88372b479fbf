// Package rawcodec stores the inbox payload (the message bytes exactly as
// received) compressed with zstd and a trained dictionary, and reads it back.
//
// A stored value that begins with the zstd frame magic 0x28B52FFD is a zstd
// frame; anything else is a plain row written before compression existed and
// is returned unchanged. Encode compresses every payload, even one that itself
// begins with the magic, so a value written by Encode is never ambiguous. The
// frame names its dictionary by ID; a reader that lacks that dictionary gets
// an error, never a guess.
//
// Not yet wired into consumer/postgres: the inbox writers and readers still
// store plain bytes.
package rawcodec

import (
	"bytes"
	"errors"
	"fmt"

	"github.com/klauspost/compress/dict"
	"github.com/klauspost/compress/zstd"
)

// Magic is the zstd frame magic number as it appears on disk (RFC 8878 §3.1.1).
var Magic = []byte{0x28, 0xB5, 0x2F, 0xFD}

// ErrCorrupt wraps every decode failure of a value that carries the magic.
var ErrCorrupt = errors.New("rawcodec: stored payload is a zstd frame that does not decode")

// Codec encodes with one dictionary and decodes with any of the known ones.
type Codec struct {
	id  uint32
	enc *zstd.Encoder
	dec *zstd.Decoder
}

// New builds a codec that writes with current and reads frames made with
// current or any of older. Each dictionary must be in zstd dictionary format.
func New(current []byte, older ...[]byte) (*Codec, error) {
	id, err := DictID(current)
	if err != nil {
		return nil, err
	}
	enc, err := zstd.NewWriter(nil, zstd.WithEncoderDict(current), zstd.WithEncoderConcurrency(1),
		zstd.WithEncoderCRC(true))
	if err != nil {
		return nil, fmt.Errorf("rawcodec: encoder: %w", err)
	}
	all := append([][]byte{current}, older...)
	dec, err := zstd.NewReader(nil, zstd.WithDecoderDicts(all...), zstd.WithDecoderConcurrency(1),
		zstd.WithDecoderMaxMemory(64<<20))
	if err != nil {
		return nil, fmt.Errorf("rawcodec: decoder: %w", err)
	}
	return &Codec{id: id, enc: enc, dec: dec}, nil
}

// ID is the dictionary ID written into every frame this codec encodes.
func (c *Codec) ID() uint32 { return c.id }

// Encode returns the stored form of raw: a zstd frame naming the dictionary.
func (c *Codec) Encode(raw []byte) []byte {
	return c.enc.EncodeAll(raw, make([]byte, 0, len(raw)/2+64))
}

// Decode returns the original bytes of a stored value: plain values as they
// are, zstd frames decompressed (checksum verified). A frame made with an
// unknown dictionary, or damaged, is an error wrapping ErrCorrupt.
func (c *Codec) Decode(stored []byte) ([]byte, error) {
	if !IsCompressed(stored) {
		return stored, nil
	}
	out, err := c.dec.DecodeAll(stored, nil)
	if err != nil {
		return nil, fmt.Errorf("%w: %v", ErrCorrupt, err)
	}
	return out, nil
}

// IsCompressed reports whether stored begins with the zstd frame magic.
func IsCompressed(stored []byte) bool { return bytes.HasPrefix(stored, Magic) }

// DictID reads the ID of a zstd-format dictionary (RFC 8878 §5: magic
// 0xEC30A437, then the ID, both little-endian).
func DictID(d []byte) (uint32, error) {
	if len(d) < 8 || !bytes.Equal(d[:4], []byte{0x37, 0xA4, 0x30, 0xEC}) {
		return 0, errors.New("rawcodec: not a zstd dictionary")
	}
	id := uint32(d[4]) | uint32(d[5])<<8 | uint32(d[6])<<16 | uint32(d[7])<<24
	if id == 0 {
		return 0, errors.New("rawcodec: dictionary ID 0 is reserved")
	}
	return id, nil
}

// Train builds a zstd dictionary of at most maxSize bytes with the given ID
// from sample payloads. A site retrains by collecting its own inbox payloads
// (decoded), calling Train with a new ID, and adding the result as the current
// dictionary while keeping the older ones for reading.
func Train(samples [][]byte, id uint32, maxSize int) ([]byte, error) {
	if id == 0 {
		return nil, errors.New("rawcodec: dictionary ID 0 is reserved")
	}
	d, err := dict.BuildZstdDict(samples, dict.Options{MaxDictSize: maxSize, HashBytes: 6, ZstdDictID: id})
	if err != nil {
		return nil, fmt.Errorf("rawcodec: train: %w", err)
	}
	return d, nil
}
