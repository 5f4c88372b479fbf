package consumer

import (
	"context"
	"fmt"
	"log/slog"
	"slices"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/fhirmap"
)

// laneStore records the groups a lane commits (stream sequences) and holds
// the first commit until release is closed.
type laneStore struct {
	Store
	mu      sync.Mutex
	groups  [][]uint64
	release chan struct{}
	first   chan struct{} // closed when the first commit has begun
	once    sync.Once
	done    chan struct{} // one value per commit
}

func (s *laneStore) IngestBatch(_ context.Context, msgs []Message, _ PlanFunc) []BatchResult {
	s.once.Do(func() { close(s.first); <-s.release })
	s.mu.Lock()
	var g []uint64
	for _, m := range msgs {
		g = append(g, m.StreamSeq)
	}
	s.groups = append(s.groups, g)
	s.mu.Unlock()
	s.done <- struct{}{}
	return make([]BatchResult, len(msgs))
}

// ackedMsg is a delivered message whose settling does nothing.
type ackedMsg struct{ jetstream.Msg }

func (ackedMsg) Ack() error { return nil }

func laneMsg(seq uint64, patient string, q fhirmap.Quantity) *inflight {
	key := fmt.Sprintf("Observation/lane-%d", seq)
	return &inflight{
		msg:  ackedMsg{},
		meta: &jetstream.MsgMetadata{Sequence: jetstream.SequencePair{Stream: seq}, NumDelivered: 1, Timestamp: time.Now()},
		m: Message{InboxKey: fmt.Sprintf("%064x", seq), StreamSeq: seq,
			Facts: []fhirmap.Fact{{Key: key, Patient: patient, Quantity: q}}},
		log:  slog.New(slog.DiscardHandler),
		stop: func() {},
	}
}

// A lane commits a blood gas (a PaCO2 fact) as soon as it joins a group,
// without waiting out GroupWait, and takes the gas of a patient ahead of
// messages of other patients that arrived before it while a commit ran;
// a gas never passes a message of its own patient. GroupWait is a minute
// here: a gas that waited for it would fail the test's 10 s bound.
func TestLaneCommitsBloodGasFirst(t *testing.T) {
	st := &laneStore{release: make(chan struct{}), first: make(chan struct{}), done: make(chan struct{}, 16)}
	p := &Pipeline{store: st, log: slog.New(slog.DiscardHandler), metrics: NewMetrics(nil), now: time.Now,
		workers: 1, groupMax: 64, groupWait: time.Minute, gasFirst: true, relayKick: make(chan struct{}, 1)}
	in := make(chan *inflight, 64)
	lane := make(chan struct{})
	go func() { p.lane(context.Background(), st, in); close(lane) }()
	released := false
	release := func() {
		if !released {
			released = true
			close(st.release)
		}
	}
	defer func() { release(); close(in); <-lane }()

	// A gas of patient A: committed at once (the store holds it).
	in <- laneMsg(1, "Patient/a", fhirmap.QPCO2)
	select {
	case <-st.first:
	case <-time.After(10 * time.Second):
		t.Fatal("a lone blood gas was not committed within 10 s (GroupWait is a minute)")
	}
	// While it commits: a reading of A, a reading of B, a gas of C, a gas of A.
	in <- laneMsg(2, "Patient/a", fhirmap.QMinuteVol)
	in <- laneMsg(3, "Patient/b", fhirmap.QMinuteVol)
	in <- laneMsg(4, "Patient/c", fhirmap.QPCO2)
	in <- laneMsg(5, "Patient/a", fhirmap.QPCO2)
	time.Sleep(50 * time.Millisecond) // all four queued behind the commit
	release()
	for i := range 3 {
		select {
		case <-st.done:
		case <-time.After(10 * time.Second):
			st.mu.Lock()
			g := slices.Clone(st.groups)
			st.mu.Unlock()
			t.Fatalf("commit %d not made within 10 s; groups so far %v", i+1, g)
		}
	}
	st.mu.Lock()
	defer st.mu.Unlock()
	// C's gas first, on its own; A's gas after A's reading (and with B's,
	// which arrived before it), ending that group.
	want := [][]uint64{{1}, {4}, {2, 3, 5}}
	if !slices.EqualFunc(st.groups, want, slices.Equal) {
		t.Errorf("groups %v, want %v", st.groups, want)
	}
}

// gasFirst keeps each patient's messages, and the messages that name a
// fact key also named before them, in order.
func TestGasFirstKeepsPatientAndKeyOrder(t *testing.T) {
	q := []*inflight{
		laneMsg(1, "Patient/a", fhirmap.QMinuteVol),
		laneMsg(2, "Patient/b", fhirmap.QPCO2),
		laneMsg(3, "Patient/a", fhirmap.QPCO2),
		laneMsg(4, "Patient/c", fhirmap.QPCO2),
		laneMsg(5, "Patient/d", fhirmap.QMinuteVol),
	}
	// Message 4 names message 1's key under another patient (a moved fact).
	q[3].m.Facts[0].Key = q[0].m.Facts[0].Key
	gasFirst(q)
	var got []uint64
	for _, it := range q {
		got = append(got, it.m.StreamSeq)
	}
	if want := []uint64{2, 1, 3, 4, 5}; !slices.Equal(got, want) {
		t.Errorf("order %v, want %v", got, want)
	}
}
