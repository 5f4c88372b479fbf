package consumer

import (
	"context"
	"fmt"
	"log/slog"
	"sync"
	"sync/atomic"
	"testing"
	"time"
)

// overlapStore reports one damaged row on every relay call and records how
// many relay calls ran at once: each call waits a while for another to
// begin, so that two passes running together are seen.
type overlapStore struct {
	Store
	inFlight, most atomic.Int32
	calls          atomic.Int32
}

func (s *overlapStore) RelayOutboxFrom(ctx context.Context, _ int64, _ int, _ func(context.Context, []OutboxMessage) ([]int64, error)) (RelayResult, error) {
	n := s.inFlight.Add(1)
	defer s.inFlight.Add(-1)
	for {
		if m := s.most.Load(); n <= m || s.most.CompareAndSwap(m, n) {
			break
		}
	}
	s.calls.Add(1)
	deadline := time.Now().Add(150 * time.Millisecond)
	for time.Now().Before(deadline) && s.inFlight.Load() < 2 {
		time.Sleep(time.Millisecond)
	}
	seq := int64(7)
	return RelayResult{Claimed: 1, Last: seq, Skipped: []SkippedRow{{Seq: seq, MsgID: "Observation/d-7/_history/1",
		Err: fmt.Errorf("outbox %d: %w: invented damage", seq, ErrDamagedPayload)}}}, nil
}

func (s *overlapStore) OutboxBacklog(context.Context) (int64, error) { return 1, nil }

// Two relayAll calls (the relay loop kicked by the last commits, and the
// final flush of Run) never run passes at once: they share the damage
// state (damaged, damageLogged). Without relayMu the store sees two calls
// in flight, and `go test -race` reports the unguarded maps.
func TestRelayAllCallsDoNotOverlap(t *testing.T) {
	s := &overlapStore{}
	p := &Pipeline{store: s, metrics: NewMetrics(nil), log: slog.New(slog.DiscardHandler), now: time.Now}
	var wg sync.WaitGroup
	for range 2 {
		wg.Go(func() { p.relayAll(context.Background()) })
	}
	wg.Wait()
	if s.calls.Load() != 2 {
		t.Fatalf("relay calls = %d, want 2", s.calls.Load())
	}
	if m := s.most.Load(); m != 1 {
		t.Fatalf("%d relay passes ran at once, want 1", m)
	}
	if len(p.damaged) != 1 || !p.damageLogged[7] {
		t.Fatalf("damage state = %v, logged %v", p.damaged, p.damageLogged)
	}
}
