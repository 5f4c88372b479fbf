package consumer

import (
	"bytes"
	"context"
	"fmt"
	"log/slog"
	"slices"
	"strings"
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

func (s *overlapStore) OutboxUnpublished(_ context.Context, seqs []int64) ([]int64, error) {
	return seqs, nil
}

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

// damageStore reports seq 7 damaged on the first relay call only, and
// says whether it is still unpublished.
type damageStore struct {
	Store
	calls       int
	unpublished []int64
}

func (s *damageStore) RelayOutboxFrom(context.Context, int64, int, func(context.Context, []OutboxMessage) ([]int64, error)) (RelayResult, error) {
	s.calls++
	if s.calls > 1 {
		return RelayResult{}, nil // complete, and row 7 not met: another replica holds it locked
	}
	return RelayResult{Claimed: 1, Last: 7, Skipped: []SkippedRow{{Seq: 7, MsgID: "Observation/d-7/_history/1",
		Err: fmt.Errorf("outbox 7: %w: invented damage", ErrDamagedPayload)}}}, nil
}

func (s *damageStore) OutboxBacklog(context.Context) (int64, error) {
	return int64(len(s.unpublished)), nil
}

func (s *damageStore) OutboxUnpublished(_ context.Context, seqs []int64) ([]int64, error) {
	var out []int64
	for _, q := range seqs {
		if slices.Contains(s.unpublished, q) {
			out = append(out, q)
		}
	}
	return out, nil
}

// A complete pass that does not meet a damaged row (another replica has
// it locked, SKIP LOCKED) does not clear the report: the row stays counted
// and no "no longer found damaged" line is logged, until the row is found
// published (here by another replica) or passes this replica's check.
func TestRelayDamageReportHoldsForRowsOtherReplicasLock(t *testing.T) {
	s := &damageStore{unpublished: []int64{7}}
	var logs bytes.Buffer
	p := &Pipeline{store: s, metrics: NewMetrics(nil), log: slog.New(slog.NewTextHandler(&logs, nil)), now: time.Now}
	ctx := context.Background()
	p.relayAll(ctx)
	p.relayAll(ctx)
	if len(p.damaged) != 1 || strings.Contains(logs.String(), "no longer found damaged") {
		t.Fatalf("after a pass that skipped the locked row: damaged %v, logs\n%s\nwant row 7 still reported", p.damaged, logs.String())
	}
	if d, _ := p.outboxDamage.Load().(string); !strings.Contains(d, "seq 7") {
		t.Errorf("degraded reason %q, want row 7", d)
	}
	s.unpublished = nil // another replica published it after a repair
	p.relayAll(ctx)
	if len(p.damaged) != 0 || !strings.Contains(logs.String(), "no longer found damaged") {
		t.Errorf("after row 7 was published: damaged %v, logs\n%s\nwant it cleared and logged", p.damaged, logs.String())
	}
	if len(p.damageLogged) != 0 {
		t.Errorf("damageLogged %v after the row cleared: want it bounded by the rows reported", p.damageLogged)
	}
}

// passStore answers relay calls from a script: each call marks and holds
// the given counts.
type passStore struct {
	Store
	script []RelayResult
	calls  int
}

func (s *passStore) RelayOutboxFrom(context.Context, int64, int, func(context.Context, []OutboxMessage) ([]int64, error)) (RelayResult, error) {
	s.calls++
	if s.calls > len(s.script) {
		return RelayResult{}, nil
	}
	return s.script[s.calls-1], nil
}

func (s *passStore) OutboxBacklog(context.Context) (int64, error) { return 0, nil }

func (s *passStore) OutboxUnpublished(_ context.Context, seqs []int64) ([]int64, error) {
	return seqs, nil
}

// relayAll passes again while a pass published something and held a
// later version (it may go now), and stops after a pass that published
// nothing: held rows alone do not keep it busy.
func TestRelayAllPassesAgainForHeldVersions(t *testing.T) {
	held := RelayResult{Claimed: 2, Marked: 1, Last: 2, Skipped: []SkippedRow{{Seq: 2, MsgID: "Observation/d/_history/2"}}}
	onlyHeld := RelayResult{Claimed: 1, Last: 2, Skipped: []SkippedRow{{Seq: 2, MsgID: "Observation/d/_history/2"}}}
	for _, c := range []struct {
		name   string
		script []RelayResult
		calls  int
	}{
		{"published and held: again", []RelayResult{held, held, {Claimed: 1, Marked: 1, Last: 3}}, 3},
		{"held only: once", []RelayResult{onlyHeld, onlyHeld}, 1},
		{"nothing held: once", []RelayResult{{Claimed: 1, Marked: 1, Last: 1}, held}, 1},
	} {
		s := &passStore{script: c.script}
		p := &Pipeline{store: s, metrics: NewMetrics(nil), log: slog.New(slog.DiscardHandler), now: time.Now}
		p.relayAll(context.Background())
		if s.calls != c.calls {
			t.Errorf("%s: %d passes, want %d", c.name, s.calls, c.calls)
		}
	}
}
