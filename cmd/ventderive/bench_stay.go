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

// ---- storage per input ----

// tableSize is one service table (a partitioned table with its partitions
// summed) as pg_total_relation_size sees it.
type tableSize struct {
	name                      string
	relations                 int // the table itself, or its partitions
	rows                      int64
	heap, index, toast, total int64 // bytes; heap includes the free-space and visibility maps
}

// storageReport is the store's size after a run.
type storageReport struct {
	inputs       int64 // inputs recorded (inbox rows)
	deadLetters  int64
	messages     int   // distinct messages published
	payloadBytes int64 // their bytes
	tables       []tableSize
	total        int64
}

// storageSizeSQL sizes every table of the service's schema, each partition
// counted under its root: total is pg_total_relation_size (table, indexes,
// TOAST, free-space and visibility maps), index pg_indexes_size, TOAST the
// TOAST table with its index; heap is the rest.
const storageSizeSQL = `
WITH rel AS (
    SELECT c.oid, c.reltoastrelid, coalesce(pg_partition_root(c.oid), c.oid) AS root
    FROM pg_class c JOIN pg_namespace n ON n.oid = c.relnamespace
    WHERE n.nspname = current_schema() AND c.relkind IN ('r', 'm')
)
SELECT root::regclass::text, count(*),
       sum(pg_total_relation_size(oid))::bigint,
       sum(pg_indexes_size(oid))::bigint,
       sum(CASE WHEN reltoastrelid = 0 THEN 0 ELSE pg_total_relation_size(reltoastrelid) END)::bigint
FROM rel GROUP BY root ORDER BY 3 DESC, 1`

// storage measures the service's tables in pool's database after msgs
// were recorded.
func storage(ctx context.Context, pool *pgxpool.Pool, msgs []benchMsg) (storageReport, error) {
	var r storageReport
	if err := pool.QueryRow(ctx, `SELECT (SELECT count(*) FROM inbox), (SELECT count(*) FROM dead_letter)`).Scan(&r.inputs, &r.deadLetters); err != nil {
		return r, err
	}
	seen := map[string]bool{}
	for _, m := range msgs {
		if !seen[m.msgID] {
			seen[m.msgID] = true
			r.messages++
			r.payloadBytes += int64(len(m.payload))
		}
	}
	rows, err := pool.Query(ctx, storageSizeSQL)
	if err != nil {
		return r, fmt.Errorf("table sizes: %w", err)
	}
	for rows.Next() {
		var t tableSize
		if err := rows.Scan(&t.name, &t.relations, &t.total, &t.index, &t.toast); err != nil {
			rows.Close()
			return r, err
		}
		t.heap = t.total - t.index - t.toast
		r.tables = append(r.tables, t)
		r.total += t.total
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return r, err
	}
	for i := range r.tables {
		// The names come from pg_class, quoted by regclass where needed.
		if err := pool.QueryRow(ctx, "SELECT count(*) FROM "+r.tables[i].name).Scan(&r.tables[i].rows); err != nil {
			return r, fmt.Errorf("count %s: %w", r.tables[i].name, err)
		}
	}
	return r, nil
}

// perInput is bytes divided by the inputs recorded.
func (r storageReport) perInput(bytes int64) float64 {
	if r.inputs == 0 {
		return 0
	}
	return float64(bytes) / float64(r.inputs)
}

func (b *bench) reportStorage(name string, r storageReport) {
	fmt.Fprintf(b.out, "\nStorage after %s: %d inputs recorded and %d dead letters of %d messages (%.0f bytes on average);\n"+
		"the service's tables with their indexes and TOAST hold %.1f MB: %.0f bytes per input recorded (target at most 1.5 KB).\n"+
		"Per table (pg_total_relation_size; heap includes the free-space and visibility maps; a partitioned table sums its partitions):\n\n",
		name, r.inputs, r.deadLetters, r.messages, float64(r.payloadBytes)/float64(max(1, r.messages)), float64(r.total)/1e6, r.perInput(r.total))
	tw := tabwriter.NewWriter(b.out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "table\trelations\trows\theap bytes\tindex bytes\tTOAST bytes\ttotal bytes\tbytes/input\t")
	for _, t := range r.tables {
		fmt.Fprintf(tw, "%s\t%d\t%d\t%d\t%d\t%d\t%d\t%.0f\t\n", t.name, t.relations, t.rows, t.heap, t.index, t.toast, t.total, r.perInput(t.total))
	}
	fmt.Fprintf(tw, "all\t\t\t\t\t\t%d\t%.0f\t\n", r.total, r.perInput(r.total))
	tw.Flush()
}

// ---- history growth ----

// history measures the per-input cost after a long simulated history
// against an almost empty store: the same measured inputs (the last
// --stay-inputs of --history-hours of --history-copies copies of the unit,
// in time order) drained by a new replica, once after storing everything
// before them and once after storing only the patients' admissions
// (Patient, height, weight: so that the same derivations can be made).
func (b *bench) history(ctx context.Context) error {
	msgs := benchMessages(b.f.seed, b.f.historyCopies, math.MaxInt, time.Duration(b.f.historyH)*time.Hour)
	n := b.f.stayN
	if len(msgs) < 2*n {
		return fmt.Errorf("%d inputs in %d h of %d copies: too few for --stay-inputs %d", len(msgs), b.f.historyH, b.f.historyCopies, n)
	}
	past, measured := msgs[:len(msgs)-n], msgs[len(msgs)-n:]
	var admissions []benchMsg
	for _, m := range past {
		if m.subject == scenario.SubjectADT {
			admissions = append(admissions, m)
		}
	}
	type histRow struct {
		benchRow
		stored int
		st     storageReport
	}
	var rows []histRow
	for _, r := range []struct {
		name  string
		first []benchMsg
	}{
		{"admissions only", admissions},
		{fmt.Sprintf("after %d h", b.f.historyH), past},
	} {
		row, st, err := b.measureAfter(ctx, r.name, r.first, measured)
		if err != nil {
			return fmt.Errorf("history %s: %w", r.name, err)
		}
		rows = append(rows, histRow{row, len(r.first), st})
	}
	fmt.Fprintf(b.out, "\nHistory growth, 1 replica: %d patients (%d copies of the unit) over %d h, %d inputs. Each run stores a history first\n"+
		"(only the admissions, or everything before the last %d inputs), %s, then a new replica drains the same last %d inputs.\n\n",
		10*b.f.historyCopies, b.f.historyCopies, b.f.historyH, len(msgs), n, analyzeText(b.f.stayAnalyze), n)
	tw := tabwriter.NewWriter(b.out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "store\tinputs stored first\tstore MB\tbytes/input\tinputs/s\tPostgreSQL CPU us/input\tCPU us/input\tmachine CPU us/input\t")
	for _, r := range rows {
		fmt.Fprintf(tw, "%s\t%d\t%.1f\t%.0f\t%.0f\t%.0f\t%.0f\t%.0f\t\n", r.name, r.stored, float64(r.st.total)/1e6, r.st.perInput(r.st.total),
			r.perSec, r.serverUS, r.cpuUS, r.machineUS)
	}
	tw.Flush()
	e, g := rows[0], rows[1]
	fmt.Fprintf(b.out, "after history/admissions only: PostgreSQL CPU per input %s, service CPU per input %.2f, PostgreSQL + service %s (target at most 1.2); inputs/s %.2f\n",
		ratioText(g.serverUS, e.serverUS), g.cpuUS/e.cpuUS, ratioText(g.serverUS+g.cpuUS, e.serverUS+e.cpuUS), g.perSec/e.perSec)
	return nil
}

func analyzeText(analyze bool) string {
	if analyze {
		return "runs ANALYZE (as autovacuum would)"
	}
	return "without ANALYZE (no statistics, as with autovacuum off)"
}

// measureAfter stores first on a fresh database, then measures a new
// replica draining measured, and sizes the store at the end.
func (b *bench) measureAfter(ctx context.Context, name string, first, measured []benchMsg) (benchRow, storageReport, error) {
	row := benchRow{name: name}
	url, pool, err := b.freshRun(ctx)
	if err != nil {
		return row, storageReport{}, err
	}
	defer pool.Close()
	if err := b.publishAll(ctx, first); err != nil {
		return row, storageReport{}, err
	}
	// About 1,000 inputs/s on a small machine: allow a tenth of that.
	timeout := max(10*time.Minute, time.Duration(len(first))*10*time.Millisecond)
	rs, err := b.startReplicas(ctx, url, 1)
	if err == nil {
		err = b.waitDrained(ctx, consumer.DefaultDurable, pool, timeout, benchPayloads(first))
	}
	if serr := stopReplicas(rs); err == nil {
		err = serr
	}
	if err != nil {
		return row, storageReport{}, fmt.Errorf("store the first %d inputs: %w", len(first), err)
	}
	if b.f.stayAnalyze {
		if _, err := pool.Exec(ctx, "ANALYZE"); err != nil {
			return row, storageReport{}, err
		}
	}
	if err := b.publishAll(ctx, measured); err != nil {
		return row, storageReport{}, err
	}
	all := append(append([]benchMsg(nil), first...), measured...)
	runtime.GC()
	from := b.takeUsage(true)
	rs, err = b.startReplicas(ctx, url, 1)
	if err == nil {
		err = b.waitDrained(ctx, consumer.DefaultDurable, pool, 5*time.Minute, benchPayloads(all))
	}
	to := b.takeUsage(false)
	if serr := stopReplicas(rs); err == nil {
		err = serr
	}
	if err != nil {
		return row, storageReport{}, err
	}
	row.fill(from, to, len(measured))
	if err := b.checkAccounted(ctx, pool, all); err != nil {
		return row, storageReport{}, err
	}
	st, err := storage(ctx, pool, all)
	return row, st, err
}
