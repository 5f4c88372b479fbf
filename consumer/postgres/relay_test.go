package postgres_test

import (
	"context"
	"errors"
	"slices"
	"testing"

	"github.com/ventderive/ventderive/consumer"
)

// RelayOutboxFrom pages past rows that could not be published: the relay
// must reach the rows behind a stuck subject.
func TestRelayOutboxFromPagesPastFailures(t *testing.T) {
	t.Parallel()
	f := newFixture(t)
	seedOutbox(t, f, 5)
	stuck := errors.New("no acknowledgement")
	var first []consumer.OutboxMessage
	res, err := f.store.RelayOutboxFrom(f.ctx, 0, 2, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
		first = ms
		return nil, stuck
	})
	if !errors.Is(err, stuck) || res.Claimed != 2 || res.Marked != 0 || res.Last != first[1].Seq {
		t.Fatalf("first page = %+v, %v; want 2 claimed, none marked, last %d", res, err, first[1].Seq)
	}
	res, err = f.store.RelayOutboxFrom(f.ctx, res.Last, 10, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
		if ms[0].Seq <= first[1].Seq {
			t.Errorf("second page starts at seq %d, want after %d", ms[0].Seq, first[1].Seq)
		}
		return seqs(ms), nil
	})
	if err != nil || res.Claimed != 3 || res.Marked != 3 {
		t.Fatalf("second page = %+v, %v; want the 3 rows behind the stuck ones", res, err)
	}
	if b, _ := f.store.OutboxBacklog(f.ctx); b != 2 {
		t.Errorf("backlog %d, want the 2 stuck rows", b)
	}
}

// OutboxUnpublished returns those of the given rows not yet published
// (the relay asks it about damaged rows a pass did not meet), in order,
// and nothing for a seq that is no outbox row.
func TestOutboxUnpublished(t *testing.T) {
	t.Parallel()
	f, _ := outputStore(t)
	var all []int64
	if err := f.pool.QueryRow(f.ctx, `SELECT array_agg(seq ORDER BY seq) FROM outbox`).Scan(&all); err != nil {
		t.Fatal(err)
	}
	if _, err := f.pool.Exec(f.ctx, `UPDATE outbox SET published_at = now() WHERE seq = $1`, all[1]); err != nil {
		t.Fatal(err)
	}
	got, err := f.store.OutboxUnpublished(f.ctx, []int64{all[2], all[1], all[0], all[len(all)-1] + 1000})
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(got, []int64{all[0], all[2]}) {
		t.Errorf("OutboxUnpublished = %v, want %v", got, []int64{all[0], all[2]})
	}
}
