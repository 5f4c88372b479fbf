package main

import (
	"bytes"
	"context"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/scenario"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
)

// TestBenchSmall runs the whole bench command at a tiny size against a real
// PostgreSQL and an embedded NATS server, and checks that every row of the
// table carries measured, plausible numbers. (The memory check starts this
// binary as 'serve', which a test binary cannot be, so it is left out here.)
func TestBenchSmall(t *testing.T) {
	report := benchReport(t, 3*time.Minute, "--inputs", "400", "--copies", "1", "--rate", "200", "--paced", "2s",
		"--replicas", "1", "--patients", "0", "--stay-hours", "6", "--stay-inputs", "300",
		"--history-hours", "6", "--history-copies", "1", "--backlog", "3000", "--dir", t.TempDir())
	t.Log("\n" + report)
	for _, name := range []string{"floor", "pipeline, 1 replica(s)"} {
		re := regexp.MustCompile(`(?m)^\s*` + regexp.QuoteMeta(name) + `((?:\s+[0-9.]+)+)\s*$`)
		m := re.FindStringSubmatch(report)
		if m == nil {
			t.Errorf("no table row %q", name)
			continue
		}
		var v []float64
		for f := range strings.FieldsSeq(m[1]) {
			x, _ := strconv.ParseFloat(f, 64)
			v = append(v, x)
		}
		// inputs/s, p50, p99, CPU, PostgreSQL CPU, machine CPU, allocs, RSS, ratio
		if len(v) != 9 {
			t.Errorf("%s: %d numbers, want 9: %v", name, len(v), v)
			continue
		}
		if v[0] <= 0 || v[1] <= 0 || v[2] < v[1] || v[3] <= 0 || v[6] <= 0 || v[7] <= 0 || v[8] <= 0 {
			t.Errorf("%s: implausible measurements %v (inputs/s, p50, p99 >= p50, CPU, allocs, RSS and ratio must be positive)", name, v)
		}
	}
	for _, name := range []string{"spread (20 x 6 h)", "dense (10 x 6 h)"} {
		re := regexp.MustCompile(`(?m)^\s*` + regexp.QuoteMeta(name) + `((?:\s+[0-9.]+)+)\s*$`)
		m := re.FindStringSubmatch(report)
		if m == nil {
			t.Errorf("no long-stay row %q", name)
			continue
		}
		var v []float64
		for f := range strings.FieldsSeq(m[1]) {
			x, _ := strconv.ParseFloat(f, 64)
			v = append(v, x)
		}
		// patients, inputs stored first, inputs/s, PostgreSQL CPU, CPU, machine CPU, p50, p99, paced samples
		if len(v) != 9 {
			t.Errorf("%s: %d numbers, want 9: %v", name, len(v), v)
			continue
		}
		if v[0] <= 0 || v[1] <= 0 || v[2] <= 0 || v[4] <= 0 || v[8] < 1 || v[7] < v[6] {
			t.Errorf("%s: implausible measurements %v (patients, stored inputs, inputs/s, CPU and samples must be positive, p99 >= p50)", name, v)
		}
	}
	if !regexp.MustCompile(`dense/spread: PostgreSQL CPU per input (n/a|[0-9.]+) .*inputs/s [0-9.]+ .*dense paced p99 [0-9.]+ ms`).MatchString(report) {
		t.Error("no dense/spread ratio line")
	}
	checkBenchStorage(t, report)
	if !regexp.MustCompile(`(?m)^\s*admissions only\s+[1-9][0-9]*(\s+[0-9.]+){6}\s*$`).MatchString(report) ||
		!regexp.MustCompile(`(?m)^\s*after 6 h\s+[1-9][0-9]*(\s+[0-9.]+){6}\s*$`).MatchString(report) ||
		!regexp.MustCompile(`after history/admissions only: PostgreSQL CPU per input (n/a|[0-9.]+).*service CPU per input [0-9.]+`).MatchString(report) {
		t.Error("no history-growth table with both stores and the ratio line")
	}
	checkBenchBacklog(t, report)
	checkBenchLadder(t, report, 400)
	if !regexp.MustCompile(`pipeline/floor with one replica: [0-9.]+ \(target at least 0\.5\): (met|MISSED)`).MatchString(report) ||
		!regexp.MustCompile(`bytes per input recorded: [1-9][0-9]* \(target at most 1536\): (met|MISSED)`).MatchString(report) ||
		!strings.Contains(report, "run with --rate 500 to judge it") {
		t.Error("no targets block judging the one-replica run (ratio, bytes per input, p99 at a rate other than the target's)")
	}
	if !strings.Contains(report, "produced derived Observations") {
		t.Error("no latency note for the pipeline")
	}
	if strings.Contains(report, " 0 of ") {
		t.Error("the paced run produced no derived Observation: its latency measures nothing")
	}
}

// Copies of the invented unit must be distinct patients as the service's
// decoder sees them, with distinct payloads (inbox keys) and message ids.
func TestBenchMessagesAreDistinctCopies(t *testing.T) {
	msgs := benchMessages(1, 3, 3000, scenario.MinDuration)
	if len(msgs) != 3000 {
		t.Fatalf("%d messages, want 3000", len(msgs))
	}
	patients, ids := map[string]bool{}, map[string]bool{}
	for _, m := range msgs {
		if ids[m.msgID] {
			t.Fatalf("message id %s repeated", m.msgID)
		}
		ids[m.msgID] = true
		d, err := fhirmap.Decode(m.payload, fhirmap.DefaultCodes())
		if err != nil {
			continue // the unit's malformed messages stay malformed
		}
		for _, f := range d.Facts {
			patients[f.Patient] = true
			if f.Patient != m.patient {
				t.Fatalf("fact of %s in a message of %s", f.Patient, m.patient)
			}
		}
	}
	if len(patients) != 30 {
		t.Errorf("%d distinct patients in 3 copies of a 10-bed unit, want 30", len(patients))
	}
}

func TestMemoryMessages(t *testing.T) {
	msgs := memoryMessages(1, 40)
	patients := map[string]int{}
	gases := 0
	for _, m := range msgs {
		patients[m.patient]++
		d, err := fhirmap.Decode(m.payload, fhirmap.DefaultCodes())
		if err != nil {
			t.Fatalf("memory message does not decode: %v", err)
		}
		for _, f := range d.Facts {
			if f.Quantity == fhirmap.QPCO2 {
				gases++
			}
		}
	}
	if len(patients) != 40 {
		t.Errorf("%d patients, want 40", len(patients))
	}
	if gases < 40 {
		t.Errorf("%d blood gases for 40 patients, want one each at least", gases)
	}
}

func TestPercentile(t *testing.T) {
	var ds []time.Duration
	for i := 1; i <= 100; i++ {
		ds = append(ds, time.Duration(i)*time.Millisecond)
	}
	// Nearest-rank definition: the smallest value with at least q of the
	// sample at or below it.
	for _, c := range []struct {
		q    float64
		want time.Duration
	}{{0.5, 50 * time.Millisecond}, {0.99, 99 * time.Millisecond}, {1, 100 * time.Millisecond}} {
		if got := percentile(ds, c.q); got != c.want {
			t.Errorf("percentile(1..100 ms, %g) = %s, want %s", c.q, got, c.want)
		}
	}
	if percentile(nil, 0.5) != 0 {
		t.Error("percentile of nothing is not 0")
	}
}

// checkBenchStorage checks the storage table of the 1-replica pipeline
// run: it names the service's tables, its inbox row count is the inputs
// recorded, the tables add up to the total and bytes/input is total over
// inputs.
func checkBenchStorage(t *testing.T, report string) {
	t.Helper()
	m := regexp.MustCompile(`Storage after the drain of pipeline, 1 replica\(s\): ([0-9]+) inputs recorded and ([0-9]+) dead letters of ([0-9]+) messages`).FindStringSubmatch(report)
	if m == nil {
		t.Error("no storage summary for the 1-replica pipeline run")
		return
	}
	inputs, _ := strconv.ParseInt(m[1], 10, 64)
	dead, _ := strconv.ParseInt(m[2], 10, 64)
	messages, _ := strconv.ParseInt(m[3], 10, 64)
	if inputs <= 0 || inputs+dead != messages {
		t.Errorf("storage: %d inputs + %d dead letters, want %d messages", inputs, dead, messages)
	}
	section := report[strings.Index(report, m[0]):]
	row := regexp.MustCompile(`(?m)^\s*([a-z_]+)\s+([0-9]+)\s+([0-9]+)\s+([0-9]+)\s+([0-9]+)\s+([0-9]+)\s+([0-9]+)\s+([0-9]+)\s*$`)
	all := regexp.MustCompile(`(?m)^\s*all\s+([0-9]+)\s+([0-9]+)\s*$`).FindStringSubmatch(section)
	if all == nil {
		t.Fatal("storage table has no total row")
	}
	tables := map[string][]int64{}
	var sum int64
	for _, r := range row.FindAllStringSubmatch(section[:strings.Index(section, all[0])], -1) {
		var v []int64
		for _, f := range r[2:] {
			x, _ := strconv.ParseInt(f, 10, 64)
			v = append(v, x)
		}
		tables[r[1]] = v // relations, rows, heap, index, TOAST, total, bytes/input
		if v[2]+v[3]+v[4] != v[5] {
			t.Errorf("table %s: heap %d + index %d + TOAST %d != total %d", r[1], v[2], v[3], v[4], v[5])
		}
		sum += v[5]
	}
	for _, name := range []string{"inbox", "fact_row", "derivation", "outbox"} {
		if v, ok := tables[name]; !ok || v[5] <= 0 {
			t.Errorf("storage table lacks %s (or it is empty): %v", name, tables[name])
		}
	}
	if tables["inbox"] != nil && tables["inbox"][1] != inputs {
		t.Errorf("inbox rows %d, inputs recorded %d", tables["inbox"][1], inputs)
	}
	total, _ := strconv.ParseInt(all[1], 10, 64)
	perInput, _ := strconv.ParseInt(all[2], 10, 64)
	if total != sum || total <= 0 {
		t.Errorf("storage total %d, tables add up to %d", total, sum)
	}
	if want := float64(total) / float64(inputs); float64(perInput) < want-1 || float64(perInput) > want+1 {
		t.Errorf("bytes/input %d, want total/inputs %.1f", perInput, want)
	}
}

// checkBenchBacklog checks the backlog-and-replay lines: a drain rate and
// its ratio to the sustained rate, and a fresh blood gas derived while part
// of the backlog was still unrecorded (it overtook the backlog: an order,
// not a time).
func checkBenchBacklog(t *testing.T, report string) {
	t.Helper()
	m := regexp.MustCompile(`Backlog and replay, 1 replica: ([0-9]+) inputs in the stream`).FindStringSubmatch(report)
	d := regexp.MustCompile(`drain: ([0-9.]+) inputs/s .*drain/sustained: ([0-9.]+)`).FindStringSubmatch(report)
	f := regexp.MustCompile(`fresh blood gas: publish to its last derived Observation in the output stream ([0-9.]+) ms \(([0-9]+) Observations`).FindStringSubmatch(report)
	o := regexp.MustCompile(`([0-9]+) of ([0-9]+) backlog inputs recorded when its first Observation was published`).FindStringSubmatch(report)
	if m == nil || d == nil || f == nil || o == nil {
		t.Fatal("no backlog-and-replay report")
	}
	num := func(s string) float64 { v, _ := strconv.ParseFloat(s, 64); return v }
	if num(m[1]) != 3000 || num(d[1]) <= 0 || num(d[2]) <= 0 || num(f[1]) <= 0 || num(f[2]) < 1 {
		t.Errorf("implausible backlog figures: %q %q %q", m[0], d[0], f[0])
	}
	if num(o[1]) >= num(o[2]) {
		t.Errorf("the fresh gas was derived only after the whole backlog (%s): it did not overtake it", o[0])
	}
}

// TestTargetVerdicts checks the targets line by line against the issue's
// figures (pipeline at least 0.5 of the floor, p99 under 100 ms at 500
// inputs/s, at most 1.5 KB per input, two replicas no slower than one on
// two cores): just under and just over each bound.
func TestTargetVerdicts(t *testing.T) {
	store := &storageReport{inputs: 1000, total: 1536 * 1000}
	rows := []benchRow{
		{name: "floor", perSec: 10000},
		{name: "one", replicas: 1, perSec: 5000, ratio: 0.5, p99: 99 * time.Millisecond, latencyN: 16, storage: store},
		{name: "two", replicas: 2, perSec: 4900, ratio: 0.49},
	}
	got := strings.Join(targetVerdicts(rows, 500, 2, nil), "\n")
	for _, want := range []string{
		"pipeline/floor with one replica: 0.50 (target at least 0.5): met",
		"p99 input to derived output with one replica: 99.0 ms from 16 samples at 500 inputs/s (target under 100 ms at 500/s): met",
		"bytes per input recorded: 1536 (target at most 1536): met",
		"2 replicas: 4900 inputs/s, 0.98x one replica",
	} {
		if !strings.Contains(got, want) {
			t.Errorf("verdicts lack %q:\n%s", want, got)
		}
	}
	if !strings.Contains(got, "(target on 2 cores: no slower than one): MISSED") {
		t.Errorf("two replicas at 0.98x on 2 cores not judged missed:\n%s", got)
	}
	rows[2].perSec = 5000
	if got := strings.Join(targetVerdicts(rows, 500, 2, nil), "\n"); !strings.Contains(got, "1.00x one replica (target on 2 cores: no slower than one): met") {
		t.Errorf("two replicas as fast as one on 2 cores not judged met:\n%s", got)
	}
	if got := strings.Join(targetVerdicts(rows, 500, 8, nil), "\n"); !strings.Contains(got, "(on 8 cores; ideal scaling 2x") || strings.Contains(got, "no slower") {
		t.Errorf("on 8 cores the replica line must give the ideal scaling, not the 2-core target:\n%s", got)
	}

	rows[1].ratio, rows[1].p99, store.total = 0.1, 100*time.Millisecond, 5120*1000
	got = strings.Join(targetVerdicts(rows, 500, 2, nil), "\n")
	if !strings.Contains(got, "(target under 100 ms at 500/s): MISSED") {
		t.Errorf("p99 of exactly 100 ms at 500/s not judged missed:\n%s", got)
	}
	got = strings.Join(targetVerdicts(rows, 200, 2, nil), "\n")
	for _, want := range []string{
		"(target at least 0.5): MISSED, 5.0x short",
		"(target under 100 ms at 500/s): not judged (paced at 200/s, not the target's rate: run with --rate 500 to judge it)",
		"bytes per input recorded: 5120 (target at most 1536): MISSED, 3.3x over",
	} {
		if !strings.Contains(got, want) {
			t.Errorf("verdicts lack %q:\n%s", want, got)
		}
	}
	if got := targetVerdicts(rows[:1], 500, 2, nil); len(got) != 1 || !strings.Contains(got[0], "no one-replica pipeline run") {
		t.Errorf("without a one-replica run: %q", got)
	}
}

// TestBenchHistorySmall runs the history-store measurement at a tiny size
// (two sizes of 10 patients, 1 and 2 simulated days, a reading every
// 10 min) with a real
// PostgreSQL and checks its table, the trend line, the retention estimate
// and the targets line.
func TestBenchHistorySmall(t *testing.T) {
	report := benchReport(t, 5*time.Minute, "--inputs", "300", "--copies", "1", "--rate", "200", "--paced", "1s",
		"--replicas", "1", "--patients", "0", "--stay-hours", "0", "--backlog", "0",
		"--history-days", "1,2", "--history-patients", "10", "--history-inputs", "300", "--history-every", "10m", "--ladder=false", "--dir", t.TempDir())
	t.Log("\n" + report)
	if strings.Contains(report, "Cost ladder") {
		t.Error("--ladder=false printed a cost ladder")
	}
	var stored []float64
	for _, days := range []string{"1", "2"} {
		m := regexp.MustCompile(`(?m)^\s*` + days + `((?:\s+[0-9.]+){10})\s*$`).FindStringSubmatch(report)
		if m == nil {
			t.Fatalf("no history row for %s days", days)
		}
		var v []float64
		for f := range strings.FieldsSeq(m[1]) {
			x, _ := strconv.ParseFloat(f, 64)
			v = append(v, x)
		}
		// inputs stored, build inputs/s, store MB, bytes/input, empty CPU+PG,
		// history CPU+PG, history PG, inputs/s empty, inputs/s history, ratio
		if v[0] < 1000 || v[1] <= 0 || v[2] <= 0 || v[3] <= 0 || v[4] <= 0 || v[5] <= 0 || v[7] <= 0 || v[8] <= 0 {
			t.Errorf("%s days: implausible figures %v", days, v)
		}
		// The ratio column is history over empty, as printed (2 decimals).
		if want := v[5] / v[4]; v[9] < want-0.02*want-0.01 || v[9] > want+0.02*want+0.01 {
			t.Errorf("%s days: ratio %.2f, want history/empty %.2f", days, v[9], want)
		}
		stored = append(stored, v[0])
	}
	// Two simulated days of the same patients hold about twice the
	// inputs of one.
	if stored[1] < 1.8*stored[0] || stored[1] > 2.2*stored[0] {
		t.Errorf("stored inputs after 1 and 2 days: %v, want about double", stored)
	}
	if !regexp.MustCompile(`trend: the store grew [0-9.]+x .*: [+-][0-9.]+ per doubling`).MatchString(report) {
		t.Error("no trend line")
	}
	if !regexp.MustCompile(`after retention 300 x \(365 x f - 364 x r\) = [0-9.]+ GB a year \([0-9]+% kept\)`).MatchString(report) {
		t.Error("no retention estimate for a site's year")
	}
	if !regexp.MustCompile(`with the removed rows' share of fact_row's indexes, I = [0-9]+ fact rows x [1-9][0-9]* index bytes a row = [1-9][0-9]* bytes`).MatchString(report) ||
		!regexp.MustCompile(`after retention 300 x \(365 x f - 364 x \(R\+I\)/\(P\*\(D-1\)\)\)\n  = [0-9.]+ GB a year \([0-9]+% kept\)`).MatchString(report) {
		t.Error("no retention estimate with the removed rows' index entries")
	}
	if !regexp.MustCompile(`per-input CPU \(service \+ PostgreSQL\) after 2 days of 10 patients / empty store: [0-9.]+ \(target at most 1.2 after 30 days of 200 patients\): not judged`).MatchString(report) {
		t.Error("no targets line for the history store (not judged at a small size)")
	}
}

// TestHistoryVerdict checks the history-store line just under and over the
// target's 1.2 (issue 14) at the target's size, and that a smaller store is
// not judged.
func TestHistoryVerdict(t *testing.T) {
	p := historyPoint{days: 30, patients: 200, empty: benchRow{cpuUS: 400, serverUS: 600}, history: benchRow{cpuUS: 500, serverUS: 700}}
	rows := []benchRow{{name: "one", replicas: 1, perSec: 5000, ratio: 0.5}}
	got := strings.Join(targetVerdicts(rows, 500, 2, []historyPoint{p}), "\n")
	if !strings.Contains(got, "after 30 days of 200 patients / empty store: 1.20 (target at most 1.2 after 30 days of 200 patients): met") {
		t.Errorf("1.20x at 30 days x 200 patients not judged met:\n%s", got)
	}
	p.history.serverUS = 710
	got = strings.Join(targetVerdicts(rows, 500, 2, []historyPoint{p}), "\n")
	if !strings.Contains(got, "empty store: 1.21 (target at most 1.2 after 30 days of 200 patients): MISSED, 1.0x over") {
		t.Errorf("1.21x not judged missed:\n%s", got)
	}
	p.days = 7
	if got := historyVerdict(p); !strings.Contains(got, "not judged (1.0x over the bound already at this size; run with --history-days 30 --history-patients 200") {
		t.Errorf("a 7-day store judged as the target: %s", got)
	}
	p.history.serverUS = 600
	if got := historyVerdict(p); !strings.Contains(got, "not judged (within the bound at this size;") {
		t.Errorf("a 7-day store at 1.1x: %s", got)
	}
}

// TestYearAfterRetention checks the retention estimate's arithmetic by
// hand: 10 patients over 3 days in 3,000,000 bytes is 100,000 bytes a
// bed-day; removing 1,000,000 bytes of the 2 old days is 50,000 a bed-day;
// a 300-bed year keeps 300 x (365 x 100,000 - 364 x 50,000).
func TestYearAfterRetention(t *testing.T) {
	y := yearAfterRetention(3_000_000, 1_000_000, 3, 10)
	if y.perBedDay != 100_000 || y.removedPerBedDay != 50_000 || y.before != 300*365*100_000 || y.after != 300*(365*100_000-364*50_000) {
		t.Errorf("yearAfterRetention = %+v", y)
	}
}

// TestFactIndexShare checks the removed rows' share of fact_row's indexes
// by hand: 1,000 rows with 300,000 index bytes are 300 bytes a row, so 250
// removed rows hold 75,000; a store without fact_row gives 0.
func TestFactIndexShare(t *testing.T) {
	st := storageReport{tables: []tableSize{{name: "inbox", rows: 10, index: 9_999}, {name: "fact_row", rows: 1_000, index: 300_000}}}
	if got := factIndexBytesPerRow(st); got != 300 {
		t.Errorf("factIndexBytesPerRow = %v, want 300", got)
	}
	if got := factIndexShare(st, 250); got != 75_000 {
		t.Errorf("factIndexShare(250) = %d, want 75,000", got)
	}
	if got := factIndexShare(storageReport{tables: st.tables[:1]}, 250); got != 0 {
		t.Errorf("factIndexShare without fact_row = %d, want 0", got)
	}
}

// benchReport runs the bench command with args against a real PostgreSQL
// (pgtest's admin URL as DATABASE_URL) within timeout and returns what it
// printed; a failing run fails the test with its output.
func benchReport(t *testing.T, timeout time.Duration, args ...string) string {
	t.Helper()
	admin := pgtest.AdminURL(t)
	var out, errOut bytes.Buffer
	e := env{getenv: func(k string) string {
		if k == "DATABASE_URL" {
			return admin
		}
		return ""
	}, stdout: &out, stderr: &errOut}
	ctx, cancel := context.WithTimeout(context.Background(), timeout)
	defer cancel()
	if err := run(ctx, append([]string{"bench"}, args...), e); err != nil {
		t.Fatalf("bench: %v\n%s\n%s", err, out.String(), errOut.String())
	}
	return out.String()
}

// TestBenchKeepDatabases checks --keep: the run's databases stay on the
// server and are listed, and without it they are dropped; and that --keep
// without DATABASE_URL is a usage error (a throwaway cluster would take
// them with it).
func TestBenchKeepDatabases(t *testing.T) {
	admin := pgtest.AdminURL(t)
	ctx := context.Background()
	exists := func(name string) bool {
		c, err := pgx.Connect(ctx, admin)
		if err != nil {
			t.Fatal(err)
		}
		defer c.Close(ctx)
		var ok bool
		if err := c.QueryRow(ctx, "SELECT EXISTS (SELECT 1 FROM pg_database WHERE datname = $1)", name).Scan(&ok); err != nil {
			t.Fatal(err)
		}
		return ok
	}
	for _, keep := range []bool{true, false} {
		var out bytes.Buffer
		b := &bench{f: benchFlags{keep: keep}, admin: admin, out: &out}
		name, _, err := createDatabase(ctx, admin, "ventderive_keep_test_")
		if err != nil {
			t.Fatal(err)
		}
		t.Cleanup(func() { dropDatabase(admin, name) })
		b.dbs = []string{name}
		b.close()
		if got := exists(name); got != keep {
			t.Errorf("keep %v: database %s exists after close: %v", keep, name, got)
		}
		if listed := strings.Contains(out.String(), "Kept databases (--keep; drop them when done): "+name); listed != keep {
			t.Errorf("keep %v: listed %v in %q", keep, listed, out.String())
		}
	}
	var stderr bytes.Buffer
	err := runBench(ctx, []string{"--keep"}, env{getenv: func(string) string { return "" }, stdout: &bytes.Buffer{}, stderr: &stderr})
	if err != errUsage || !strings.Contains(stderr.String(), "--keep needs DATABASE_URL") {
		t.Errorf("--keep without DATABASE_URL: %v, %q", err, stderr.String())
	}
}

// reapingProcs is a postmaster (pid 1, 500 ticks of its own and reaped
// children) with two live backends (pids 2 and 3, 100 and 40 ticks), and
// backend 2 exits and is reaped once, at the moment its ticks are first
// read: from then on its 100 ticks are the postmaster's.
type reapingProcs struct{ reaped bool }

func (p *reapingProcs) pids() []int { return []int{1, 2, 3, 9} }
func (p *reapingProcs) parent(pid int) int {
	if pid == 9 {
		return 7 // not the server's
	}
	return 1
}
func (p *reapingProcs) ticks(pid int, _ bool) int64 {
	switch pid {
	case 1:
		if p.reaped {
			return 600
		}
		return 500
	case 2:
		if !p.reaped {
			p.reaped = true // gone before its stat is read
		}
		return 0
	case 3:
		return 40
	default:
		return 1000
	}
}

// TestServerTicksKeepsAReapedChild checks that a backend reaped while the
// server's CPU is read is counted once: the server's ticks are conserved
// (500 + 100 + 40), where reading the postmaster only before its children
// gave 540 and made a run's PostgreSQL CPU per input negative. The
// accounting (a reaped child's ticks join its parent's cutime and cstime)
// is proc(5)'s, common practice on Linux.
func TestServerTicksKeepsAReapedChild(t *testing.T) {
	if got := serverTicks(1, &reapingProcs{}); got != 640 {
		t.Errorf("serverTicks = %d, want 640 (500 of the postmaster, 100 reaped, 40 live)", got)
	}
}
