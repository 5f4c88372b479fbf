package main

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"math"
	"runtime"
	"slices"
	"sync"
	"sync/atomic"
	"text/tabwriter"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/scenario"
	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/fhirmap"
)

// The history store (--history-days): days of the simulator's unit, copied
// to --history-patients patients, written straight through the store's
// group ingest (postgres.Store.IngestBatch with the service's planner, so
// blood gases get their derivations as in service), no NATS. Whatever
// shape the store's tables have, the builder writes it as the service
// would. After each size a new replica drains the same workload (the first
// --history-inputs inputs of the next simulated day) on the history store
// and on an empty store; the ratio of their per-input CPU is the figure.

// historyGroup is the number of messages per IngestBatch of the builder:
// larger than the service's groups (64), as a backfill would use.
const historyGroup = 256

// historyWriters write disjoint patients (copies of the unit) at once.
const historyWriters = 2

// historyPoint is one size of the history store, measured.
type historyPoint struct {
	days, patients int
	stored         int64 // inputs recorded in the store before the workload
	buildPerSec    float64
	empty, history benchRow
	st             storageReport
}

// ratio is the per-input CPU (service + PostgreSQL) on the history store
// over the empty store's.
func (p historyPoint) ratio() float64 {
	e := p.empty.cpuUS + p.empty.serverUS
	if e <= 0 {
		return 0
	}
	return (p.history.cpuUS + p.history.serverUS) / e
}

// historyVerdict is the targets line of the largest history store: judged
// only at the target's size (smaller stores show the trend, not the target).
func historyVerdict(p historyPoint) string {
	r := p.ratio()
	l := fmt.Sprintf("per-input CPU (service + PostgreSQL) after %d days of %d patients / empty store: %.2f (target at most %.1f after %d days of %d patients): ",
		p.days, p.patients, r, targetHistoryRatio, targetHistoryDays, targetHistoryPatients)
	if p.days < targetHistoryDays || p.patients < targetHistoryPatients {
		at := "within the bound at this size"
		if r > targetHistoryRatio {
			at = fmt.Sprintf("%.1fx over the bound already at this size", r/targetHistoryRatio)
		}
		return l + fmt.Sprintf("not judged (%s; run with --history-days %d --history-patients %d to judge it)", at, targetHistoryDays, targetHistoryPatients)
	}
	if r <= targetHistoryRatio {
		return l + "met"
	}
	return l + fmt.Sprintf("MISSED, %.1fx over", r/targetHistoryRatio)
}

// historyDay is the simulator's day d (24 h from DefaultStart + d days)
// of copy c of the unit, as the next day of the same stays: after day 0
// the admissions (Patient, height, weight) are left out, and every
// Observation and Bundle id of the unit ("lg-0001-...") gets the day in it
// ("lg-d3-0001-..."), so that a day's readings are new readings, not new
// versions of the day before's.
func (b *bench) historyDay(d, c int) []benchMsg {
	var out []benchMsg
	for _, m := range b.historyScenario(d) {
		if d > 0 && m.Subject == scenario.SubjectADT {
			continue
		}
		out = append(out, copyMsg(m, c))
	}
	return out
}

// historyScenario is the simulator's messages of day d, ids of day d.
func (b *bench) historyScenario(d int) []scenario.Message {
	sc := scenario.Generate(scenario.Options{Seed: b.f.seed, Start: scenario.DefaultStart.Add(time.Duration(d) * 24 * time.Hour),
		Duration: 24 * time.Hour, VentEvery: b.f.historyEvery})
	if d > 0 {
		tag := fmt.Appendf(nil, `"lg-d%d-0`, d)
		for i := range sc.Messages {
			sc.Messages[i].Payload = bytes.ReplaceAll(sc.Messages[i].Payload, []byte(`"lg-0`), tag)
		}
	}
	return sc.Messages
}

// historyWorkload is the measured workload after d days: the first n
// inputs, in time order, of day d of every copy.
func (b *bench) historyWorkload(d, n int) []benchMsg {
	type timed struct {
		at time.Time
		m  benchMsg
	}
	var all []timed
	msgs := b.historyScenario(d)
	for c := range b.f.historyPatients / 10 {
		for _, m := range msgs {
			if d == 0 || m.Subject != scenario.SubjectADT {
				all = append(all, timed{m.At, copyMsg(m, c)})
			}
		}
	}
	slices.SortStableFunc(all, func(a, b timed) int { return a.at.Compare(b.at) })
	out := make([]benchMsg, 0, n)
	for _, t := range all[:min(n, len(all))] {
		out = append(out, t.m)
	}
	return out
}

// historyAdmissions are the admissions of every copy (day 0's Patient,
// height and weight messages): the empty store holds them and nothing
// else, so that the workload derives there as on the history store.
func (b *bench) historyAdmissions() []benchMsg {
	var out []benchMsg
	for c := range b.f.historyPatients / 10 {
		for _, m := range b.historyScenario(0) {
			if m.Subject == scenario.SubjectADT {
				out = append(out, copyMsg(m, c))
			}
		}
	}
	return out
}

// historyBuilder writes days of history into one store.
type historyBuilder struct {
	b       *bench
	pool    *pgxpool.Pool
	store   *postgres.Store
	planner consumer.Planner
	cfg     consumer.Config
	codes   *fhirmap.CodeTable
	copies  int
}

func (b *bench) newHistoryBuilder(pool *pgxpool.Pool) *historyBuilder {
	cfg := consumer.DefaultConfig()
	cfg.Window = b.site.Window
	site := b.site
	site.Window, site.TemperatureWindow = cfg.Window, cfg.TemperatureWindow
	codes := fhirmap.DefaultCodes()
	if site.CodeSystemURL != "" {
		codes = codes.WithCodeSystemURL(site.CodeSystemURL)
	}
	return &historyBuilder{b: b, pool: pool, store: postgres.New(pool, postgres.Options{PatientKey: b.patientKey}),
		planner: consumer.Planner{Site: site, ObservationSub: cfg.ObservationSub, ProvenanceSub: cfg.ProvenanceSub},
		cfg:     cfg, codes: codes, copies: b.f.historyPatients / 10}
}

// message is what the pipeline makes of a received message (receive in
// consumer/pipeline.go): nil for one that does not decode (left out of the
// history: a dead letter costs nothing the history measurement is about).
func (h *historyBuilder) message(m benchMsg, seq uint64) *consumer.Message {
	d, err := fhirmap.Decode(m.payload, h.codes)
	if err != nil {
		return nil
	}
	sum := sha256.Sum256(m.payload)
	return &consumer.Message{InboxKey: hex.EncodeToString(sum[:]), Subject: m.subject, StreamSeq: seq,
		Received: time.Now().UTC(), Raw: m.payload, Resources: d.Resources, Facts: d.Facts,
		Window: h.cfg.Window, TempWindow: h.cfg.TemperatureWindow, Horizon: h.cfg.Horizon}
}

// build writes days [from, to) of every copy: historyWriters goroutines,
// each taking whole (day, copy) pieces, so that no patient is written by
// two at once, in groups of historyGroup in time order. It returns the
// messages written (duplicates of earlier ones included).
func (h *historyBuilder) build(ctx context.Context, from, to int) (int64, error) {
	type piece struct{ d, c int }
	work := make(chan piece)
	var written atomic.Int64
	var seq atomic.Uint64
	var wg sync.WaitGroup
	errs := make(chan error, historyWriters)
	for range historyWriters {
		wg.Go(func() {
			for p := range work {
				if err := h.write(ctx, h.b.historyDay(p.d, p.c), &seq, &written); err != nil {
					errs <- fmt.Errorf("day %d, copy %d: %w", p.d, p.c, err)
					return
				}
			}
		})
	}
	var err error
feed:
	for d := from; d < to; d++ {
		for c := range h.copies {
			select {
			case work <- piece{d, c}:
			case err = <-errs:
				break feed
			}
		}
	}
	close(work)
	wg.Wait()
	close(errs)
	if err == nil {
		err = <-errs
	}
	if err != nil {
		return written.Load(), err
	}
	// The relay would have published the history's outbox rows long ago;
	// the measured replica must not spend its time doing so.
	_, err = h.pool.Exec(ctx, `UPDATE outbox SET published_at = now() WHERE published_at IS NULL`)
	return written.Load(), err
}

// write records msgs in groups of historyGroup, in their order.
func (h *historyBuilder) write(ctx context.Context, msgs []benchMsg, seq *atomic.Uint64, written *atomic.Int64) error {
	group := make([]consumer.Message, 0, historyGroup)
	flush := func() error {
		if len(group) == 0 {
			return nil
		}
		for i, r := range h.store.IngestBatch(ctx, group, func(s consumer.Snapshot) (consumer.Changes, error) {
			return h.planner.Plan(s, time.Now().UTC())
		}) {
			if r.Err != nil && !errors.Is(r.Err, consumer.ErrDuplicate) {
				return fmt.Errorf("message %s: %w", group[i].InboxKey[:12], r.Err)
			}
		}
		written.Add(int64(len(group)))
		group = group[:0]
		return nil
	}
	for _, m := range msgs {
		if cm := h.message(m, seq.Add(1)); cm != nil {
			if group = append(group, *cm); len(group) >= historyGroup {
				if err := flush(); err != nil {
					return err
				}
			}
		}
	}
	return flush()
}

// drainMeasured publishes msgs and measures a new replica draining them on
// url, whose store already holds before inputs and dead letters.
func (b *bench) drainMeasured(ctx context.Context, name, url string, pool *pgxpool.Pool, before int64, msgs []benchMsg) (benchRow, error) {
	row := benchRow{name: name}
	if err := b.resetStreams(ctx); err != nil {
		return row, err
	}
	if err := b.publishAll(ctx, msgs); err != nil {
		return row, err
	}
	// Inputs already stored (a repeated Patient resource) are duplicates
	// and add nothing; wait for the new ones.
	seen := map[string]bool{}
	for _, m := range msgs {
		sum := sha256.Sum256(m.payload)
		seen[hex.EncodeToString(sum[:])] = true
	}
	keys := make([]string, 0, len(seen))
	for k := range seen {
		keys = append(keys, k)
	}
	var old int64
	if err := pool.QueryRow(ctx, `
WITH k AS (SELECT decode(k, 'hex') AS key FROM unnest($1::text[]) AS k)
SELECT (SELECT count(*) FROM inbox WHERE inbox_key IN (SELECT key FROM k))
     + (SELECT count(*) FROM dead_letter WHERE inbox_key IN (SELECT key FROM k))`, keys).Scan(&old); err != nil {
		return row, err
	}
	want := before + int64(len(keys)) - old
	runtime.GC()
	from := b.takeUsage(true)
	rs, err := b.startReplicas(ctx, url, 1)
	if err == nil {
		err = b.waitDrained(ctx, consumer.DefaultDurable, pool, 5*time.Minute, want)
	}
	to := b.takeUsage(false)
	if serr := stopReplicas(rs); err == nil {
		err = serr
	}
	if err != nil {
		return row, err
	}
	row.fill(from, to, len(msgs))
	return row, nil
}

// recorded counts the inputs and dead letters of a store.
func recorded(ctx context.Context, pool *pgxpool.Pool) (int64, error) {
	var n int64
	err := pool.QueryRow(ctx, `SELECT (SELECT count(*) FROM inbox) + (SELECT count(*) FROM dead_letter)`).Scan(&n)
	return n, err
}

// historyDays builds the history store up to each of --history-days in
// turn, measures the workload on it and on an empty store, and reports the
// trend, the history store's bytes per input and a site's year after
// retention.
func (b *bench) historyDays(ctx context.Context) ([]historyPoint, error) {
	hurl, hpool, err := b.newDatabase(ctx)
	if err != nil {
		return nil, err
	}
	defer hpool.Close()
	h := b.newHistoryBuilder(hpool)
	var points []historyPoint
	built := 0
	var buildTime time.Duration
	var buildN int64
	for _, days := range b.f.historyDays {
		t0 := time.Now()
		n, err := h.build(ctx, built, days)
		if err != nil {
			return points, fmt.Errorf("build days %d-%d: %w", built, days, err)
		}
		el := time.Since(t0)
		buildTime, buildN, built = buildTime+el, buildN+n, days
		if b.f.stayAnalyze {
			if _, err := hpool.Exec(ctx, "ANALYZE"); err != nil {
				return points, err
			}
		}
		p := historyPoint{days: days, patients: b.f.historyPatients, buildPerSec: float64(n) / el.Seconds()}
		if p.stored, err = recorded(ctx, hpool); err != nil {
			return points, err
		}
		work := b.historyWorkload(days, b.f.historyInputs)
		// The empty store first, so that the history store's measurement
		// does not run right after the builder's checkpoints.
		eurl, epool, err := b.newDatabase(ctx)
		if err != nil {
			return points, err
		}
		var eseq atomic.Uint64
		var en atomic.Int64
		err = b.newHistoryBuilder(epool).write(ctx, b.historyAdmissions(), &eseq, &en)
		var before int64
		if err == nil {
			before, err = recorded(ctx, epool)
		}
		if err == nil {
			p.empty, err = b.drainMeasured(ctx, "empty store", eurl, epool, before, work)
		}
		epool.Close()
		if err != nil {
			return points, fmt.Errorf("empty store: %w", err)
		}
		if p.history, err = b.drainMeasured(ctx, fmt.Sprintf("after %d days", days), hurl, hpool, p.stored, work); err != nil {
			return points, fmt.Errorf("history store of %d days: %w", days, err)
		}
		if p.st, err = storage(ctx, hpool, nil); err != nil {
			return points, err
		}
		points = append(points, p)
		// A 30-day store takes hours to build: each size is reported on
		// stderr as soon as it is measured, so that a run stopped early
		// still shows the sizes it reached (the table on stdout follows
		// at the end).
		fmt.Fprintf(b.e.stderr, "history: %d days, %d inputs stored, built at %.0f inputs/s, %.0f bytes/input, CPU+PG us/input empty %.0f, history %.0f, ratio %.2f\n",
			p.days, p.stored, p.buildPerSec, p.st.perInput(p.st.total), p.empty.cpuUS+p.empty.serverUS, p.history.cpuUS+p.history.serverUS, p.ratio())
	}
	b.reportHistory(points, float64(buildN)/buildTime.Seconds())
	last := points[len(points)-1]
	if last.days >= 2 {
		if err := b.reportYear(ctx, hpool, last); err != nil {
			return points, fmt.Errorf("retention estimate: %w", err)
		}
	} else {
		fmt.Fprintln(b.out, "A site's year after retention: needs a history of at least 2 days (one past the 24 h horizon).")
	}
	return points, nil
}

func (b *bench) reportHistory(points []historyPoint, buildRate float64) {
	fmt.Fprintf(b.out, "\nHistory store, 1 replica: %d patients (%d copies of the unit), built through the store's group ingest (IngestBatch, groups of %d,\n"+
		"%d writers over disjoint patients, a ventilator reading every %s, the service's planner: blood gases derived as in service, no NATS) at %.0f inputs/s overall, %s.\n"+
		"At each size a new replica drains the first %d inputs of the next simulated day, on the history store and on an empty store.\n\n",
		b.f.historyPatients, b.f.historyPatients/10, historyGroup, historyWriters, b.f.historyEvery, buildRate, analyzeText(b.f.stayAnalyze), b.f.historyInputs)
	tw := tabwriter.NewWriter(b.out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "days\tinputs stored\tbuild inputs/s\tstore MB\tbytes/input\tempty CPU+PG us/input\thistory CPU+PG us/input\thistory PG us/input\tinputs/s empty\tinputs/s history\tratio\t")
	for _, p := range points {
		fmt.Fprintf(tw, "%d\t%d\t%.0f\t%.1f\t%.0f\t%.0f\t%.0f\t%.0f\t%.0f\t%.0f\t%.2f\t\n", p.days, p.stored, p.buildPerSec, float64(p.st.total)/1e6,
			p.st.perInput(p.st.total), p.empty.cpuUS+p.empty.serverUS, p.history.cpuUS+p.history.serverUS, p.history.serverUS,
			p.empty.perSec, p.history.perSec, p.ratio())
	}
	tw.Flush()
	if len(points) > 1 {
		f, l := points[0], points[len(points)-1]
		grew := float64(l.stored) / float64(max(1, f.stored))
		fmt.Fprintf(b.out, "trend: the store grew %.1fx (%d to %d inputs), the ratio went from %.2f to %.2f: %+.3f per doubling of the store (flat: about 0; growth with log(size): a steady step per doubling; worse: steps that grow)\n",
			grew, f.stored, l.stored, f.ratio(), l.ratio(), (l.ratio()-f.ratio())/max(math.Log2(grew), 1e-9))
	}
	fmt.Fprintln(b.out, "ratio: per-input CPU of this process (service and embedded NATS) plus the PostgreSQL server's, history store over empty store; other work on the machine adds noise to both.")
}

// Site of the retention estimate: ventilated beds, each with a reading a
// minute and blood gases at the simulator's rate.
const (
	siteBeds        = 300
	siteDaysPerYear = 365
)

// reportYear estimates a site's year after 'ventderive retain' from the
// history store: Retain's dry run (horizon postgres.MinRetainHorizon, as of
// the end of the history) gives the bytes R it would remove, from the
// days before the horizon. With S the store's bytes over D days of P
// patients, a bed-day costs f = S/(P*D) before retention, and an old
// bed-day loses r = R/(P*(D-1)); a bed's year keeps 365*f - 364*r (the last
// day, inside the horizon, is kept whole).
func (b *bench) reportYear(ctx context.Context, pool *pgxpool.Pool, p historyPoint) error {
	asOf := scenario.DefaultStart.Add(time.Duration(p.days) * 24 * time.Hour)
	rep, err := postgres.Retain(ctx, pool, postgres.RetainOptions{Horizon: postgres.MinRetainHorizon, AsOf: asOf})
	if err != nil {
		return err
	}
	y := yearAfterRetention(p.st.total, rep.Bytes, p.days, p.patients)
	idx := factIndexShare(p.st, rep.Facts)
	yi := yearAfterRetention(p.st.total, rep.Bytes+idx, p.days, p.patients)
	fmt.Fprintf(b.out, "\nA site's year after retention, from the %d-day store: retain's dry run (horizon %s, as of the end of the history) would remove\n"+
		"%d readings (%d fact rows) and %d payloads: R = %d bytes (pg_column_size of rows and payloads; their index entries not counted, so\n"+
		"the estimate errs high). Store S = %d bytes (%.0f bytes/input), so a bed-day is f = S/(P*D) = %.0f bytes before retention and an old\n"+
		"bed-day loses r = R/(P*(D-1)) = %.0f bytes. A site of %d ventilated beds (a reading a minute, blood gases at the simulator's rate):\n"+
		"  before retention %d x %d x f = %.1f GB a year; after retention %d x (%d x f - %d x r) = %.1f GB a year (%.0f%% kept)\n",
		p.days, postgres.MinRetainHorizon, rep.Keys, rep.Facts, rep.Messages, rep.Bytes, p.st.total, p.st.perInput(p.st.total),
		y.perBedDay, y.removedPerBedDay, siteBeds, siteBeds, siteDaysPerYear, y.before/1e9, siteBeds, siteDaysPerYear, siteDaysPerYear-1, y.after/1e9,
		100*y.after/max(y.before, 1))
	fmt.Fprintf(b.out, "  with the removed rows' share of fact_row's indexes, I = %d fact rows x %.0f index bytes a row = %d bytes (given back only by\n"+
		"  REINDEX or VACUUM FULL: retain keeps the cited readings among the old ones): after retention %d x (%d x f - %d x (R+I)/(P*(D-1)))\n"+
		"  = %.1f GB a year (%.0f%% kept)%s\n",
		rep.Facts, factIndexBytesPerRow(p.st), idx, siteBeds, siteDaysPerYear, siteDaysPerYear-1, yi.after/1e9, 100*yi.after/max(yi.before, 1),
		everyNote(b.f.historyEvery))
	return nil
}

// factIndexBytesPerRow is fact_row's index bytes per row in a storage
// report (0 without fact rows).
func factIndexBytesPerRow(st storageReport) float64 {
	for _, t := range st.tables {
		if t.name == "fact_row" && t.rows > 0 {
			return float64(t.index) / float64(t.rows)
		}
	}
	return 0
}

// factIndexShare estimates the bytes of fact_row's indexes that facts
// removed rows hold: each at the store's average index bytes per row.
func factIndexShare(st storageReport, facts int64) int64 {
	return int64(float64(facts)*factIndexBytesPerRow(st) + 0.5)
}

// everyNote flags a store whose reading interval is not the site's.
func everyNote(every time.Duration) string {
	if every == time.Minute {
		return ""
	}
	return fmt.Sprintf("\n  (this store has a reading every %s, not the site's one a minute: run with --history-every 1m for the site's figure)", every)
}

// siteYear is the retention estimate's figures, bytes.
type siteYear struct {
	perBedDay, removedPerBedDay float64
	before, after               float64 // a site's year
}

// yearAfterRetention applies reportYear's formula to a store of total
// bytes over days (at least 2) of patients, of which retain removes removed.
func yearAfterRetention(total, removed int64, days, patients int) siteYear {
	f := float64(total) / float64(patients*days)
	r := float64(removed) / float64(patients*max(1, days-1))
	return siteYear{perBedDay: f, removedPerBedDay: r,
		before: siteBeds * siteDaysPerYear * f, after: siteBeds * (siteDaysPerYear*f - (siteDaysPerYear-1)*r)}
}
