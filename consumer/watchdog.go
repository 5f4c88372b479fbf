package consumer

import (
	"context"
	"time"
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
			continue
		}
		if time.Since(lastChange) < p.cfg.StallAfter {
			continue
		}
		ictx, cancel := context.WithTimeout(ctx, 5*time.Second)
		info, err := p.currentConsumer().Info(ictx)
		cancel()
		if err != nil {
			// Deleted or unreachable: the fetch loop handles both.
			continue
		}
		if info.NumPending == 0 && info.NumAckPending == 0 {
			lastChange = time.Now()
			continue
		}
		p.stalls.Add(1)
		p.metrics.Stalls.Inc()
		p.log.Warn("consumer stalled; rebuilding", "pending", info.NumPending, "ack_pending", info.NumAckPending)
		if err := p.ensureConsumer(ctx); err != nil {
			p.log.Error("rebuild consumer", "err", err)
		}
		lastChange = time.Now()
	}
}
