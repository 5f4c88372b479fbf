package consumer

import (
	"context"
	"errors"
	"time"

	"github.com/nats-io/nats.go/jetstream"
)

// watchdog notices a consumer that has pending input but makes no progress
// (reported after server restarts: a pull subscription can stall until the
// client rebuilds it) and rebuilds the consumer handle.
func (p *Pipeline) watchdog(ctx context.Context) {
	every := max(p.cfg.StallAfter/4, 50*time.Millisecond)
	t := time.NewTicker(every)
	defer t.Stop()
	lastProgress, lastChange := p.progress.Load(), time.Now()
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		if n := p.progress.Load(); n != lastProgress {
			lastProgress, lastChange = n, time.Now()
			p.stalledSince.Store(0)
			p.metrics.IntakeStalled.Set(0)
			continue
		}
		if time.Since(lastChange) < p.cfg.StallAfter {
			continue
		}
		ictx, cancel := context.WithTimeout(ctx, 5*time.Second)
		info, err := p.currentConsumer().Info(ictx)
		cancel()
		if errors.Is(err, jetstream.ErrConsumerNotFound) {
			// Deleted between two pulls: the next pull only times out, so
			// the fetch loop never sees ErrConsumerDeleted. Recreate here.
			p.log.Warn("consumer gone; recreating", "durable", p.cfg.Durable)
			if err := p.ensureConsumer(ctx); err != nil {
				p.log.Error("recreate consumer", "err", err)
			}
			lastChange = time.Now()
			continue
		}
		if err != nil {
			// Unreachable: the fetch loop backs off and retries.
			continue
		}
		if info.NumPending == 0 && info.NumAckPending == 0 {
			lastChange = time.Now()
			p.stalledSince.Store(0)
			p.metrics.IntakeStalled.Set(0)
			continue
		}
		// Readiness says so until a message is settled again.
		p.stalledPending.Store(info.NumPending + uint64(info.NumAckPending))
		p.stalledProgress.Store(lastProgress)
		p.stalledSince.CompareAndSwap(0, lastChange.UnixNano())
		p.metrics.IntakeStalled.Set(1)
		p.metrics.Stalls.Inc()
		p.log.Warn("consumer stalled; rebuilding", "pending", info.NumPending, "ack_pending", info.NumAckPending)
		if err := p.ensureConsumer(ctx); err != nil {
			p.log.Error("rebuild consumer", "err", err)
		}
		lastChange = time.Now()
	}
}
