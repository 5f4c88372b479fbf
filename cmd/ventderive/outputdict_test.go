package main

import (
	"bytes"
	"crypto/sha256"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/scenario"
	"github.com/ventderive/ventderive/consumer/rawcodec"
	"github.com/ventderive/ventderive/fhirmap"
)

// outputSamples derives, offline, what the service would publish for one
// invented scenario: every derived value's Observation and Provenance as
// published (version 1). The site is the bench's (its apparatus dead
// space, its pairing window).
func outputSamples(tb testing.TB, seed int64) (payloads [][]byte) {
	tb.Helper()
	sc := scenario.Generate(scenario.Options{Seed: seed, Duration: scenario.DefaultDuration})
	codes, _, err := loadCodes("")
	if err != nil {
		tb.Fatal(err)
	}
	site := fhirmap.DefaultSite()
	site.Window.Before, site.Window.After = scenario.PairingBefore, scenario.PairingAfter
	site.ApparatusDeadSpaceML, site.ApparatusDeadSpaceConfigured = scenario.ApparatusDeadSpaceML, true
	var facts []fhirmap.Fact
	for _, m := range sc.Messages {
		if d, err := fhirmap.Decode(m.Payload, codes); err == nil {
			facts = append(facts, d.Facts...)
		}
	}
	ds, _ := fhirmap.DeriveAll(facts, site)
	recorded := sc.Start.Add(sc.Duration)
	for _, d := range ds {
		obs, err := fhirmap.EncodeObservation(d, 1, site)
		if err != nil {
			tb.Fatal(err)
		}
		prov, err := fhirmap.EncodeProvenance(d, 1, recorded, site)
		if err != nil {
			tb.Fatal(err)
		}
		payloads = append(payloads, obs, prov)
	}
	if len(ds) == 0 {
		tb.Fatalf("seed %d derived nothing", seed)
	}
	return payloads
}

// The training scenario (seed 3) is neither the bench's (seed 1) nor the
// one the dictionary is checked on here (seed 2).
const outputTrainSeed, outputTestSeed = 3, 2

var outputTest struct {
	sync.Once
	payloads [][]byte
}

func outputTestSamples(tb testing.TB) (payloads [][]byte) {
	outputTest.Do(func() { outputTest.payloads = outputSamples(tb, outputTestSeed) })
	return outputTest.payloads
}

// ratioOf encodes every sample with c, checks that each decodes to its
// exact bytes, and returns the bytes in over the bytes stored.
func ratioOf(t *testing.T, c *rawcodec.Codec, samples [][]byte) (in, out int) {
	t.Helper()
	for i, s := range samples {
		z := c.Encode(s)
		if !rawcodec.IsCompressed(z) || rawcodec.FrameDictID(z) != c.ID() {
			t.Fatalf("sample %d: stored form is not a frame naming dictionary %#x", i, c.ID())
		}
		got, err := c.Decode(z)
		if err != nil || !bytes.Equal(got, s) {
			t.Fatalf("sample %d: round trip differs (%v)", i, err)
		}
		in, out = in+len(s), out+len(z)
	}
	return in, out
}

// TestOutputDictionaryFiles checks the dictionary the service compresses
// outbox payloads with (consumer/rawcodec/outbox.dict, embedded and stored
// in raw_dictionary at migrate): the embedded dictionaries' IDs are the
// ones the codecs name, every payload of an invented scenario it was not
// trained on round-trips to its exact bytes, and it compresses them at
// least 8 to 1. The bound is below what was measured when it was trained
// (10.5 to 1 on seed 2; logged, and in the README) and leaves room for a
// retrained dictionary. With -update it is retrained, 16 KiB, from seed 3's
// payloads, by the reference zstd's dictionary builder (trainWithZstd).
func TestOutputDictionaryFiles(t *testing.T) {
	if updateGoldens() {
		trainWithZstd(t, "../../consumer/rawcodec/outbox.dict", rawcodec.OutboxDictionaryID, outputSamples(t, outputTrainSeed))
		t.Skip("outbox.dict rewritten; run again without -update to check it")
	}
	for _, d := range rawcodec.Embedded() {
		id, err := rawcodec.DictID(d.Data)
		if err != nil || id != d.ID {
			t.Fatalf("embedded %s dictionary has ID %#x (%v), the codec names %#x", d.Kind, id, err, d.ID)
		}
	}
	payloads := outputTestSamples(t)
	start := time.Now()
	in, out := ratioOf(t, rawcodec.Outbox(), payloads)
	t.Logf("outbox: %d payloads, %d -> %d bytes (%.0f a payload), %.1f to 1, %s", len(payloads), in, out,
		float64(out)/float64(len(payloads)), float64(in)/float64(out), time.Since(start))
	if float64(in)/float64(out) < 8 {
		t.Errorf("outbox dictionary: %.2f to 1, want at least 8", float64(in)/float64(out))
	}
}

// trainWithZstd writes a dictionary of at most 16 KiB with the given ID,
// trained on samples by the reference implementation's builder (Debian's
// zstd package: `zstd --train`, the COVER algorithm). It is the one used
// rather than rawcodec.Train (klauspost/compress/dict): on the same seed 3
// outputs, checked on seed 2 at the codec's level, klauspost's dictionary
// left an Observation or Provenance at 604 bytes on average, `zstd
// --train`'s at 279 (measured 2026-12-04).
func trainWithZstd(t *testing.T, out string, id uint32, samples [][]byte) {
	t.Helper()
	bin, err := exec.LookPath("zstd")
	if err != nil {
		t.Fatal("retraining needs the zstd command (Debian: apt-get install zstd)")
	}
	dir := t.TempDir()
	args := []string{"--train", "-q", "--maxdict=16384", fmt.Sprintf("--dictID=%d", id), "-o", out}
	for i, s := range samples {
		name := filepath.Join(dir, fmt.Sprintf("%05d", i))
		if err := os.WriteFile(name, s, 0o644); err != nil {
			t.Fatal(err)
		}
		args = append(args, name)
	}
	if b, err := exec.Command(bin, args...).CombinedOutput(); err != nil {
		t.Fatalf("zstd --train: %v: %s", err, b)
	}
	t.Logf("%s: %d samples", out, len(samples))
}

// BenchmarkOutputCodec is the service CPU the compression adds: per outbox
// payload the writer's SHA-256 and encode and the relay's decode (seed 2's
// outputs, the embedded outbox dictionary).
func BenchmarkOutputCodec(b *testing.B) {
	payloads := outputTestSamples(b)
	stored := make([][]byte, len(payloads))
	for i, p := range payloads {
		stored[i] = rawcodec.Outbox().Encode(p)
	}
	b.Run("outbox-write", func(b *testing.B) {
		for i := 0; b.Loop(); i++ {
			p := payloads[i%len(payloads)]
			_ = sha256.Sum256(p)
			_ = rawcodec.Outbox().Encode(p)
		}
	})
	b.Run("outbox-relay-decode", func(b *testing.B) {
		for i := 0; b.Loop(); i++ {
			if _, err := rawcodec.Outbox().Decode(stored[i%len(stored)]); err != nil {
				b.Fatal(err)
			}
		}
	})
}
