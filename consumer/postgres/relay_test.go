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

// Two relays share one outbox: while one holds version 1 of a derivation
// locked (its pass in flight, or a damaged row it skips), the other's
// claim passes it (SKIP LOCKED) but publishes neither version 2 nor 3, nor
// the Provenance of version 2: they are held behind the unpublished
// version 1. Once version 1 is released, one call publishes 1, 2, 3 in
// order.
func TestRelayHoldsLaterVersionsBehindAnotherRelaysRow(t *testing.T) {
	t.Parallel()
	f, _ := outputStore(t)
	insert := func(msgID string) int64 {
		var seq int64
		if err := f.pool.QueryRow(f.ctx, `INSERT INTO outbox (subject, msg_id, headers, stored_payload, inbox_key, created_at)
			SELECT 'ventderive.out.observation', $1, '{}', convert_to('{"id":"' || $1 || '"}', 'UTF8'), inbox_key, now()
			FROM inbox LIMIT 1 RETURNING seq`, msgID).Scan(&seq); err != nil {
			t.Fatal(err)
		}
		return seq
	}
	v1 := insert("Observation/ord-x/_history/1")
	v2 := insert("Observation/ord-x/_history/2")
	p2 := insert("Provenance/ord-x/_history/2")
	v3 := insert("Observation/ord-x/_history/3")
	other := insert("Observation/ord-y/_history/1")

	// Relay A: claims version 1 and holds it.
	a, err := f.pool.Begin(f.ctx)
	if err != nil {
		t.Fatal(err)
	}
	defer a.Rollback(f.ctx)
	if _, err := a.Exec(f.ctx, `SELECT seq FROM outbox WHERE seq = $1 FOR UPDATE`, v1); err != nil {
		t.Fatal(err)
	}
	var handed []int64
	publish := func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) {
		handed = append(handed, seqs(ms)...)
		return seqs(ms), nil
	}
	res, err := f.store.RelayOutboxFrom(f.ctx, 0, 100, publish) // relay B
	if err != nil {
		t.Fatal(err)
	}
	for _, s := range []int64{v1, v2, p2, v3} {
		if slices.Contains(handed, s) {
			t.Errorf("row %d of ord-x handed to publish while version 1 (row %d) is unpublished and locked: handed %v", s, v1, handed)
		}
	}
	if !slices.Contains(handed, other) {
		t.Errorf("row %d of another derivation not published: handed %v", other, handed)
	}
	var held []int64
	for _, s := range res.Skipped {
		if s.Err == nil {
			held = append(held, s.Seq)
		}
	}
	if !slices.Equal(held, []int64{v2, p2, v3}) {
		t.Errorf("held %v, want %v", held, []int64{v2, p2, v3})
	}

	if err := a.Rollback(f.ctx); err != nil {
		t.Fatal(err)
	}
	handed = nil
	if _, err := f.store.RelayOutboxFrom(f.ctx, 0, 100, publish); err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(handed, []int64{v1, v2, p2, v3}) {
		t.Errorf("after release: handed %v, want %v in order", handed, []int64{v1, v2, p2, v3})
	}
	if left := unpublished(t, f); len(left) != 0 {
		t.Errorf("unpublished rows %v, want none", left)
	}
}
