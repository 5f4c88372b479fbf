package postgres_test

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// seedOutbox ingests n blood gases, each with a minute volume, so that the
// outbox holds n rows.
func seedOutbox(t *testing.T, f *fixture, n int) {
	t.Helper()
	for i := range n {
		at := t0.Add(time.Duration(i) * time.Hour)
		msg := message("fhir.input.lab", uint64(i+1), abg(p1, fmt.Sprintf("abg-%d", i), at, 45),
			vent(p1, fmt.Sprintf("ve-%d", i), fhirmap.QMinuteVol, at, 10, "L/min"))
		if _, err := f.store.Ingest(f.ctx, msg, new(testPlan).plan); err != nil {
			t.Fatal(err)
		}
	}
}

func TestRelayOutbox(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	seedOutbox(t, f, 5)
	if n, err := f.store.OutboxBacklog(f.ctx); err != nil || n != 5 {
		t.Fatalf("backlog = %d, %v; want 5", n, err)
	}

	// publish acknowledges only the first two it gets, then fails.
	var got []consumer.OutboxMessage
	boom := errors.New("nats unavailable")
	n, err := f.store.RelayOutbox(f.ctx, 3, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
		got = ms
		return []int64{ms[0].Seq, ms[1].Seq, 999999}, boom
	})
	if n != 2 || !errors.Is(err, boom) {
		t.Fatalf("RelayOutbox = %d, %v; want 2 marked and the publish error", n, err)
	}
	if len(got) != 3 || got[0].Seq >= got[1].Seq || got[1].Seq >= got[2].Seq {
		t.Fatalf("relay got %d messages %v, want 3 in seq order", len(got), seqs(got))
	}
	if got[0].Subject != consumer.DefaultObservationSub || got[0].Header[consumer.HeaderKind] != kindVDVT || got[0].MsgID == "" || len(got[0].Payload) == 0 {
		t.Errorf("relay message %+v lacks subject, header, id or payload", got[0])
	}
	if b, _ := f.store.OutboxBacklog(f.ctx); b != 3 {
		t.Errorf("backlog after relay = %d, want 3", b)
	}
	// The next relay starts from the first unpublished row.
	n, err = f.store.RelayOutbox(f.ctx, 10, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
		if ms[0].Seq != got[2].Seq {
			t.Errorf("next relay starts at seq %d, want %d", ms[0].Seq, got[2].Seq)
		}
		return seqs(ms), nil
	})
	if n != 3 || err != nil {
		t.Fatalf("second RelayOutbox = %d, %v; want 3, nil", n, err)
	}
	if b, _ := f.store.OutboxBacklog(f.ctx); b != 0 {
		t.Errorf("backlog = %d, want 0", b)
	}
}

func seqs(ms []consumer.OutboxMessage) []int64 {
	var out []int64
	for _, m := range ms {
		out = append(out, m.Seq)
	}
	return out
}

// TestRelaySkipLocked runs two relays at once with a slow publish: each row
// is published by exactly one of them.
func TestRelaySkipLocked(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	const rows = 24
	seedOutbox(t, f, rows)
	var mu sync.Mutex
	published := map[int64]int{}
	var wg sync.WaitGroup
	for range 2 {
		wg.Go(func() {
			for {
				n, err := f.store.RelayOutbox(f.ctx, 4, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
					mu.Lock()
					for _, m := range ms {
						published[m.Seq]++
					}
					mu.Unlock()
					time.Sleep(20 * time.Millisecond) // hold the rows while the other relay runs
					return seqs(ms), nil
				})
				if err != nil {
					t.Error(err)
					return
				}
				if n == 0 {
					return
				}
			}
		})
	}
	wg.Wait()
	if len(published) != rows {
		t.Errorf("%d distinct rows published, want %d", len(published), rows)
	}
	for seq, times := range published {
		if times != 1 {
			t.Errorf("row %d published %d times", seq, times)
		}
	}
	if b, _ := f.store.OutboxBacklog(f.ctx); b != 0 {
		t.Errorf("backlog = %d, want 0", b)
	}
}
