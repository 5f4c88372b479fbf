package main

import (
	"bufio"
	"bytes"
	"context"
	"crypto/rand"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"net"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"runtime/metrics"
	"runtime/pprof"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"text/tabwriter"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/scenario"
	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/migrations"
)

func init() {
	register(command{name: "bench", summary: "measure the pipeline against the bare JetStream and PostgreSQL floor on this machine", run: runBench})
}

// benchFlags are the sizes of a bench run. With the defaults it takes about
// 1 min 45 s on a 2-core machine, plus about a minute for the long-stay
// comparison.
type benchFlags struct {
	inputs   int
	copies   int
	rate     float64
	paced    time.Duration
	replicas string
	workers  int
	fetch    int
	patients int
	seed     int64
	dir      string
	cpuprof  string
	stayH    int
	stayN    int
	// stayAnalyze runs ANALYZE after storing the stay, as autovacuum
	// would; without it the new replica plans on a store without
	// statistics (a server with autovacuum off, or a restart before
	// autovacuum's first pass).
	stayAnalyze bool
	// historyH hours of historyCopies copies of the unit stored before
	// the history-growth measurement (0 hours: skip it).
	historyH      int
	historyCopies int
	// historyDays are the sizes (simulated days, ascending) of the
	// history store built through the store's group ingest, each measured
	// against an empty store (empty: skip); historyPatients its patients
	// (a multiple of 10) and historyInputs the measured workload.
	historyDays     []int
	historyPatients int
	historyInputs   int
	historyEvery    time.Duration
	// backlog inputs are in the stream before a replica starts in the
	// backlog-and-replay measurement (0: skip it).
	backlog int
	// freshAge is the replicas' consumer.Config FreshAge (negative: the
	// fresh lane off, for comparison).
	freshAge time.Duration
	// ladder measures the cost ladder (bench_ladder.go) between the
	// floor and the pipeline.
	ladder bool
	// keep leaves the run's databases on the server, for study, instead
	// of dropping them at the end (needs DATABASE_URL: a throwaway
	// cluster goes with the run).
	keep bool
}

func runBench(ctx context.Context, args []string, e env) error {
	fs := flag.NewFlagSet("bench", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	var f benchFlags
	fs.IntVar(&f.inputs, "inputs", 10000, "input messages of each throughput run (the first ones, in time order, of the copied scenario)")
	fs.IntVar(&f.copies, "copies", 4, "copies of the invented unit's beds, each with its own identifiers (10 patients each)")
	fs.Float64Var(&f.rate, "rate", 500, "inputs per second of the paced latency runs")
	fs.DurationVar(&f.paced, "paced", 3*time.Second, "length of each paced latency run")
	fs.StringVar(&f.replicas, "replicas", "1,2", "pipeline replica counts to measure, comma-separated")
	fs.IntVar(&f.workers, "workers", 4, "messages (or groups) handled at once per replica, as serve --workers")
	fs.IntVar(&f.fetch, "fetch", 0, "messages per pull (0: the service default)")
	fs.IntVar(&f.patients, "patients", 10000, "active patients of the memory check, run by a separate 'serve' process (0: skip)")
	fs.Int64Var(&f.seed, "seed", 1, "scenario seed")
	fs.StringVar(&f.dir, "dir", "", "working directory for the embedded NATS store and a throwaway cluster (default: a new temporary directory)")
	fs.StringVar(&f.cpuprof, "cpuprofile", "", "write a CPU profile of the pipeline throughput runs to this file")
	fs.IntVar(&f.stayH, "stay-hours", 24, "hours of the dense long-stay run (one copy of the unit), compared with the same inputs spread over copies of 6 h stays (0: skip both)")
	fs.IntVar(&f.stayN, "stay-inputs", 5000, "inputs measured in each long-stay run, after the rest of the stay is stored")
	fs.BoolVar(&f.stayAnalyze, "stay-analyze", false, "run ANALYZE after storing each long stay, before the measured part (as autovacuum would; default: no statistics, as on a server with autovacuum off)")
	fs.IntVar(&f.historyH, "history-hours", 0, "hours of simulated history stored before the history-growth measurement, which drains the last --stay-inputs inputs after it and after the admissions alone (0: skip)")
	fs.IntVar(&f.historyCopies, "history-copies", 4, "copies of the unit (10 patients each) in the history-growth measurement")
	historyDays := fs.String("history-days", "", "simulated days of history built by the group-ingest writer before the cost-per-input measurement, comma-separated ascending sizes of one growing store, e.g. 1,3,7 or 30 (empty: skip)")
	fs.IntVar(&f.historyPatients, "history-patients", 200, "patients of the --history-days store (a multiple of 10: copies of the unit)")
	fs.IntVar(&f.historyInputs, "history-inputs", 50000, "inputs of the workload measured on the --history-days store and on an empty store (the default holds blood gases: 5,000 inputs of 200 patients are the next day's first 25 minutes, derive nothing, and drain in about 2 s, so the replica's start dominates them)")
	fs.DurationVar(&f.historyEvery, "history-every", time.Minute, "ventilator reading interval of the --history-days store and its workload (the simulator's 1 min to 10 min)")
	fs.DurationVar(&f.freshAge, "fresh-age", 0, "the replicas' fresh-lane age limit, as serve --fresh-age (0: the service default; negative, e.g. -1s: the lane off, for comparison)")
	fs.BoolVar(&f.ladder, "ladder", true, "measure the cost ladder: the floor, + the service's strict decode, + its inbox and fact rows on readings that can affect no derivation, and the one-replica pipeline, each as a row (about 10 s at the defaults; --ladder=false: skip)")
	fs.IntVar(&f.backlog, "backlog", 100000, "inputs in the stream before one replica starts, drained with a fresh blood gas published during the drain (0: skip)")
	fs.BoolVar(&f.keep, "keep", false, "keep the run's databases on the DATABASE_URL server and list them at the end, instead of dropping them (for a study of the stored rows; needs DATABASE_URL)")
	if done, err := parseFlags(fs, args); done {
		return err
	}
	if f.keep && e.getenv("DATABASE_URL") == "" {
		fmt.Fprintln(e.stderr, "bench: --keep needs DATABASE_URL (a throwaway cluster is removed with the run)")
		return errUsage
	}
	replicas, err := parseCounts(f.replicas)
	if err == nil && *historyDays != "" {
		f.historyDays, err = parseCounts(*historyDays)
		if err == nil && (!slices.IsSorted(f.historyDays) || f.historyPatients < 10 || f.historyPatients%10 != 0 || f.historyInputs < 1) {
			err = errors.New("history sizes")
		}
	}
	if err != nil || f.inputs < 1 || f.copies < 1 || f.rate <= 0 || f.workers < 1 || f.stayH < 0 || (f.stayH > 0 && f.stayN < 1) ||
		f.historyH < 0 || (f.historyH > 0 && (f.historyCopies < 1 || f.stayN < 1)) || f.backlog < 0 {
		fmt.Fprintln(e.stderr, "bench: --inputs, --copies, --rate, --workers, --stay-inputs, --history-copies must be positive, --stay-hours, --history-hours and --backlog not negative, --replicas a list of positive counts, --history-days ascending positive counts and --history-patients a multiple of 10")
		return errUsage
	}
	b, err := newBench(ctx, f, e)
	if err != nil {
		return err
	}
	defer b.close()
	return b.run(ctx, replicas)
}

func parseCounts(s string) ([]int, error) {
	var out []int
	for p := range strings.SplitSeq(s, ",") {
		n, err := strconv.Atoi(strings.TrimSpace(p))
		if err != nil || n < 1 {
			return nil, fmt.Errorf("replica count %q", p)
		}
		out = append(out, n)
	}
	return out, nil
}

// bench is one run's world: an embedded NATS server, an admin database URL,
// the generated messages.
type bench struct {
	f       benchFlags
	e       env
	out     io.Writer
	dir     string
	rmDir   bool
	ns      *server.Server
	nc      *nats.Conn
	js      jetstream.JetStream
	admin   string
	cluster *pgtest.Cluster
	msgs    []benchMsg
	site    fhirmap.Site
	dbs     []string
	// postmaster is the local PostgreSQL server's process, 0 if remote.
	postmaster int
	// patientKey is the patient hash key of every store of the run (the
	// history builder and the replicas must hash patients alike).
	patientKey []byte
}

// benchMsg is one input message of the run.
type benchMsg struct {
	subject, msgID string
	payload        []byte
	patient        string
}

func newBench(ctx context.Context, f benchFlags, e env) (_ *bench, err error) {
	b := &bench{f: f, e: e, out: e.stdout, dir: f.dir, patientKey: make([]byte, 32)}
	_, _ = rand.Read(b.patientKey)
	defer func() {
		if err != nil {
			b.close()
		}
	}()
	if b.dir == "" {
		if b.dir, err = os.MkdirTemp("", "ventderive-bench-"); err != nil {
			return nil, err
		}
		b.rmDir = true
	} else if err := os.MkdirAll(b.dir, 0o755); err != nil {
		return nil, err
	}
	if b.ns, err = startEmbeddedNATS(filepath.Join(b.dir, "nats")); err != nil {
		return nil, err
	}
	if b.nc, err = nats.Connect(b.ns.ClientURL()); err != nil {
		return nil, err
	}
	if b.js, err = jetstream.New(b.nc, jetstream.WithPublishAsyncMaxPending(1024)); err != nil {
		return nil, err
	}
	b.admin = e.getenv("DATABASE_URL")
	if b.admin == "" {
		b.cluster, err = pgtest.StartCluster(ctx, filepath.Join(b.dir, "postgres"))
		if err != nil {
			return nil, fmt.Errorf("no DATABASE_URL and no throwaway PostgreSQL: %w", err)
		}
		b.admin = b.cluster.URL()
	}
	b.postmaster = postmasterOf(ctx, b.admin)
	b.site = fhirmap.DefaultSite()
	b.site.Window.Before, b.site.Window.After = scenario.PairingBefore, scenario.PairingAfter
	b.site.ApparatusDeadSpaceML, b.site.ApparatusDeadSpaceConfigured = scenario.ApparatusDeadSpaceML, true
	b.msgs = benchMessages(f.seed, f.copies, f.inputs, scenario.MinDuration)
	return b, nil
}

func (b *bench) close() {
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if b.f.keep && len(b.dbs) > 0 {
		fmt.Fprintf(b.out, "\nKept databases (--keep; drop them when done): %s\n", strings.Join(b.dbs, " "))
		b.dbs = nil
	}
	if len(b.dbs) > 0 {
		if c, err := pgx.Connect(ctx, b.admin); err == nil {
			for _, name := range b.dbs {
				_, _ = c.Exec(ctx, "DROP DATABASE IF EXISTS "+pgx.Identifier{name}.Sanitize()+" WITH (FORCE)")
			}
			c.Close(ctx)
		}
	}
	if b.nc != nil {
		b.nc.Close()
	}
	if b.ns != nil {
		b.ns.Shutdown()
		b.ns.WaitForShutdown()
	}
	if b.cluster != nil {
		_ = b.cluster.Close()
	}
	if b.rmDir {
		os.RemoveAll(b.dir)
	}
}

// benchMessages copies the invented unit's beds with distinct identifiers
// (every "lg-" id becomes "lg<copy>x-"), merges the copies in time order and
// keeps n messages: every admission (Patient, height, weight), then the
// others in time order, from the start or, when n is too small to reach the
// first blood-gas report, from a window centred on it, so that derived
// values come out of any size of run.
func benchMessages(seed int64, copies, n int, d time.Duration) []benchMsg {
	sc := scenario.Generate(scenario.Options{Seed: seed, Duration: d})
	type timed struct {
		at time.Time
		m  benchMsg
	}
	var all []timed
	for c := range copies {
		for _, m := range sc.Messages {
			all = append(all, timed{m.At, copyMsg(m, c)})
		}
	}
	slices.SortStableFunc(all, func(a, b timed) int { return a.at.Compare(b.at) })
	var adt, rest []benchMsg
	for _, t := range all {
		if t.m.subject == scenario.SubjectADT {
			adt = append(adt, t.m)
		} else {
			rest = append(rest, t.m)
		}
	}
	out := adt[:min(n, len(adt))]
	k := min(n-len(out), len(rest))
	first := max(0, slices.IndexFunc(rest, func(m benchMsg) bool { return m.subject == scenario.SubjectLab }))
	start := min(max(0, first-k/2), len(rest)-k)
	return append(out, rest[start:start+k]...)
}

// copyMsg gives copy c of a scenario message its own identifiers (copy 0 is
// the original) and a message id from its bytes.
func copyMsg(m scenario.Message, c int) benchMsg {
	payload, patient := m.Payload, m.Patient
	if c > 0 {
		tag := fmt.Appendf(nil, "lg%dx-", c)
		payload = bytes.ReplaceAll(payload, []byte("lg-"), tag)
		patient = strings.ReplaceAll(patient, "lg-", string(tag))
	}
	sum := sha256.Sum256(payload)
	return benchMsg{subject: m.Subject, msgID: "bench-" + hex.EncodeToString(sum[:16]), payload: payload, patient: patient}
}

// memoryMessages are, for each of n patients (copies of the unit's beds),
// the Patient resource, the ventilator reading before the first lab report,
// and that report: every patient has a pairing window in use. (One reading
// rather than a window's worth keeps the whole bench under two minutes; the
// service holds no per-patient state in memory either way.)
func memoryMessages(seed int64, n int) []benchMsg {
	sc := scenario.Generate(scenario.Options{Seed: seed, Duration: scenario.MinDuration})
	var base []scenario.Message
	for _, p := range sc.Patients {
		var adt, lab *scenario.Message
		var dev []scenario.Message
		for i := range sc.Messages {
			m := &sc.Messages[i]
			if m.Patient != p.Ref || m.Malformed {
				continue
			}
			switch {
			case adt == nil && m.Subject == scenario.SubjectADT:
				adt = m
			case m.Subject == scenario.SubjectDevice && lab == nil:
				dev = append(dev, *m)
			case lab == nil && m.Subject == scenario.SubjectLab:
				lab = m
			}
		}
		if adt == nil || lab == nil || len(dev) < 1 {
			continue
		}
		base = append(base, *adt, dev[len(dev)-1], *lab)
	}
	beds := max(1, len(sc.Patients))
	var out []benchMsg
	for c := range (n + beds - 1) / beds {
		for _, m := range base {
			out = append(out, copyMsg(m, c))
		}
	}
	return out
}

// benchRow is one line of the results table.
type benchRow struct {
	name        string
	inputs      int
	perSec      float64
	p50, p99    time.Duration
	latencyN    int
	cpuUS       float64 // this process (service and embedded NATS), per input
	machineUS   float64 // every process of the machine (PostgreSQL too), per input
	serverUS    float64 // the PostgreSQL server's processes, per input (local server only)
	allocs      float64
	peakRSSMB   float64
	outputs     int
	facts       int // fact rows stored (pipeline runs)
	ratio       float64
	latencyNote string
	storage     *storageReport // the store after the drain (pipeline runs)
	replicas    int            // pipeline runs: the replica count (0: the floor)
}

func (b *bench) run(ctx context.Context, replicas []int) error {
	fmt.Fprintf(b.out, "ventderive bench: %d inputs (%d invented patients), paced runs at %g/s for %s, workers %d; %s\n",
		len(b.msgs), 10*b.f.copies, b.f.rate, b.f.paced, b.f.workers, machine())
	fmt.Fprintln(b.out, "All patients, identifiers and values are invented.")

	var rows []benchRow
	floor, parts, err := b.floor(ctx)
	if err != nil {
		return fmt.Errorf("floor: %w", err)
	}
	rows = append(rows, floor)
	var ladder []ladderStep
	if b.f.ladder {
		decode, err := b.ladderDecode(ctx)
		if err != nil {
			return fmt.Errorf("ladder, decode step: %w", err)
		}
		cheap, err := b.ladderCheap(ctx)
		if err != nil {
			return fmt.Errorf("ladder, cheap step: %w", err)
		}
		ladder = []ladderStep{stepOf(floor, ladderFloor, "the floor"), decode, cheap}
	}
	var stopProf func()
	if b.f.cpuprof != "" {
		pf, err := os.Create(b.f.cpuprof)
		if err != nil {
			return err
		}
		defer pf.Close()
		if err := pprof.StartCPUProfile(pf); err != nil {
			return err
		}
		stopProf = pprof.StopCPUProfile
	}
	for _, n := range replicas {
		r, err := b.pipeline(ctx, n)
		if err != nil {
			return fmt.Errorf("pipeline with %d replica(s): %w", n, err)
		}
		r.ratio = r.perSec / floor.perSec
		rows = append(rows, r)
	}
	if stopProf != nil {
		stopProf()
	}
	b.report(rows, parts)
	for _, r := range rows {
		if r.storage != nil {
			b.reportStorage("the drain of "+r.name, *r.storage)
		}
	}
	if b.f.ladder {
		if i := slices.Index(replicas, 1); i >= 0 {
			ladder = append(ladder, stepOf(rows[i+1], ladderFull, "the derivations"))
		}
		b.reportLadder(ladder, len(b.msgs))
		if len(ladder) < 4 {
			fmt.Fprintln(b.out, "  (no step 4: pass 1 in --replicas to measure the full pipeline with one replica)")
		}
	}
	var hist []historyPoint
	if len(b.f.historyDays) > 0 {
		if hist, err = b.historyDays(ctx); err != nil {
			return fmt.Errorf("history store: %w", err)
		}
	}
	fmt.Fprintf(b.out, "\nTargets of the throughput and storage work, from the runs above (%d CPUs, GOMAXPROCS %d):\n", runtime.NumCPU(), runtime.GOMAXPROCS(0))
	for _, l := range targetVerdicts(rows, b.f.rate, runtime.NumCPU(), hist) {
		fmt.Fprintln(b.out, "  "+l)
	}
	if b.f.backlog > 0 {
		sustained := 0.0
		for i, n := range replicas {
			if n == 1 {
				sustained = rows[i+1].perSec
			}
		}
		r, err := b.backlog(ctx)
		if err != nil {
			return fmt.Errorf("backlog: %w", err)
		}
		b.reportBacklog(r, sustained)
	}
	if b.f.stayH > 0 {
		if err := b.stays(ctx); err != nil {
			return fmt.Errorf("long stays: %w", err)
		}
	}
	if b.f.historyH > 0 {
		if err := b.history(ctx); err != nil {
			return fmt.Errorf("history growth: %w", err)
		}
	}
	if b.f.patients > 0 {
		if err := b.memory(ctx); err != nil {
			return fmt.Errorf("memory check: %w", err)
		}
	}
	return nil
}

func (b *bench) report(rows []benchRow, parts []string) {
	fmt.Fprintf(b.out, "\nFloor components (same messages): %s\n\n", strings.Join(parts, "; "))
	tw := tabwriter.NewWriter(b.out, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "run\tinputs/s\tp50 ms\tp99 ms\tCPU us/input\tPostgreSQL CPU us/input\tmachine CPU us/input\tallocs/input\tpeak RSS MB\tratio to floor\t")
	for _, r := range rows {
		ratio := "1"
		if r.ratio > 0 {
			ratio = fmt.Sprintf("%.2f", r.ratio)
		}
		fmt.Fprintf(tw, "%s\t%.0f\t%.1f\t%.1f\t%.0f\t%.0f\t%.0f\t%.0f\t%.0f\t%s\t\n", r.name, r.perSec, ms(r.p50), ms(r.p99),
			r.cpuUS, r.serverUS, r.machineUS, r.allocs, r.peakRSSMB, ratio)
	}
	tw.Flush()
	fmt.Fprintf(b.out, "\ninputs/s, CPU, allocations and RSS: draining %d pre-published inputs. p50/p99: paced at %g inputs/s for %s;\n", len(b.msgs), b.f.rate, b.f.paced)
	for _, r := range rows {
		fmt.Fprintf(b.out, "  %s: %s\n", r.name, r.latencyNote)
	}
	fmt.Fprintln(b.out, "CPU us/input counts this process (service code and the embedded NATS server); PostgreSQL CPU is the local server's processes (0: not on this machine); machine CPU is every process, other work included. Peak RSS is this process's VmHWM during the run (embedded NATS server and the generated messages included).")
}

// Targets of the throughput and storage work (README "Performance").
const (
	targetFloorRatio    = 0.5
	targetP99           = 100 * time.Millisecond
	targetP99Rate       = 500.0
	targetBytesPerInput = 1536.0
	// The cost per input after targetHistoryDays of targetHistoryPatients
	// at most targetHistoryRatio times an empty store's.
	targetHistoryRatio    = 1.2
	targetHistoryDays     = 30
	targetHistoryPatients = 200
)

// targetVerdicts states, for each target the runs measured, the figure, the
// target and whether it was met (and by how much it missed): the pipeline's
// ratio to the floor and its paced p99 (one replica), bytes per input
// recorded after the drain, and the inputs/s of every replica count
// relative to one replica (on cpus <= 2 they compete for the same cores and
// must be no slower; on more cores they must scale).
//
// hist are the history-store measurements (--history-days); the largest
// gives the cost-per-input line, judged at the target's size only.
func targetVerdicts(rows []benchRow, rate float64, cpus int, hist []historyPoint) []string {
	verdict := func(met bool) string {
		if met {
			return "met"
		}
		return "MISSED"
	}
	var out []string
	var one *benchRow
	for i := range rows {
		if rows[i].replicas == 1 {
			one = &rows[i]
		}
	}
	if one == nil {
		return []string{"no one-replica pipeline run: pass 1 in --replicas to judge the targets"}
	}
	l := fmt.Sprintf("pipeline/floor with one replica: %.2f (target at least %.1f): %s", one.ratio, targetFloorRatio, verdict(one.ratio >= targetFloorRatio))
	if one.ratio < targetFloorRatio {
		l += fmt.Sprintf(", %.1fx short", targetFloorRatio/max(one.ratio, 1e-9))
	}
	out = append(out, l)
	p99 := fmt.Sprintf("p99 input to derived output with one replica: %.1f ms from %d samples at %g inputs/s (target under %.0f ms at %g/s): ",
		ms(one.p99), one.latencyN, rate, ms(targetP99), targetP99Rate)
	if rate != targetP99Rate {
		p99 += fmt.Sprintf("not judged (paced at %g/s, not the target's rate: run with --rate %g to judge it)", rate, targetP99Rate)
	} else {
		p99 += verdict(one.p99 < targetP99)
	}
	out = append(out, p99)
	if one.storage != nil {
		b := one.storage.perInput(one.storage.total)
		l = fmt.Sprintf("bytes per input recorded: %.0f (target at most %.0f): %s", b, targetBytesPerInput, verdict(b <= targetBytesPerInput))
		if b > targetBytesPerInput {
			l += fmt.Sprintf(", %.1fx over", b/targetBytesPerInput)
		}
		out = append(out, l)
	}
	for _, r := range rows {
		if r.replicas > 1 && one.perSec > 0 {
			s := r.perSec / one.perSec
			l = fmt.Sprintf("%d replicas: %.0f inputs/s, %.2fx one replica", r.replicas, r.perSec, s)
			if cpus <= 2 {
				l += fmt.Sprintf(" (target on %d cores: no slower than one): %s", cpus, verdict(s >= 1))
			} else {
				l += fmt.Sprintf(" (on %d cores; ideal scaling %dx while PostgreSQL has cores to spare)", cpus, r.replicas)
			}
			out = append(out, l)
		}
	}
	if len(hist) > 0 {
		out = append(out, historyVerdict(hist[len(hist)-1]))
	}
	return out
}

func ms(d time.Duration) float64 { return float64(d) / float64(time.Millisecond) }

// machine describes the machine for the report.
func machine() string {
	cpu := "unknown CPU"
	if raw, err := os.ReadFile("/proc/cpuinfo"); err == nil {
		for line := range strings.SplitSeq(string(raw), "\n") {
			if k, v, ok := strings.Cut(line, ":"); ok && strings.TrimSpace(k) == "model name" {
				cpu = strings.TrimSpace(v)
				break
			}
		}
	}
	return fmt.Sprintf("%d CPUs (%s), %s, GOMAXPROCS %d", runtime.NumCPU(), cpu, runtime.Version(), runtime.GOMAXPROCS(0))
}

// pacedMsgs is the slice of the run's messages a paced run publishes:
// rate x paced consecutive messages, centred on the first blood-gas report
// so that derived values come out of it (the unit's first hour has none).
func (b *bench) pacedMsgs() []benchMsg {
	n := min(len(b.msgs), int(b.f.rate*b.f.paced.Seconds()))
	first := slices.IndexFunc(b.msgs, func(m benchMsg) bool { return m.subject == scenario.SubjectLab })
	start := min(max(0, first-n/2), len(b.msgs)-n)
	return b.msgs[start : start+n]
}

// ---- measurement helpers ----

// resUsage is a snapshot of the counters a run is measured by.
type resUsage struct {
	at       time.Time
	cpu      time.Duration // this process, user + system
	machine  time.Duration // all CPUs busy time, from /proc/stat
	server   time.Duration // the local PostgreSQL server, when there is one
	objects  uint64        // heap objects allocated
	resetHWM bool
}

func (b *bench) takeUsage(resetPeak bool) resUsage {
	u := resUsage{at: time.Now(), server: serverCPU(b.postmaster)}
	if resetPeak {
		// Writing 5 to clear_refs resets VmHWM to the current RSS (Linux 4.0+).
		u.resetHWM = os.WriteFile("/proc/self/clear_refs", []byte("5"), 0) == nil
	}
	var ru syscall.Rusage
	if syscall.Getrusage(syscall.RUSAGE_SELF, &ru) == nil {
		u.cpu = time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
	}
	u.machine = machineBusy()
	s := []metrics.Sample{{Name: "/gc/heap/allocs:objects"}}
	metrics.Read(s)
	if s[0].Value.Kind() == metrics.KindUint64 {
		u.objects = s[0].Value.Uint64()
	}
	return u
}

// fill sets the per-input figures of r from two usage snapshots.
func (r *benchRow) fill(from, to resUsage, n int) {
	r.inputs = n
	el := to.at.Sub(from.at)
	r.perSec = float64(n) / el.Seconds()
	r.cpuUS = float64(to.cpu-from.cpu) / float64(time.Microsecond) / float64(n)
	r.machineUS = float64(to.machine-from.machine) / float64(time.Microsecond) / float64(n)
	r.serverUS = float64(to.server-from.server) / float64(time.Microsecond) / float64(n)
	r.allocs = float64(to.objects-from.objects) / float64(n)
	r.peakRSSMB = float64(procStatusKB("self", "VmHWM")) / 1024
}

// machineBusy is the busy time of all CPUs (not idle, not iowait).
func machineBusy() time.Duration {
	raw, err := os.ReadFile("/proc/stat")
	if err != nil {
		return 0
	}
	line, _, _ := strings.Cut(string(raw), "\n")
	fields := strings.Fields(line)
	if len(fields) < 6 || fields[0] != "cpu" {
		return 0
	}
	var busy int64
	for i, f := range fields[1:] {
		v, _ := strconv.ParseInt(f, 10, 64)
		if i == 3 || i == 4 { // idle, iowait
			continue
		}
		if i >= 8 { // guest time is already in user
			break
		}
		busy += v
	}
	return time.Duration(busy) * time.Second / 100 // USER_HZ is 100 on Linux
}

// serverCPU is the CPU time of a local PostgreSQL server: its postmaster
// with the children it has reaped, plus every live child (backends, WAL
// writer, checkpointer). postmaster 0 (a remote server) gives 0.
func serverCPU(postmaster int) time.Duration {
	if postmaster <= 0 {
		return 0
	}
	return time.Duration(serverTicks(postmaster, procProcs{})) * time.Second / 100 // USER_HZ
}

// procs reads processes' CPU ticks: procProcs from /proc, a fake in tests.
type procs interface {
	pids() []int
	parent(pid int) int
	ticks(pid int, children bool) int64
}

type procProcs struct{}

func (procProcs) pids() []int {
	entries, _ := os.ReadDir("/proc")
	var out []int
	for _, e := range entries {
		if pid, err := strconv.Atoi(e.Name()); err == nil {
			out = append(out, pid)
		}
	}
	return out
}

func (procProcs) parent(pid int) int                 { ppid, _ := procStat(pid); return ppid }
func (procProcs) ticks(pid int, children bool) int64 { return procTicks(pid, children) }

// serverTicks sums the postmaster's own and reaped children's ticks and
// its live children's. A child that exits and is reaped while the
// children are read moves its ticks from the live sum to the postmaster's
// reaped sum: read in the wrong order it is counted in neither, and a
// measurement over a run in which connections close (the pool's warm
// connections, other clients of a shared server) came out below the one
// before it (a negative CPU per input). So the postmaster is read before
// and after the children, and the pass is repeated until no child was
// reaped in between; after 10 tries the later reading is used, which can
// count a child twice but never drops one.
func serverTicks(postmaster int, ps procs) int64 {
	for try := 0; ; try++ {
		before := ps.ticks(postmaster, true)
		var live int64
		for _, pid := range ps.pids() {
			if pid != postmaster && ps.parent(pid) == postmaster {
				live += ps.ticks(pid, true)
			}
		}
		after := ps.ticks(postmaster, true)
		if after == before || try == 9 {
			return after + live
		}
	}
}

// procStat returns a process's parent and its stat fields after the name.
func procStat(pid int) (int, []string) {
	raw, err := os.ReadFile("/proc/" + strconv.Itoa(pid) + "/stat")
	if err != nil {
		return 0, nil
	}
	i := bytes.LastIndexByte(raw, ')')
	if i < 0 {
		return 0, nil
	}
	f := strings.Fields(string(raw[i+1:]))
	if len(f) < 15 {
		return 0, nil
	}
	ppid, _ := strconv.Atoi(f[1])
	return ppid, f
}

// procTicks is utime+stime (and, with children, cutime+cstime) of a process.
func procTicks(pid int, children bool) int64 {
	_, f := procStat(pid)
	if f == nil {
		return 0
	}
	// After the name: state(0) ppid(1) ... utime(11) stime(12) cutime(13) cstime(14).
	var t int64
	for i := 11; i <= 14; i++ {
		if i >= 13 && !children {
			break
		}
		v, _ := strconv.ParseInt(f[i], 10, 64)
		t += v
	}
	return t
}

// postmasterOf finds the local server process behind a database URL (the
// parent of this connection's backend), or 0 when it is not on this machine.
func postmasterOf(ctx context.Context, url string) int {
	c, err := pgx.Connect(ctx, url)
	if err != nil {
		return 0
	}
	defer c.Close(ctx)
	var backend int
	if err := c.QueryRow(ctx, "SELECT pg_backend_pid()").Scan(&backend); err != nil {
		return 0
	}
	ppid, f := procStat(backend)
	if f == nil || !strings.Contains(readComm(backend), "postgres") {
		return 0
	}
	return ppid
}

func readComm(pid int) string {
	raw, _ := os.ReadFile("/proc/" + strconv.Itoa(pid) + "/comm")
	return string(raw)
}

// procStatusKB reads a "kB" field of /proc/<pid>/status.
func procStatusKB(pid, field string) int64 {
	f, err := os.Open("/proc/" + pid + "/status")
	if err != nil {
		return 0
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		if k, v, ok := strings.Cut(sc.Text(), ":"); ok && k == field {
			n, _ := strconv.ParseInt(strings.TrimSuffix(strings.TrimSpace(v), " kB"), 10, 64)
			return n
		}
	}
	return 0
}

func percentile(ds []time.Duration, q float64) time.Duration {
	if len(ds) == 0 {
		return 0
	}
	s := slices.Clone(ds)
	slices.Sort(s)
	i := int(float64(len(s))*q+0.999999) - 1
	return s[min(max(i, 0), len(s)-1)]
}

// ---- NATS and PostgreSQL set-up ----

// resetStreams recreates the input and output streams empty.
func (b *bench) resetStreams(ctx context.Context) error {
	for _, sc := range []jetstream.StreamConfig{consumer.InputStreamConfig(""), consumer.OutputStreamConfig()} {
		if err := b.js.DeleteStream(ctx, sc.Name); err != nil && !errors.Is(err, jetstream.ErrStreamNotFound) {
			return fmt.Errorf("delete stream %s: %w", sc.Name, err)
		}
		if _, err := b.js.CreateStream(ctx, sc); err != nil {
			return fmt.Errorf("create stream %s: %w", sc.Name, err)
		}
	}
	return nil
}

// newDatabase creates and migrates a fresh database, dropped at the end,
// and returns its URL with a pool on it (the caller closes the pool).
func (b *bench) newDatabase(ctx context.Context) (string, *pgxpool.Pool, error) {
	name, url, err := createDatabase(ctx, b.admin, "ventderive_bench_")
	if err != nil {
		return "", nil, err
	}
	b.dbs = append(b.dbs, name)
	pool, err := pgxpool.New(ctx, url)
	if err != nil {
		return "", nil, err
	}
	if _, err := migrations.Apply(ctx, pool, nil); err != nil {
		pool.Close()
		return "", nil, fmt.Errorf("migrate: %w", err)
	}
	return url, pool, nil
}

// freshRun empties the streams and makes a new database for one measured
// run.
func (b *bench) freshRun(ctx context.Context) (string, *pgxpool.Pool, error) {
	if err := b.resetStreams(ctx); err != nil {
		return "", nil, err
	}
	return b.newDatabase(ctx)
}

// publishAll publishes msgs asynchronously and waits for every PubAck.
func (b *bench) publishAll(ctx context.Context, msgs []benchMsg) error {
	pub := newAsyncPublisher(b.js, 512)
	for _, m := range msgs {
		if err := pub.publish(ctx, m.subject, m.msgID, m.payload); err != nil {
			return err
		}
	}
	return pub.flush(ctx)
}

// publishPaced publishes msgs at rate per second, each at its due time.
func (b *bench) publishPaced(ctx context.Context, msgs []benchMsg, rate float64) error {
	start := time.Now()
	// A window as large as the run: pacing must not wait for acknowledgements.
	pub := newAsyncPublisher(b.js, len(msgs)+1)
	for i, m := range msgs {
		due := start.Add(time.Duration(float64(i) / rate * float64(time.Second)))
		if wait := time.Until(due); wait > 0 {
			select {
			case <-ctx.Done():
				return ctx.Err()
			case <-time.After(wait):
			}
		}
		if err := pub.publish(ctx, m.subject, m.msgID, m.payload); err != nil {
			return err
		}
	}
	return pub.flush(ctx)
}

// streamTimes reads a stream whole: stream sequence -> timestamp and
// message id -> timestamp.
func (b *bench) streamTimes(ctx context.Context, stream string) (map[uint64]time.Time, map[string]time.Time, error) {
	s, err := b.js.Stream(ctx, stream)
	if err != nil {
		return nil, nil, err
	}
	info, err := s.Info(ctx)
	if err != nil {
		return nil, nil, err
	}
	bySeq, byID := map[uint64]time.Time{}, map[string]time.Time{}
	n := int(info.State.Msgs)
	if n == 0 {
		return bySeq, byID, nil
	}
	c, err := s.OrderedConsumer(ctx, jetstream.OrderedConsumerConfig{})
	if err != nil {
		return nil, nil, err
	}
	for len(bySeq) < n {
		batch, err := c.Fetch(min(n-len(bySeq), 500), jetstream.FetchMaxWait(5*time.Second))
		if err != nil {
			return nil, nil, err
		}
		got := 0
		for m := range batch.Messages() {
			meta, err := m.Metadata()
			if err != nil {
				return nil, nil, err
			}
			bySeq[meta.Sequence.Stream] = meta.Timestamp
			byID[m.Headers().Get(jetstream.MsgIDHeader)] = meta.Timestamp
			got++
		}
		if got == 0 {
			return nil, nil, fmt.Errorf("stream %s: read %d of %d", stream, len(bySeq), n)
		}
	}
	return bySeq, byID, nil
}

// waitDrained waits until durable has settled everything (see waitSettled).
func (b *bench) waitDrained(ctx context.Context, durable string, pool *pgxpool.Pool, timeout time.Duration, want int64) error {
	return waitSettled(ctx, b.js, durable, pool, want, timeout, 10*time.Millisecond)
}

// ---- the floor ----

const floorTableSQL = `CREATE TABLE bench_floor (
    inbox_key  text PRIMARY KEY,
    subject    text NOT NULL,
    stream_seq bigint NOT NULL,
    received   timestamptz NOT NULL,
    raw        bytea NOT NULL)`

const floorInsertSQL = `
INSERT INTO bench_floor (inbox_key, subject, stream_seq, received, raw)
SELECT * FROM unnest($1::text[], $2::text[], $3::bigint[], $4::timestamptz[], $5::bytea[])
ON CONFLICT (inbox_key) DO NOTHING`

// floorRow is one message for the floor's table.
type floorRow struct {
	key, subject string
	seq          uint64
	raw          []byte
}

func insertFloor(ctx context.Context, pool *pgxpool.Pool, rows []floorRow) error {
	n := len(rows)
	keys, subj, seqs, recv, raw := make([]string, n), make([]string, n), make([]int64, n), make([]time.Time, n), make([][]byte, n)
	now := time.Now().UTC()
	for i, r := range rows {
		keys[i], subj[i], seqs[i], recv[i], raw[i] = r.key, r.subject, int64(r.seq), now, r.raw
	}
	return pgx.BeginFunc(ctx, pool, func(tx pgx.Tx) error {
		_, err := tx.Exec(ctx, floorInsertSQL, keys, subj, seqs, recv, raw)
		return err
	})
}

// floor measures the same messages through JetStream and PostgreSQL with
// no processing: the components alone, then combined as the pipeline uses
// them (pull, one transaction per group of up to 64 messages with
// synchronous_commit on, then ack each), draining and paced.
func (b *bench) floor(ctx context.Context) (benchRow, []string, error) {
	row := benchRow{name: "floor"}
	var parts []string
	if err := b.resetStreams(ctx); err != nil {
		return row, nil, err
	}
	t0 := time.Now()
	if err := b.publishAll(ctx, b.msgs); err != nil {
		return row, nil, err
	}
	parts = append(parts, fmt.Sprintf("JetStream publish %.0f/s", float64(len(b.msgs))/time.Since(t0).Seconds()))

	// Pull and acknowledge, nothing else.
	rate, err := b.floorConsume(ctx, "bench-bare", nil, nil)
	if err != nil {
		return row, nil, err
	}
	parts = append(parts, fmt.Sprintf("pull+ack %.0f/s", rate))

	_, pool, err := b.newDatabase(ctx)
	if err != nil {
		return row, nil, err
	}
	defer pool.Close()
	if _, err := pool.Exec(ctx, floorTableSQL); err != nil {
		return row, nil, err
	}
	var sc string
	if err := pool.QueryRow(ctx, "SHOW synchronous_commit").Scan(&sc); err != nil {
		return row, nil, err
	}

	// PostgreSQL alone: the same rows, groups of up to 64, workers at once.
	rows := make([]floorRow, len(b.msgs))
	for i, m := range b.msgs {
		sum := sha256.Sum256(m.payload)
		rows[i] = floorRow{key: hex.EncodeToString(sum[:]), subject: m.subject, seq: uint64(i + 1), raw: m.payload}
	}
	t0 = time.Now()
	var next atomic.Int64
	var wg sync.WaitGroup
	errs := make(chan error, b.f.workers)
	for range b.f.workers {
		wg.Go(func() {
			for {
				i := int(next.Add(64)) - 64
				if i >= len(rows) {
					return
				}
				if err := insertFloor(ctx, pool, rows[i:min(i+64, len(rows))]); err != nil {
					errs <- err
					return
				}
			}
		})
	}
	wg.Wait()
	close(errs)
	if err := <-errs; err != nil {
		return row, nil, fmt.Errorf("insert: %w", err)
	}
	parts = append(parts, fmt.Sprintf("PostgreSQL insert of the same rows (groups of 64, %d connections, synchronous_commit %s) %.0f/s",
		b.f.workers, sc, float64(len(rows))/time.Since(t0).Seconds()))
	if _, err := pool.Exec(ctx, "TRUNCATE bench_floor"); err != nil {
		return row, nil, err
	}

	// Combined, draining the stream.
	from := b.takeUsage(true)
	if _, err := b.floorConsume(ctx, "bench-floor", pool, nil); err != nil {
		return row, nil, err
	}
	row.fill(from, b.takeUsage(false), len(b.msgs))

	// Combined, paced.
	if err := b.resetStreams(ctx); err != nil {
		return row, nil, err
	}
	if _, err := pool.Exec(ctx, "TRUNCATE bench_floor"); err != nil {
		return row, nil, err
	}
	paced := b.pacedMsgs()
	var lat []time.Duration
	var mu sync.Mutex
	done := make(chan error, 1)
	go func() {
		_, err := b.floorConsume(ctx, "bench-floor-paced", pool, func(d time.Duration) {
			mu.Lock()
			lat = append(lat, d)
			mu.Unlock()
		}, len(paced))
		done <- err
	}()
	if err := b.publishPaced(ctx, paced, b.f.rate); err != nil {
		return row, nil, err
	}
	if err := <-done; err != nil {
		return row, nil, err
	}
	row.p50, row.p99, row.latencyN = percentile(lat, 0.5), percentile(lat, 0.99), len(lat)
	row.latencyNote = fmt.Sprintf("%d inputs, from input publish (stream timestamp) to COMMIT and ack", len(lat))
	return row, parts, nil
}

// floorConsume pulls every message of the input stream through a new
// durable (the service's consumer settings), grouped as the pipeline
// groups them; with a pool it inserts each group in one transaction before
// acking its messages. It stops after want messages (default: all of the
// run's inputs) and returns the rate.
func (b *bench) floorConsume(ctx context.Context, durable string, pool *pgxpool.Pool, latency func(time.Duration), want ...int) (float64, error) {
	return b.floorConsumeWork(ctx, durable, pool, latency, nil, want...)
}

// floorConsumeWork is floorConsume with work done on each message's
// payload before it is dealt to its lane (nil: none), one message after
// another as the pipeline decodes, as the cost ladder adds the service's
// decode to the floor.
func (b *bench) floorConsumeWork(ctx context.Context, durable string, pool *pgxpool.Pool, latency func(time.Duration), work func([]byte), want ...int) (float64, error) {
	cfg := consumer.DefaultConfig()
	cfg.Durable = durable
	if b.f.fetch > 0 {
		cfg.Fetch = b.f.fetch
	}
	c, err := b.js.CreateOrUpdateConsumer(ctx, consumer.DefaultInputStream, consumer.ConsumerConfig(cfg))
	if err != nil {
		return 0, err
	}
	total := len(b.msgs)
	if len(want) > 0 {
		total = want[0]
	}
	start := time.Now()
	seen := 0
	for seen < total {
		// Never ask for more than remain: a pull waits for a full batch.
		batch, err := c.Fetch(min(cfg.Fetch, total-seen), jetstream.FetchMaxWait(time.Second))
		if err != nil {
			return 0, err
		}
		// As the pipeline: messages dealt to workers lanes, each lane
		// committing a group GroupWait after its first message or when the
		// pull ends, each message acked after its group's COMMIT.
		var failed atomic.Value
		msgs := batch.Messages()
		if work != nil {
			// Where the pipeline decodes (consumer.Pipeline's process):
			// workers decoders at once, their messages dealt to the lanes
			// in arrival order, before a lane sees its message.
			type job struct {
				m   jetstream.Msg
				out chan jetstream.Msg
			}
			in := make(chan jetstream.Msg)
			jobs := make(chan job, b.f.workers)
			order := make(chan chan jetstream.Msg, 64)
			for range b.f.workers {
				go func() {
					for j := range jobs {
						work(j.m.Data())
						j.out <- j.m
					}
				}()
			}
			go func() {
				defer close(in)
				for out := range order {
					in <- <-out
				}
			}()
			go func() {
				for m := range batch.Messages() {
					out := make(chan jetstream.Msg, 1)
					order <- out
					jobs <- job{m: m, out: out}
				}
				close(jobs)
				close(order)
			}()
			msgs = in
		}
		n := streamGroups(msgs, b.f.workers, 64, 5*time.Millisecond, func(g []jetstream.Msg) {
			if pool != nil {
				rows := make([]floorRow, len(g))
				for i, m := range g {
					meta, _ := m.Metadata()
					sum := sha256.Sum256(m.Data())
					rows[i] = floorRow{key: hex.EncodeToString(sum[:]), subject: m.Subject(), seq: meta.Sequence.Stream, raw: m.Data()}
				}
				if err := insertFloor(ctx, pool, rows); err != nil {
					failed.Store(err)
					return
				}
			}
			for _, m := range g {
				_ = m.Ack()
				if latency != nil {
					if meta, err := m.Metadata(); err == nil {
						latency(time.Since(meta.Timestamp))
					}
				}
			}
		})
		if err := batch.Error(); err != nil && !errors.Is(err, nats.ErrTimeout) && !errors.Is(err, context.DeadlineExceeded) {
			return 0, err
		}
		if err, ok := failed.Load().(error); ok {
			return 0, err
		}
		seen += n
	}
	if err := b.nc.Flush(); err != nil {
		return 0, err
	}
	el := time.Since(start)
	if err := b.waitDrained(ctx, durable, nil, 30*time.Second, 0); err != nil && len(want) == 0 {
		return 0, err
	}
	if err := b.js.DeleteConsumer(ctx, consumer.DefaultInputStream, durable); err != nil {
		return 0, err
	}
	return float64(total) / el.Seconds(), nil
}

// streamGroups deals the messages of one pull to lanes (by stream
// sequence), each committing up to max messages at once, wait after its
// group's first message at the latest, and returns how many it handled.
func streamGroups(msgs <-chan jetstream.Msg, lanes, max int, wait time.Duration, commit func([]jetstream.Msg)) int {
	chans := make([]chan jetstream.Msg, lanes)
	var wg sync.WaitGroup
	for i := range chans {
		chans[i] = make(chan jetstream.Msg, max)
		wg.Go(func() {
			var group []jetstream.Msg
			timer := time.NewTimer(wait)
			timer.Stop()
			defer timer.Stop()
			flush := func() {
				timer.Stop()
				if len(group) > 0 {
					commit(group)
					group = nil
				}
			}
			for {
				select {
				case m, ok := <-chans[i]:
					if !ok {
						flush()
						return
					}
					if group = append(group, m); len(group) == 1 {
						timer.Reset(wait)
					}
					if len(group) >= max {
						flush()
					}
				case <-timer.C:
					flush()
				}
			}
		})
	}
	n := 0
	for m := range msgs {
		seq := uint64(n)
		if meta, err := m.Metadata(); err == nil {
			seq = meta.Sequence.Stream
		}
		chans[seq%uint64(lanes)] <- m
		n++
	}
	for _, c := range chans {
		close(c)
	}
	wg.Wait()
	return n
}

// ---- the pipeline ----

// benchReplica is one in-process pipeline replica with its own connections.
type benchReplica struct {
	cancel context.CancelFunc
	done   chan error
	nc     *nats.Conn
	pool   *pgxpool.Pool
}

func (b *bench) startReplicas(ctx context.Context, url string, n int) ([]*benchReplica, error) {
	key := b.patientKey
	cfg := consumer.DefaultConfig()
	cfg.Window = b.site.Window
	if b.f.fetch > 0 {
		cfg.Fetch = b.f.fetch
	}
	if b.f.freshAge != 0 {
		cfg.FreshAge = b.f.freshAge
	}
	var rs []*benchReplica
	for range n {
		pcfg, err := pgxpool.ParseConfig(url)
		if err != nil {
			return rs, err
		}
		postgres.WarmPool(pcfg) // as serve
		pool, err := pgxpool.NewWithConfig(ctx, pcfg)
		if err != nil {
			return rs, err
		}
		nc, err := nats.Connect(b.ns.ClientURL(), nats.MaxReconnects(-1))
		if err != nil {
			pool.Close()
			return rs, err
		}
		store := postgres.New(pool, postgres.Options{PatientKey: key})
		p, err := consumer.New(nc, store, consumer.Options{Config: cfg, Site: b.site, Workers: b.f.workers,
			Logger: slog.New(slog.DiscardHandler)})
		if err != nil {
			nc.Close()
			pool.Close()
			return rs, err
		}
		rctx, cancel := context.WithCancel(ctx)
		r := &benchReplica{cancel: cancel, done: make(chan error, 1), nc: nc, pool: pool}
		go func() { r.done <- p.Run(rctx) }()
		rs = append(rs, r)
	}
	return rs, nil
}

func stopReplicas(rs []*benchReplica) error {
	var errs []error
	for _, r := range rs {
		r.cancel()
	}
	for _, r := range rs {
		errs = append(errs, <-r.done)
		r.nc.Close()
		r.pool.Close()
	}
	return errors.Join(errs...)
}

// pipeline measures n replicas: draining the pre-published inputs, then
// paced with latency from input publish to the derived Observation's
// acknowledgement by the output stream.
func (b *bench) pipeline(ctx context.Context, n int) (benchRow, error) {
	row := benchRow{name: fmt.Sprintf("pipeline, %d replica(s)", n), replicas: n}
	pool, err := b.pipelineDrain(ctx, b.msgs, n, &row)
	if err != nil {
		return row, err
	}
	defer pool.Close()
	st, err := storage(ctx, pool, b.msgs)
	if err != nil {
		return row, err
	}
	row.storage = &st

	// Paced.
	url, ppool, err := b.freshRun(ctx)
	if err != nil {
		return row, err
	}
	defer ppool.Close()
	paced := b.pacedMsgs()
	rs, err := b.startReplicas(ctx, url, n)
	if err == nil {
		err = b.publishPaced(ctx, paced, b.f.rate)
	}
	if err == nil {
		err = b.waitDrained(ctx, consumer.DefaultDurable, ppool, 2*time.Minute, benchPayloads(paced))
	}
	if serr := stopReplicas(rs); err == nil {
		err = serr
	}
	if err != nil {
		return row, err
	}
	lat, inputs, err := b.outputLatency(ctx, ppool, 0)
	if err != nil {
		return row, err
	}
	row.p50, row.p99, row.latencyN = percentile(lat, 0.5), percentile(lat, 0.99), len(lat)
	row.latencyNote = fmt.Sprintf("%d of %d inputs produced derived Observations; latency from input publish to the last of them stored in the output stream (stream timestamps)", inputs, len(paced))
	return row, nil
}

// pipelineDrain measures n replicas draining msgs, published beforehand,
// into a fresh database: it fills row's inputs/s and CPU figures and its
// outputs (outbox rows) and facts stored, checks that every input was accounted for, and
// returns the database's pool, which the caller closes.
func (b *bench) pipelineDrain(ctx context.Context, msgs []benchMsg, n int, row *benchRow) (*pgxpool.Pool, error) {
	url, pool, err := b.freshRun(ctx)
	if err != nil {
		return nil, err
	}
	fail := func(err error) (*pgxpool.Pool, error) {
		pool.Close()
		return nil, err
	}
	if err := b.publishAll(ctx, msgs); err != nil {
		return fail(err)
	}
	runtime.GC()
	from := b.takeUsage(true)
	rs, err := b.startReplicas(ctx, url, n)
	if err == nil {
		err = b.waitDrained(ctx, consumer.DefaultDurable, pool, 5*time.Minute, benchPayloads(msgs))
	}
	to := b.takeUsage(false)
	if serr := stopReplicas(rs); err == nil {
		err = serr
	}
	if err != nil {
		return fail(err)
	}
	row.fill(from, to, len(msgs))
	if err := b.checkAccounted(ctx, pool, msgs); err != nil {
		return fail(err)
	}
	if err := pool.QueryRow(ctx, `SELECT (SELECT count(*) FROM outbox), (SELECT count(*) FROM fact)`).Scan(&row.outputs, &row.facts); err != nil {
		return fail(err)
	}
	return pool, nil
}

// outputLatency matches each derived Observation to the input that caused
// it (outbox row -> inbox -> input stream sequence) and returns, per such
// input, the time from its publish to its last Observation's publish, both
// as the streams recorded them.
func (b *bench) outputLatency(ctx context.Context, pool *pgxpool.Pool, afterSeq uint64) ([]time.Duration, int, error) {
	inSeq, _, err := b.streamTimes(ctx, consumer.DefaultInputStream)
	if err != nil {
		return nil, 0, err
	}
	_, outID, err := b.streamTimes(ctx, consumer.DefaultOutputStream)
	if err != nil {
		return nil, 0, err
	}
	rows, err := pool.Query(ctx, `SELECT o.msg_id, i.stream_seq FROM outbox o JOIN inbox i USING (inbox_key) WHERE o.subject = $1 AND i.stream_seq > $2`,
		consumer.DefaultObservationSub, int64(afterSeq))
	if err != nil {
		return nil, 0, err
	}
	last := map[uint64]time.Time{}
	for rows.Next() {
		var id string
		var seq int64
		if err := rows.Scan(&id, &seq); err != nil {
			rows.Close()
			return nil, 0, err
		}
		at, ok := outID[id]
		if !ok {
			rows.Close()
			return nil, 0, fmt.Errorf("outbox message %s not in the output stream", id)
		}
		if at.After(last[uint64(seq)]) {
			last[uint64(seq)] = at
		}
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return nil, 0, err
	}
	var out []time.Duration
	for seq, at := range last {
		in, ok := inSeq[seq]
		if !ok {
			return nil, 0, fmt.Errorf("input sequence %d not in the input stream", seq)
		}
		out = append(out, at.Sub(in))
	}
	return out, len(out), nil
}

// checkAccounted verifies that every input is in the inbox or a dead letter
// and that every outbox row was published: a fast run that lost messages
// would measure nothing.
func (b *bench) checkAccounted(ctx context.Context, pool *pgxpool.Pool, msgs []benchMsg) error {
	distinct := map[string]bool{}
	for _, m := range msgs {
		sum := sha256.Sum256(m.payload)
		distinct[hex.EncodeToString(sum[:])] = true
	}
	var inbox, dead, unpublished int
	if err := pool.QueryRow(ctx, `SELECT (SELECT count(*) FROM inbox), (SELECT count(*) FROM dead_letter),
		(SELECT count(*) FROM outbox WHERE published_at IS NULL)`).Scan(&inbox, &dead, &unpublished); err != nil {
		return err
	}
	if inbox+dead != len(distinct) || unpublished != 0 {
		return fmt.Errorf("accounting: %d distinct inputs, %d recorded + %d dead letters, %d unpublished", len(distinct), inbox, dead, unpublished)
	}
	return nil
}

// ---- memory with many active patients ----

// memory runs the service as a separate 'serve' process (this binary) so
// that its resident memory is its own, feeds it the memory messages of
// f.patients patients, and reports the process's peak and final RSS.
func (b *bench) memory(ctx context.Context) error {
	msgs := memoryMessages(b.f.seed, b.f.patients)
	url, pool, err := b.freshRun(ctx)
	if err != nil {
		return err
	}
	defer pool.Close()
	self, err := os.Executable()
	if err != nil {
		return err
	}
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return err
	}
	addr := ln.Addr().String()
	ln.Close()
	logPath := filepath.Join(b.dir, "memory-serve.log")
	logFile, err := os.Create(logPath)
	if err != nil {
		return err
	}
	defer logFile.Close()
	key := make([]byte, 32)
	_, _ = rand.Read(key)
	cmd := exec.CommandContext(ctx, self, "serve", "--nats-url", b.ns.ClientURL(), "--http-addr", addr,
		"--apparatus-dead-space-ml", strconv.Itoa(scenario.ApparatusDeadSpaceML), "--log-level", "warn",
		"--workers", strconv.Itoa(b.f.workers))
	cmd.Env = append(os.Environ(), "DATABASE_URL="+url, "VENTDERIVE_PATIENT_HASH_KEY="+hex.EncodeToString(key))
	cmd.Stdout, cmd.Stderr = logFile, logFile
	if err := cmd.Start(); err != nil {
		return fmt.Errorf("start serve: %w", err)
	}
	pid := strconv.Itoa(cmd.Process.Pid)
	exited := make(chan error, 1)
	go func() { exited <- cmd.Wait() }()
	stop := func() error {
		_ = cmd.Process.Signal(syscall.SIGTERM)
		select {
		case err := <-exited:
			return err
		case <-time.After(30 * time.Second):
			_ = cmd.Process.Kill()
			return errors.New("serve did not stop on SIGTERM")
		}
	}
	idleKB := int64(0)
	for i := 0; i < 100 && idleKB == 0; i++ {
		if c, err := b.js.Consumer(ctx, consumer.DefaultInputStream, consumer.DefaultDurable); err == nil && c != nil {
			idleKB = procStatusKB(pid, "VmRSS")
			break
		}
		time.Sleep(100 * time.Millisecond)
	}
	start := time.Now()
	err = b.publishAll(ctx, msgs)
	if err == nil {
		err = b.waitDrained(ctx, consumer.DefaultDurable, pool, 5*time.Minute, benchPayloads(msgs))
	}
	el := time.Since(start)
	hwm, rss := procStatusKB(pid, "VmHWM"), procStatusKB(pid, "VmRSS")
	if serr := stop(); err == nil && serr != nil {
		err = fmt.Errorf("serve: %w (log in %s)", serr, logPath)
	}
	if err != nil {
		return err
	}
	var patients, gases, derived int
	if err := pool.QueryRow(ctx, `SELECT (SELECT count(DISTINCT patient_ref) FROM fact),
		(SELECT count(DISTINCT blood_gas_key) FROM head), (SELECT count(*) FROM derivation)`).Scan(&patients, &gases, &derived); err != nil {
		return err
	}
	fmt.Fprintf(b.out, "\nMemory with many active patients: a separate 'serve' process took %d inputs of %d patients (%d blood gases, %d derivation versions) in %.1f s (%.0f inputs/s);\n",
		len(msgs), patients, gases, derived, el.Seconds(), float64(len(msgs))/el.Seconds())
	fmt.Fprintf(b.out, "  its resident memory: %.0f MB when idle, %.0f MB at the end, peak (VmHWM) %.0f MB. Per-patient state lives in PostgreSQL, not in the process.\n",
		float64(idleKB)/1024, float64(rss)/1024, float64(hwm)/1024)
	return nil
}

// benchPayloads counts the different payloads of msgs.
func benchPayloads(msgs []benchMsg) int64 {
	return distinctPayloads(len(msgs), func(i int) []byte { return msgs[i].payload })
}
