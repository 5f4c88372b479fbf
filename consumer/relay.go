package consumer

import (
	"context"
	"fmt"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
)

// relayBatch is how many outbox rows one relay transaction claims.
const relayBatch = 256

// relayLoop publishes the outbox whenever an ingest wrote to it, and at
// RelayInterval otherwise (rows written by another replica that died, or
// left over from the last run).
func (p *Pipeline) relayLoop(ctx context.Context) {
	t := time.NewTicker(p.cfg.RelayInterval)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		case <-p.relayKick:
		}
		p.relayAll(ctx)
	}
}

// relayAll publishes until the outbox is empty or publishing fails.
func (p *Pipeline) relayAll(ctx context.Context) {
	failures := 0
	for ctx.Err() == nil {
		n, err := p.store.RelayOutbox(ctx, relayBatch, p.publishBatch)
		if err != nil {
			failures++
			if failures == 1 || failures%20 == 0 {
				p.log.Warn("outbox relay failed", "err", err, "failures", failures)
			}
			sleep(ctx, backoff(p.cfg.RetryBase, p.cfg.RetryMax, failures))
			continue
		}
		failures = 0
		p.metrics.Published.Add(float64(n))
		if n < relayBatch {
			break
		}
	}
	if backlog, err := p.store.OutboxBacklog(ctx); err == nil {
		p.metrics.OutboxBacklog.Set(float64(backlog))
	}
}

// publishBatch publishes asynchronously with each row's deterministic
// message id and returns the sequence numbers the server acknowledged. A
// repeat inside the stream's duplicate window is acknowledged as a
// duplicate, which counts as published.
func (p *Pipeline) publishBatch(ctx context.Context, msgs []OutboxMessage) ([]int64, error) {
	futures := make([]jetstream.PubAckFuture, len(msgs))
	var sendErr error
	for i, m := range msgs {
		nm := nats.NewMsg(m.Subject)
		nm.Data = m.Payload
		for k, v := range m.Header {
			nm.Header.Set(k, v)
		}
		f, err := p.js.PublishMsgAsync(nm, jetstream.WithMsgID(m.MsgID))
		if err != nil {
			futures, sendErr = futures[:i], fmt.Errorf("publish %s: %w", m.Subject, err)
			break
		}
		futures[i] = f
	}
	// Only the acknowledged prefix is marked: versions of one derivation
	// then reach the stream in version order even across a failure.
	var done []int64
	for i, f := range futures {
		select {
		case <-f.Ok():
			if p.hooks != nil && p.hooks.AfterPublish != nil {
				if err := p.hooks.AfterPublish(msgs[i].Seq); err != nil {
					return nil, err // simulated crash before marking
				}
			}
			done = append(done, msgs[i].Seq)
		case err := <-f.Err():
			if len(done) == 0 {
				return nil, err
			}
			// Mark what was acknowledged; the rest goes in the next round.
			p.log.Warn("outbox publish failed after a partial batch", "err", err, "published", len(done))
			return done, nil
		case <-ctx.Done():
			return done, nil
		}
	}
	if sendErr != nil && len(done) == 0 {
		return nil, sendErr
	}
	return done, nil
}
