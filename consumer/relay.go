package consumer

import (
	"context"
	"errors"
	"fmt"
	"maps"
	"slices"
	"strconv"
	"strings"
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

// relayAll makes passes over the outbox, a page of relayBatch rows at a
// time, until a pass publishes every row it can. Rows that fail (a subject
// the permissions deny, a stream that does not answer, stored dictionaries
// that cannot be read) stay unpublished, and the next page starts after
// them, so they never hold back the rows behind them; after a pass with
// failures the relay backs off and starts again from the first unpublished
// row. A damaged row (consumer.ErrDamagedPayload) is no failure of the
// pass: it is reported (noteDamage) and met again by the next pass, so
// that it neither backs the relay off for every other row nor is lost.
// The backlog gauge is kept true meanwhile.
func (p *Pipeline) relayAll(ctx context.Context) {
	p.relayMu.Lock()
	defer p.relayMu.Unlock()
	failures := 0
	for ctx.Err() == nil {
		pass := p.relayPass(ctx)
		p.updateBacklog(ctx)
		p.noteDamage(ctx, pass)
		if pass.err == nil {
			p.relayFailing(nil)
			if pass.marked > 0 && pass.held > 0 {
				// A version held behind one this pass published (by
				// another relay, or on an earlier page) may go now: pass
				// again rather than wait for the next kick. A pass that
				// publishes nothing ends it, so damaged and held rows
				// alone never keep it busy.
				continue
			}
			return
		}
		failures++
		p.relayFailing(pass.err)
		if failures == 1 || failures%20 == 0 {
			p.log.Warn("outbox relay failed", "err", pass.err, "failures", failures)
		}
		sleep(ctx, backoff(p.cfg.RetryBase, p.cfg.RetryMax, failures))
	}
}

// relayPassResult is what one pass over the outbox met.
type relayPassResult struct {
	err      error        // the last failure (not damage), nil when none
	damaged  []SkippedRow // rows whose stored payload is damaged
	checked  []int64      // rows claimed whose stored payload passed the check
	held     int          // rows held behind an unpublished earlier version
	marked   int          // rows marked published
	complete bool         // the pass reached the end of the outbox
}

// relayPass publishes the outbox once, page by page. Ordering is kept per
// derivation (a resource's version chain: its message id without
// "/_history/N", so a version's Observation and its Provenance are two
// chains): once a version is not published in this pass (damaged, not
// checked, not acknowledged), no later version of that chain is handed to
// NATS in it, also on later pages. Across replicas the store keeps it: a
// claimed row waits while the previous version of its derivation is
// unpublished outside the claim (a row another replica holds locked, which
// SKIP LOCKED passed), and is returned as held. It is not kept inside one
// batch: publishBatch sends a page's rows together, so when version 1's
// acknowledgement fails version 2 is not marked but may be in the stream
// already (it is sent again after version 1). Other derivations, of the same patient too, go on:
// they are other resources, and holding a patient's every output behind
// one damaged row would stall that patient's values with no gain in order.
func (p *Pipeline) relayPass(ctx context.Context) relayPassResult {
	var r relayPassResult
	held := map[string]bool{}
	publish := func(ctx context.Context, msgs []OutboxMessage) ([]int64, error) {
		send := make([]OutboxMessage, 0, len(msgs))
		for _, m := range msgs {
			r.checked = append(r.checked, m.Seq) // the store hands only checked rows
			if held[derivationOf(m.MsgID)] {
				r.held++
				continue
			}
			send = append(send, m)
		}
		if len(send) == 0 {
			return nil, nil
		}
		done, err := p.publishBatch(ctx, send)
		ok := make(map[int64]bool, len(done))
		for _, seq := range done {
			ok[seq] = true
		}
		for _, m := range send {
			if !ok[m.Seq] {
				held[derivationOf(m.MsgID)] = true
			}
		}
		return done, err
	}
	var after int64
	for ctx.Err() == nil {
		res, err := p.store.RelayOutboxFrom(ctx, after, relayBatch, publish)
		p.metrics.Published.Add(float64(res.Marked))
		r.marked += res.Marked
		for _, s := range res.Skipped {
			held[derivationOf(s.MsgID)] = true
			switch {
			case s.Err == nil:
				r.held++
			case errors.Is(s.Err, ErrDamagedPayload):
				r.damaged = append(r.damaged, s)
			}
		}
		if err != nil {
			r.err = err
		}
		if err == nil && res.Claimed == relayBatch {
			after = res.Last // more rows behind this page
			continue
		}
		if err != nil && res.Claimed > 0 {
			p.updateBacklog(ctx)
			after = res.Last // skip what failed; try the rest of this pass
			continue
		}
		// The end of the outbox, or the store failed (then rows behind
		// may not have been met).
		r.complete = err == nil
		return r
	}
	return r
}

// noteDamage reports the damaged rows a pass met (relayMu held): each
// logged once, with its sequence number and what is wrong (never its
// bytes), the gauges set, and the readiness text of Degraded. A row leaves
// the report only when this replica claimed it and it passed the check, or
// it is found published: a complete pass that did not meet a reported row
// says nothing about it, since another replica may hold it locked (SKIP
// LOCKED) and that pass skipped it. A row the store cannot be asked about
// now stays reported.
func (p *Pipeline) noteDamage(ctx context.Context, r relayPassResult) {
	if p.damaged == nil {
		p.damaged, p.damageLogged = map[int64]string{}, map[int64]bool{}
	}
	for _, seq := range r.checked {
		if _, was := p.damaged[seq]; was {
			delete(p.damaged, seq)
			delete(p.damageLogged, seq) // bounded by the rows reported
			p.log.Info("outbox row no longer found damaged", "seq", seq)
		}
	}
	if r.complete {
		found := map[int64]bool{}
		for _, d := range r.damaged {
			found[d.Seq] = true
		}
		var unmet []int64
		for _, seq := range slices.Sorted(maps.Keys(p.damaged)) {
			if !found[seq] {
				unmet = append(unmet, seq)
			}
		}
		if len(unmet) > 0 {
			qctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), 5*time.Second)
			left, err := p.store.OutboxUnpublished(qctx, unmet)
			cancel()
			if err == nil {
				for _, seq := range unmet {
					if !slices.Contains(left, seq) {
						delete(p.damaged, seq)
						delete(p.damageLogged, seq)
						p.log.Info("outbox row no longer found damaged", "seq", seq, "published", true)
					}
				}
			}
		}
	}
	for _, d := range r.damaged {
		p.damaged[d.Seq] = boundText(d.Err.Error(), 300)
	}
	for _, seq := range slices.Sorted(maps.Keys(p.damaged)) {
		if !p.damageLogged[seq] {
			p.damageLogged[seq] = true
			p.log.Error("outbox row not published: stored payload damaged", "seq", seq, "err", p.damaged[seq])
		}
	}
	p.metrics.OutboxDamaged.Set(float64(len(p.damaged)))
	p.metrics.OutboxHeld.Set(float64(r.held))
	p.outboxDamage.Store(damageText(p.damaged, r.held))
}

// damageText is the readiness reason for damaged rows, "" when none: the
// count, the first sequence numbers and the first reason.
func damageText(damaged map[int64]string, held int) string {
	if len(damaged) == 0 {
		return ""
	}
	seqs := slices.Sorted(maps.Keys(damaged))
	var ids []string
	for _, s := range seqs[:min(len(seqs), 5)] {
		ids = append(ids, strconv.FormatInt(s, 10))
	}
	more := ""
	if len(seqs) > 5 {
		more = ", ..."
	}
	return fmt.Sprintf("%d outbox row(s) not published: stored payload damaged (seq %s%s; first: %s); %d later version(s) held behind unpublished ones",
		len(damaged), strings.Join(ids, ", "), more, damaged[seqs[0]], held)
}

func (p *Pipeline) updateBacklog(ctx context.Context) {
	bctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), 5*time.Second)
	defer cancel()
	if backlog, err := p.store.OutboxBacklog(bctx); err == nil {
		p.metrics.OutboxBacklog.Set(float64(backlog))
	}
}

// relayFailing notes the outcome of a relay pass: nil when every row it met
// was published.
func (p *Pipeline) relayFailing(err error) {
	if err == nil {
		p.relayFailSince.Store(0)
		p.metrics.RelayFailing.Set(0)
		return
	}
	p.metrics.RelayFailures.Inc()
	p.relayFailSince.CompareAndSwap(0, p.now().UnixNano())
	p.relayErr.Store(boundText(err.Error(), 200))
	p.metrics.RelayFailing.Set(1)
}

// outputSubject is where a row goes: the subject configured now for its
// type (the Nats-Msg-Id starts with "Observation/" or "Provenance/"), so
// that a corrected --observation-subject or --provenance-subject applies to
// rows written before the change. The stored subject is never used: the
// service writes no other rows, and a row of another kind (a bug, or a
// misused writer role naming a system subject) is not published ("").
func (p *Pipeline) outputSubject(m OutboxMessage) string {
	switch {
	case strings.HasPrefix(m.MsgID, "Observation/"):
		return p.cfg.ObservationSub
	case strings.HasPrefix(m.MsgID, "Provenance/"):
		return p.cfg.ProvenanceSub
	}
	return ""
}

// derivationOf is a row's derivation version chain: its message id without
// the "/_history/<version>" suffix.
func derivationOf(msgID string) string {
	if i := strings.LastIndex(msgID, "/_history/"); i >= 0 {
		return msgID[:i]
	}
	return msgID
}

// publishBatch publishes asynchronously with each row's deterministic
// message id and returns the sequence numbers the server acknowledged
// within publishTimeout. A repeat inside the stream's duplicate window is
// acknowledged as a duplicate, which counts as published. A row is not
// marked when an earlier version of its derivation failed in this batch:
// the next pass publishes both again in order (the server drops the
// repeat). It returns an error naming what failed, with a permissions
// violation the server reported for a subject.
func (p *Pipeline) publishBatch(ctx context.Context, msgs []OutboxMessage) ([]int64, error) {
	ctx, cancel := context.WithTimeout(ctx, publishTimeout)
	defer cancel()
	futures := make([]jetstream.PubAckFuture, len(msgs))
	errs := make([]error, len(msgs))
	for i, m := range msgs {
		subject := p.outputSubject(m)
		if subject == "" {
			errs[i] = fmt.Errorf("outbox row %d is neither a derived Observation nor a Provenance: not published", m.Seq)
			continue
		}
		nm := nats.NewMsg(subject)
		nm.Data = m.Payload
		for k, v := range m.Header {
			nm.Header.Set(k, v)
		}
		f, err := p.js.PublishMsgAsync(nm, jetstream.WithMsgID(m.MsgID))
		if err != nil {
			errs[i] = fmt.Errorf("publish %s: %w", nm.Subject, err)
			continue
		}
		futures[i] = f
	}
	for i, f := range futures {
		if f == nil {
			continue
		}
		select {
		case <-f.Ok():
		case err := <-f.Err():
			errs[i] = fmt.Errorf("publish %s: %w", f.Msg().Subject, err)
		case <-ctx.Done():
			// After the deadline, take the answers already in (select
			// would pick among ready cases at random).
			select {
			case <-f.Ok():
			case err := <-f.Err():
				errs[i] = fmt.Errorf("publish %s: %w", f.Msg().Subject, err)
			default:
				errs[i] = fmt.Errorf("publish %s: no acknowledgement within %s%s", f.Msg().Subject, publishTimeout, p.permissionHint(f.Msg().Subject))
			}
		}
	}
	var done []int64
	failed := map[string]bool{}
	var firstErr error
	nFailed := 0
	for i, m := range msgs {
		chain := derivationOf(m.MsgID)
		if errs[i] != nil {
			failed[chain] = true
			nFailed++
			if firstErr == nil {
				firstErr = errs[i]
			}
			continue
		}
		if failed[chain] {
			continue
		}
		if p.hooks != nil && p.hooks.AfterPublish != nil {
			if err := p.hooks.AfterPublish(m.Seq); err != nil {
				return nil, err // simulated crash before marking
			}
		}
		done = append(done, m.Seq)
	}
	if firstErr != nil {
		return done, fmt.Errorf("%d of %d outbox messages not published: %w", nFailed, len(msgs), firstErr)
	}
	return done, nil
}

// permissionHint returns the server's permissions violation for subject,
// if the connection's last error is one: a denied publish gets no PubAck,
// only this asynchronous error.
func (p *Pipeline) permissionHint(subject string) string {
	le := p.nc.LastError()
	if le == nil || !errors.Is(le, nats.ErrPermissionViolation) || !strings.Contains(le.Error(), subject) {
		return ""
	}
	return " (" + le.Error() + ": check the NATS user's publish permissions or the output subject setting)"
}
