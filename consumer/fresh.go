package consumer

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
)

// The fresh lane keeps live input live while the main consumer drains a
// backlog (a replica started on a stream that filled while it was down, a
// site's history onboarded, a gateway flushing a day of readings). It pulls
// from a second durable consumer on the same subjects (FreshConsumerConfig)
// and records at once every input that is fresh: published after this
// replica started, less than FreshAge old when received, and more than
// FreshLag stream sequences ahead of the main consumer's position. Any other
// input it acknowledges unrecorded. The main consumer records every input
// all the same, so the lane adds no path by which an input is acked before
// its COMMIT or lost: when the main consumer reaches an input the lane
// recorded, the inbox finds it a duplicate and acks it. What the lane
// records goes through the same store call as the main lane (inbox dedup,
// patient locks, the outbox), and the store's final state is a function of
// the set of inputs, so the order between the lanes does not matter.
//
// Poison input and transient failures are left to the main consumer: the
// lane neither dead-letters nor retries.

// ensureFresh creates or updates the fresh lane's durable consumer.
func (p *Pipeline) ensureFresh(ctx context.Context) error {
	ctx, cancel := context.WithTimeout(ctx, 10*time.Second)
	defer cancel()
	c, err := p.js.CreateOrUpdateConsumer(ctx, p.cfg.InputStream, FreshConsumerConfig(p.cfg))
	if err != nil {
		p.setFreshActive(false)
		return fmt.Errorf("create consumer %s on %s: %w", p.cfg.FreshDurable, p.cfg.InputStream, err)
	}
	p.mu.Lock()
	p.fresh = c
	p.mu.Unlock()
	p.setFreshActive(true)
	return nil
}

// setFreshActive notes whether the fresh lane works, for readiness and
// ventderive_fresh_lane_active.
func (p *Pipeline) setFreshActive(ok bool) {
	p.freshActive.Store(ok)
	if ok {
		p.metrics.FreshActive.Set(1)
	} else {
		p.metrics.FreshActive.Set(0)
	}
}

func (p *Pipeline) currentFresh() jetstream.Consumer {
	p.mu.Lock()
	defer p.mu.Unlock()
	return p.fresh
}

// freshPullWait is the expiry of the fresh lane's pulls.
const freshPullWait = 100 * time.Millisecond

// freshLoop pulls the fresh lane until ctx is cancelled.
func (p *Pipeline) freshLoop(ctx context.Context) {
	failures := 0
	lastCheck := time.Now()
	for ctx.Err() == nil {
		c := p.currentFresh()
		if c == nil {
			if err := p.ensureFresh(ctx); err != nil {
				failures++
				p.log.Warn("fresh lane: no consumer", "err", err)
				sleep(ctx, backoff(p.cfg.RetryBase, p.cfg.RetryMax, failures))
				continue
			}
			c = p.currentFresh()
		}
		// A pull waits for a full batch until it expires: a short expiry
		// bounds what a few fresh messages wait for the batch to fill.
		batch, err := c.Fetch(p.cfg.Fetch, jetstream.FetchMaxWait(freshPullWait))
		got := 0
		if err == nil {
			got = p.processFresh(context.WithoutCancel(ctx), batch.Messages())
			err = batch.Error()
		}
		switch {
		case err == nil, errors.Is(err, nats.ErrTimeout), errors.Is(err, context.DeadlineExceeded):
			failures = 0
			p.setFreshActive(true)
			if got == 0 && time.Since(lastCheck) > 10*time.Second {
				// A consumer deleted between two pulls only makes pulls
				// time out: look for it now and then while idle.
				lastCheck = time.Now()
				ictx, cancel := context.WithTimeout(ctx, 5*time.Second)
				_, ierr := c.Info(ictx)
				cancel()
				if errors.Is(ierr, jetstream.ErrConsumerNotFound) {
					p.dropFresh()
				}
			}
			continue
		case errors.Is(err, jetstream.ErrConsumerDeleted), errors.Is(err, jetstream.ErrConsumerNotFound):
			p.dropFresh()
		default:
			if ctx.Err() != nil {
				return
			}
			p.setFreshActive(false)
			p.log.Warn("fresh lane: fetch failed", "err", err)
		}
		failures++
		sleep(ctx, backoff(p.cfg.RetryBase, p.cfg.RetryMax, failures))
	}
}

// dropFresh forgets a deleted fresh consumer; the loop recreates it.
func (p *Pipeline) dropFresh() {
	p.log.Warn("fresh lane: consumer gone; recreating", "durable", p.cfg.FreshDurable)
	p.mu.Lock()
	p.fresh = nil
	p.mu.Unlock()
	p.setFreshActive(false)
}

// isFresh says whether the fresh lane records a message itself.
func (p *Pipeline) isFresh(meta *jetstream.MsgMetadata) bool {
	return meta.Timestamp.After(p.started) && time.Since(meta.Timestamp) < p.cfg.FreshAge &&
		meta.Sequence.Stream > p.mainSeq.Load()+uint64(p.cfg.FreshLag)
}

// noteMain records the main consumer's position (the highest stream
// sequence it delivered to this replica).
func (p *Pipeline) noteMain(seq uint64) {
	for {
		cur := p.mainSeq.Load()
		if seq <= cur || p.mainSeq.CompareAndSwap(cur, seq) {
			return
		}
	}
}

// processFresh records the fresh messages of one batch in one group, then
// acknowledges the whole batch with one ack of its last message (the
// consumer acks all). It returns the number of messages in the batch.
func (p *Pipeline) processFresh(ctx context.Context, msgs <-chan jetstream.Msg) int {
	var last jetstream.Msg
	var take []*inflight
	n := 0
	for msg := range msgs {
		n++
		last = msg
		meta, err := msg.Metadata()
		if err != nil || !p.isFresh(meta) {
			p.metrics.Fresh.WithLabelValues("passed").Inc()
			continue
		}
		it := p.receive(msg, false)
		if it == nil {
			continue
		}
		it.stop() // nothing depends on this lane's ack wait
		if it.reason != "" {
			p.metrics.Fresh.WithLabelValues("passed").Inc() // the main consumer dead-letters it
			continue
		}
		take = append(take, it)
	}
	if len(take) > 0 {
		p.commitFresh(ctx, take)
	}
	if last != nil {
		if err := last.Ack(); err != nil {
			p.log.Warn("fresh lane: ack failed", "err", err)
		}
	}
	return n
}

// commitFresh records the fresh lane's messages, in groups when the store
// can, and counts what they produced.
func (p *Pipeline) commitFresh(ctx context.Context, take []*inflight) {
	results := make([]IngestResult, len(take))
	errs := make([]error, len(take))
	bs, grouped := p.store.(BatchStore)
	if grouped && p.groupMax > 1 {
		for start := 0; start < len(take); start += p.groupMax {
			part := take[start:min(start+p.groupMax, len(take))]
			msgs := make([]Message, len(part))
			for i, it := range part {
				msgs[i] = it.m
			}
			res := bs.IngestBatch(ctx, msgs, p.planFunc(p.now().UTC()))
			for i := range part {
				if len(res) != len(part) {
					errs[start+i] = fmt.Errorf("ingest group: %d results for %d messages: %w", len(res), len(part), ErrTransient)
					continue
				}
				results[start+i], errs[start+i] = res[i].IngestResult, res[i].Err
			}
		}
	} else {
		for i, it := range take {
			results[i], errs[i] = p.store.Ingest(ctx, it.m, p.planFunc(p.now().UTC()))
		}
	}
	outbox := 0
	for i, it := range take {
		switch err := errs[i]; {
		case errors.Is(err, ErrDuplicate):
			p.metrics.Fresh.WithLabelValues("duplicate").Inc()
		case err != nil:
			// The main consumer retries it or dead-letters it.
			p.metrics.Fresh.WithLabelValues("failed").Inc()
			it.log.Debug("fresh lane: not recorded; left to the main consumer", "err", err)
		default:
			res := results[i]
			p.metrics.Fresh.WithLabelValues("recorded").Inc()
			p.metrics.Latency.Observe(p.now().Sub(it.meta.Timestamp).Seconds())
			p.metrics.Handling.Observe(p.now().Sub(it.start).Seconds())
			for kind, n := range res.DerivedKinds {
				p.metrics.Derived.WithLabelValues(kind).Add(float64(n))
			}
			for reason, n := range res.RefusalReasons {
				p.metrics.Refusals.WithLabelValues(reason).Add(float64(n))
			}
			p.metrics.Retractions.Add(float64(res.Retractions))
			outbox += res.Outbox
		}
	}
	if outbox > 0 {
		p.kickRelay()
	}
}
