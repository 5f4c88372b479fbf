package main

import (
	"crypto/sha256"
	"encoding/hex"
	"sync"
	"testing"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/scenario"
	"github.com/ventderive/ventderive/consumer/rawcodec"
	"github.com/ventderive/ventderive/fhirmap"
)

// The service's CPU per input message outside NATS and PostgreSQL, step by
// step, over the bench's own messages (benchMessages: 4 copies of the
// invented unit, 10,000 messages, 98% ventilator readings), so that one
// `go test -run '^$' -bench ServiceSteps ./cmd/ventderive` shows the split
// the bench's cost ladder measures end to end. Each iteration is one
// message, taken in turn; ns/op is per message.
var stepMsgs struct {
	sync.Once
	msgs []benchMsg
}

func serviceStepMsgs() []benchMsg {
	stepMsgs.Do(func() { stepMsgs.msgs = benchMessages(1, 4, 10000, scenario.MinDuration) })
	return stepMsgs.msgs
}

func BenchmarkServiceSteps(b *testing.B) {
	msgs := serviceStepMsgs()
	codes := fhirmap.DefaultCodes()
	if url := fhirmap.DefaultSite().CodeSystemURL; url != "" {
		codes = codes.WithCodeSystemURL(url)
	}
	var payload int64
	for _, m := range msgs {
		payload += int64(len(m.payload))
	}
	each := func(b *testing.B, fn func(m benchMsg)) {
		b.ReportAllocs()
		b.SetBytes(payload / int64(len(msgs)))
		i := 0
		for b.Loop() {
			fn(msgs[i%len(msgs)])
			i++
		}
	}
	// The inbox key: the hex SHA-256 of the payload (consumer.Pipeline's
	// receive).
	b.Run("step=sha256", func(b *testing.B) {
		each(b, func(m benchMsg) {
			sum := sha256.Sum256(m.payload)
			_ = hex.EncodeToString(sum[:])
		})
	})
	// The stored payload: the zstd frame with the embedded dictionary, the
	// encoder every inbox writer calls (consumer/postgres storedRaw).
	b.Run("step=zstd", func(b *testing.B) {
		c := rawcodec.Inbox()
		each(b, func(m benchMsg) { _ = c.Encode(m.payload) })
	})
	// The strict decode and fact extraction (fhirmap.Decode, as the
	// pipeline calls it). Malformed messages of the unit fail here as in
	// the service.
	b.Run("step=decode", func(b *testing.B) {
		each(b, func(m benchMsg) { _, _ = fhirmap.Decode(m.payload, codes) })
	})
}

// TestServiceStepMsgsDecode guards the benchmark's input: almost every
// message decodes (the unit's few malformed ones do not) and yields facts,
// so the decode step measures the decoder's full path, not its refusals.
func TestServiceStepMsgsDecode(t *testing.T) {
	msgs := serviceStepMsgs()
	bad, facts := 0, 0
	for _, m := range msgs {
		d, err := fhirmap.Decode(m.payload, fhirmap.DefaultCodes())
		if err != nil {
			bad++
			continue
		}
		facts += len(d.Facts)
	}
	if len(msgs) != 10000 || bad > len(msgs)/100 || facts < 3*len(msgs) {
		t.Errorf("%d messages, %d malformed, %d facts: want 10000, at most 1%% malformed, at least 3 facts a message", len(msgs), bad, facts)
	}
}
