package consumer_test

import (
	"sync"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
)

// With group commit a replica pulls its next batch while a lane still
// commits a group of the last one (the lanes outlive the batches): a
// message of the second pull is received while the first pull's first
// message is held before its ingest. Pulls of 4 messages here; the held
// message is released after the check, and everything is then recorded as
// the offline derivation would.
func TestNextPullWhileLaneCommits(t *testing.T) {
	h := newHarness(t)
	h.cfg.Fetch = 4
	hold := make(chan struct{})
	var release sync.Once
	defer release.Do(func() { close(hold) })
	second := make(chan struct{})
	var seen sync.Once
	msgs := generate(genOpts{patients: 3, gases: 1})
	if len(msgs) < 9 {
		t.Fatalf("%d messages generated, want at least 9", len(msgs))
	}
	h.publish(msgs)
	h.startReplica(&consumer.Hooks{
		BeforeDecode: func(seq uint64) {
			if seq > 4 {
				seen.Do(func() { close(second) })
			}
		},
		BeforeIngest: func(seq uint64) {
			if seq == 1 {
				<-hold
			}
		},
	})
	select {
	case <-second:
	case <-time.After(10 * time.Second):
		t.Error("no message of the second pull was received within 10 s while the first pull's first message was held")
	}
	release.Do(func() { close(hold) })
	h.waitSettled(30 * time.Second)
	h.reconcile(msgs)
}
