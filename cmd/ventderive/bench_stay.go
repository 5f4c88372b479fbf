package main

import (
	"context"
	"fmt"
	"math"
	"runtime"
	"text/tabwriter"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/scenario"
	"github.com/ventderive/ventderive/consumer"
)

// stayRow is one long-stay run.
type stayRow struct {
	benchRow
	patients int
	stored   int // inputs stored before the measured ones
}

// stays compares the same number of inputs as few patients with long stays
// (dense: one copy of the unit over --stay-hours) and as many patients with
// short ones (spread: copies of 6 h stays), one replica each. The per-input
// cost must not depend on how long a patient has been in the store, so the
// ratios of the two runs are the figures to watch.
func (b *bench) stays(ctx context.Context) error {
	copies := max(2, int(math.Round(float64(b.f.stayH)/scenario.MinDuration.Hours())))
	dense := benchMessages(b.f.seed, 1, math.MaxInt, time.Duration(b.f.stayH)*time.Hour)
	spread := benchMessages(b.f.seed, copies, math.MaxInt, scenario.MinDuration)
	n := min(len(dense), len(spread))
	paced := int(b.f.rate * b.f.paced.Seconds())
	if n < b.f.stayN+paced+1 {
		return fmt.Errorf("%d inputs in %d h: too few for --stay-inputs %d and %d paced inputs", n, b.f.stayH, b.f.stayN, paced)
	}
	var rows []stayRow
	for _, r := range []struct {
		name     string
		msgs     []benchMsg
		patients int
	}{
		{fmt.Sprintf("spread (%d x 6 h)", 10*copies), spread[:n], 10 * copies},
		{fmt.Sprintf("dense (10 x %d h)", b.f.stayH), dense[:n], 10},
	} {
		row, err := b.stay(ctx, r.name, r.msgs, r.patients, paced)
		if err != nil {
			return fmt.Errorf("%s: %w", r.name, err)
		}
		rows = append(rows, row)
	}
	stats := "without ANALYZE (no statistics, as with autovacuum off)"
	if b.f.stayAnalyze {
		stats = "runs ANALYZE (as autovacuum would)"
	}
	fmt.Fprintf(b.out, "\nLong stays, 1 replica: up to %d inputs as 10 patients over %d h (dense) and %d patients over 6 h (spread). Each run stores\n"+
		"its stay up to the last blood gases, %s, starts a new replica (its connections plan on the grown store),\n"+
		"drains the next %d inputs (inputs/s, CPU) and publishes %d more around the last blood gases at %g/s (p50/p99, from input\n"+
		"publish to the last derived Observation in the output stream).\n\n", n, b.f.stayH, 10*copies, stats, b.f.stayN, paced, b.f.rate)
	tw := tabwriter.NewWriter(b.out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "run\tpatients\tinputs stored first\tinputs/s\tPostgreSQL CPU us/input\tCPU us/input\tmachine CPU us/input\tp50 ms\tp99 ms\tpaced samples\t")
	for _, r := range rows {
		fmt.Fprintf(tw, "%s\t%d\t%d\t%.0f\t%.0f\t%.0f\t%.0f\t%.1f\t%.1f\t%d\t\n", r.name, r.patients, r.stored, r.perSec, r.serverUS,
			r.cpuUS, r.machineUS, ms(r.p50), ms(r.p99), r.latencyN)
	}
	tw.Flush()
	s, d := rows[0], rows[1]
	fmt.Fprintf(b.out, "dense/spread: PostgreSQL CPU per input %s (target at most 1.2), inputs/s %.2f (target at least 0.8); dense paced p99 %.1f ms (target under 100 ms)\n",
		ratioText(d.serverUS, s.serverUS), d.perSec/s.perSec, ms(d.p99))
	return nil
}

// ratioText is a/b with two decimals, or "n/a" when b is 0 (PostgreSQL not
// on this machine: its CPU is not measured).
func ratioText(a, b float64) string {
	if b == 0 {
		return "n/a (PostgreSQL is not on this machine)"
	}
	return fmt.Sprintf("%.2f", a/b)
}

// stay runs one long-stay measurement on a fresh database: msgs minus the
// last stayN+paced stored first, then the next stayN drained and measured,
// then the last paced inputs published at the bench's rate.
func (b *bench) stay(ctx context.Context, name string, msgs []benchMsg, patients, paced int) (stayRow, error) {
	row := stayRow{benchRow: benchRow{name: name}, patients: patients}
	// The paced inputs are centred on the last blood-gas report that
	// leaves room before it, so that some of them derive values; what
	// comes after them is left out.
	end := len(msgs)
	for i := len(msgs) - 1; i >= b.f.stayN+paced; i-- {
		if msgs[i].subject == scenario.SubjectLab {
			end = min(len(msgs), i+paced/2)
			break
		}
	}
	msgs = msgs[:end]
	stored := len(msgs) - b.f.stayN - paced
	first, measured, last := msgs[:stored], msgs[stored:stored+b.f.stayN], msgs[stored+b.f.stayN:]
	row.stored = stored
	url, pool, err := b.freshRun(ctx)
	if err != nil {
		return row, err
	}
	defer pool.Close()

	// The stay so far.
	if err := b.publishAll(ctx, first); err != nil {
		return row, err
	}
	if err := b.drainWith(ctx, url, pool, benchPayloads(first)); err != nil {
		return row, fmt.Errorf("store the first %d inputs: %w", stored, err)
	}
	if b.f.stayAnalyze {
		if _, err := pool.Exec(ctx, "ANALYZE"); err != nil {
			return row, err
		}
	}

	// Measured: a new replica drains the next inputs.
	if err := b.publishAll(ctx, measured); err != nil {
		return row, err
	}
	runtime.GC()
	from := b.takeUsage(true)
	rs, err := b.startReplicas(ctx, url, 1)
	if err == nil {
		err = b.waitDrained(ctx, consumer.DefaultDurable, pool, 5*time.Minute, benchPayloads(msgs[:stored+b.f.stayN]))
	}
	to := b.takeUsage(false)
	if err != nil {
		_ = stopReplicas(rs)
		return row, err
	}
	row.fill(from, to, len(measured))

	// Paced, same replica, same store.
	var afterSeq uint64
	s, err := b.js.Stream(ctx, consumer.DefaultInputStream)
	if err == nil {
		var info *jetstream.StreamInfo
		if info, err = s.Info(ctx); err == nil {
			afterSeq = info.State.LastSeq
		}
	}
	if err == nil {
		err = b.publishPaced(ctx, last, b.f.rate)
	}
	if err == nil {
		err = b.waitDrained(ctx, consumer.DefaultDurable, pool, 2*time.Minute, benchPayloads(msgs))
	}
	if serr := stopReplicas(rs); err == nil {
		err = serr
	}
	if err != nil {
		return row, err
	}
	if err := b.checkAccounted(ctx, pool, msgs); err != nil {
		return row, err
	}
	lat, _, err := b.outputLatency(ctx, pool, afterSeq)
	if err != nil {
		return row, err
	}
	row.p50, row.p99, row.latencyN = percentile(lat, 0.5), percentile(lat, 0.99), len(lat)
	return row, nil
}

// drainWith starts a replica on url, waits until want inputs are settled
// and stops it.
func (b *bench) drainWith(ctx context.Context, url string, pool *pgxpool.Pool, want int64) error {
	rs, err := b.startReplicas(ctx, url, 1)
	if err == nil {
		err = b.waitDrained(ctx, consumer.DefaultDurable, pool, 10*time.Minute, want)
	}
	if serr := stopReplicas(rs); err == nil {
		err = serr
	}
	return err
}
