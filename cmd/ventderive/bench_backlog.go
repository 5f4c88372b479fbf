package main

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"runtime"
	"time"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/scenario"
	"github.com/ventderive/ventderive/consumer"
)

// backlogResult is the backlog-and-replay measurement.
type backlogResult struct {
	inputs     int           // backlog inputs in the stream before the replica started
	drain      time.Duration // from the replica's start to every input settled
	perSec     float64       // backlog (and fresh) inputs per second of the drain
	freshN     int           // fresh inputs published during the drain
	publishAt  int           // backlog inputs recorded when they were published
	derivedAt  int           // backlog inputs recorded when the fresh gas's first Observation was published
	latency    time.Duration // fresh gas publish to its last derived Observation stored in the output stream
	outputs    int           // derived Observations of the fresh inputs
	waitBehind time.Duration // what the gas would have waited behind the rest of the backlog at the drain rate
}

// backlogMessages are n inputs of copies of the unit (as benchMessages)
// and, as fresh input, one more copy's first patient: its admission, its
// readings up to its first blood gas and that gas, last.
func backlogMessages(seed int64, n int) (backlog, fresh []benchMsg) {
	sc := scenario.Generate(scenario.Options{Seed: seed, Duration: scenario.MinDuration})
	copies := (n + len(sc.Messages) - 1) / len(sc.Messages)
	backlog = benchMessages(seed, copies, n, scenario.MinDuration)
	if len(sc.Patients) == 0 {
		return backlog, nil
	}
	p := sc.Patients[0].Ref
	for _, m := range sc.Messages {
		if m.Patient != p || m.Malformed {
			continue
		}
		fresh = append(fresh, copyMsg(m, copies+1))
		if m.Subject == scenario.SubjectLab {
			break
		}
	}
	return backlog, fresh
}

// backlog measures a drain of --backlog inputs that are in the stream
// before one replica starts, with a fresh patient's inputs (admission,
// readings, blood gas) published once a quarter of the backlog is recorded.
func (b *bench) backlog(ctx context.Context) (backlogResult, error) {
	var res backlogResult
	backlog, fresh := backlogMessages(b.f.seed, b.f.backlog)
	if len(fresh) == 0 || fresh[len(fresh)-1].subject != scenario.SubjectLab {
		return res, fmt.Errorf("the scenario's first patient has no blood gas")
	}
	res.inputs, res.freshN = len(backlog), len(fresh)
	url, pool, err := b.freshRun(ctx)
	if err != nil {
		return res, err
	}
	defer pool.Close()
	if err := b.publishAll(ctx, backlog); err != nil {
		return res, err
	}
	s, err := b.js.Stream(ctx, consumer.DefaultInputStream)
	if err != nil {
		return res, err
	}
	info, err := s.Info(ctx)
	if err != nil {
		return res, err
	}
	lastBacklog := int64(info.State.LastSeq)
	recorded := func() (int, error) {
		var n int
		err := pool.QueryRow(ctx, `SELECT count(*) FROM inbox WHERE stream_seq <= $1`, lastBacklog).Scan(&n)
		return n, err
	}
	keys := make([]string, len(fresh))
	for i, m := range fresh {
		sum := sha256.Sum256(m.payload)
		keys[i] = hex.EncodeToString(sum[:])
	}
	gasKey := keys[len(keys)-1]

	runtime.GC()
	start := time.Now()
	rs, err := b.startReplicas(ctx, url, 1)
	if err == nil {
		err = b.whileDraining(ctx, func() (bool, error) {
			n, err := recorded()
			res.publishAt = n
			return n >= len(backlog)/4, err
		})
	}
	if err == nil {
		err = b.publishAll(ctx, fresh)
	}
	if err == nil {
		err = b.whileDraining(ctx, func() (bool, error) {
			var n int
			if err := pool.QueryRow(ctx, `SELECT count(*) FROM outbox WHERE inbox_key = decode($1, 'hex') AND subject = $2 AND published_at IS NOT NULL`,
				gasKey, consumer.DefaultObservationSub).Scan(&n); err != nil || n == 0 {
				return false, err
			}
			res.derivedAt, err = recorded()
			return true, err
		})
	}
	if err == nil {
		err = b.waitDrained(ctx, consumer.DefaultDurable, pool, 10*time.Minute, benchPayloads(append(backlog[:len(backlog):len(backlog)], fresh...)))
	}
	res.drain = time.Since(start)
	if serr := stopReplicas(rs); err == nil {
		err = serr
	}
	if err != nil {
		return res, err
	}
	all := append(backlog[:len(backlog):len(backlog)], fresh...)
	if err := b.checkAccounted(ctx, pool, all); err != nil {
		return res, err
	}
	res.perSec = float64(len(all)) / res.drain.Seconds()

	// Latency: from the gas's publish to the last derived Observation of
	// the fresh inputs, both as the streams recorded them.
	inSeq, _, err := b.streamTimes(ctx, consumer.DefaultInputStream)
	if err != nil {
		return res, err
	}
	_, outID, err := b.streamTimes(ctx, consumer.DefaultOutputStream)
	if err != nil {
		return res, err
	}
	var gasSeq int64
	if err := pool.QueryRow(ctx, `SELECT stream_seq FROM inbox WHERE inbox_key = decode($1, 'hex')`, gasKey).Scan(&gasSeq); err != nil {
		return res, fmt.Errorf("the fresh gas: %w", err)
	}
	rows, err := pool.Query(ctx, `SELECT msg_id FROM outbox WHERE inbox_key = ANY(ARRAY(SELECT decode(k, 'hex') FROM unnest($1::text[]) AS k)) AND subject = $2`, keys, consumer.DefaultObservationSub)
	if err != nil {
		return res, err
	}
	var last time.Time
	for rows.Next() {
		var id string
		if err := rows.Scan(&id); err != nil {
			rows.Close()
			return res, err
		}
		at, ok := outID[id]
		if !ok {
			rows.Close()
			return res, fmt.Errorf("outbox message %s not in the output stream", id)
		}
		res.outputs++
		if at.After(last) {
			last = at
		}
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return res, err
	}
	if res.outputs == 0 {
		return res, fmt.Errorf("the fresh inputs derived nothing")
	}
	res.latency = last.Sub(inSeq[uint64(gasSeq)])
	res.waitBehind = time.Duration(float64(len(backlog)-res.publishAt) / res.perSec * float64(time.Second))
	return res, nil
}

// whileDraining polls done every 20 ms for at most 10 minutes.
func (b *bench) whileDraining(ctx context.Context, done func() (bool, error)) error {
	deadline := time.Now().Add(10 * time.Minute)
	for {
		ok, err := done()
		if err != nil || ok {
			return err
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("backlog: not reached in 10 min")
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(20 * time.Millisecond):
		}
	}
}

// reportBacklog prints the backlog measurement against the sustained rate
// of the one-replica pipeline run.
func (b *bench) reportBacklog(r backlogResult, sustained float64) {
	ratio := "n/a (no one-replica pipeline run)"
	if sustained > 0 {
		ratio = fmt.Sprintf("%.2f", r.perSec/sustained)
	}
	lane := "on"
	if b.f.freshAge < 0 {
		lane = "off (--fresh-age negative)"
	}
	fmt.Fprintf(b.out, "\nBacklog and replay, 1 replica: %d inputs in the stream before the replica starts; %d fresh inputs (a new patient's admission,\n"+
		"readings and first blood gas, the gas last) published when %d of them were recorded; fresh lane %s.\n", r.inputs, r.freshN, r.publishAt, lane)
	fmt.Fprintf(b.out, "  drain: %.0f inputs/s (%.1f s); sustained (pipeline, 1 replica, above): %.0f inputs/s; drain/sustained: %s\n",
		r.perSec, r.drain.Seconds(), sustained, ratio)
	fmt.Fprintf(b.out, "  fresh blood gas: publish to its last derived Observation in the output stream %.0f ms (%d Observations of the fresh inputs);\n"+
		"  %d of %d backlog inputs recorded when its first Observation was published; behind the rest of the backlog it would have waited about %.1f s\n",
		ms(r.latency), r.outputs, r.derivedAt, r.inputs, r.waitBehind.Seconds())
}
