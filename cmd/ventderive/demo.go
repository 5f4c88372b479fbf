package main

import (
	"context"
	"crypto/rand"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"runtime/pprof"
	"slices"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/scenario"
	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
)

func init() {
	register(command{name: "demo", summary: "run the whole service on embedded defaults with an invented ICU day", run: runDemo})
}

type demoFlags struct {
	duration time.Duration
	speed    float64
	seed     int64
	keep     bool
	check    bool
	dir      string
	cpuprof  string
}

func runDemo(ctx context.Context, args []string, e env) error {
	fs := flag.NewFlagSet("demo", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	var f demoFlags
	fs.DurationVar(&f.duration, "duration", scenario.DefaultDuration, "simulated span of the scenario (at least 6h)")
	fs.Float64Var(&f.speed, "speed", 2880, "simulated seconds per real second (2880: a day in 30 s); 0: as fast as possible")
	fs.Int64Var(&f.seed, "seed", 1, "scenario seed: the same seed gives the same messages")
	fs.BoolVar(&f.keep, "keep", false, "keep the database (and its throwaway cluster) for 'ventderive audit' afterwards")
	fs.BoolVar(&f.check, "check", false, "exit non-zero unless every story behaves as expected and no message is lost (CI smoke test)")
	fs.StringVar(&f.dir, "dir", "", "working directory for the embedded NATS store, logs and the throwaway cluster (default: a new temporary directory)")
	fs.StringVar(&f.cpuprof, "cpuprofile", "", "write a CPU profile of the whole demo to this file (for performance work)")
	if done, err := parseFlags(fs, args); done {
		return err
	}
	if f.cpuprof != "" {
		pf, err := os.Create(f.cpuprof)
		if err != nil {
			return err
		}
		defer pf.Close()
		if err := pprof.StartCPUProfile(pf); err != nil {
			return err
		}
		defer pprof.StopCPUProfile()
	}
	if f.duration < scenario.MinDuration {
		return fmt.Errorf("--duration %s: the scenario needs at least %s", f.duration, scenario.MinDuration)
	}
	return demo(ctx, f, e)
}

func demo(ctx context.Context, f demoFlags, e env) (err error) {
	out := e.stdout
	if f.dir == "" {
		f.dir, err = os.MkdirTemp("", "ventderive-demo-")
		if err != nil {
			return err
		}
	}
	if err := os.MkdirAll(f.dir, 0o755); err != nil {
		return err
	}
	if !f.keep {
		defer os.RemoveAll(f.dir)
	}
	logPath := filepath.Join(f.dir, "service.log")
	logFile, err := os.Create(logPath)
	if err != nil {
		return err
	}
	defer logFile.Close()
	log := slog.New(slog.NewJSONHandler(logFile, &slog.HandlerOptions{Level: slog.LevelInfo}))

	sc := scenario.Generate(scenario.Options{Seed: f.seed, Duration: f.duration})
	fmt.Fprintf(out, "ventderive demo: %s, %s — %d invented patients, %d messages over a simulated %s (seed %d)\n",
		sc.Hospital, sc.Unit, len(sc.Patients), len(sc.Messages), sc.Duration, f.seed)
	fmt.Fprintln(out, "All patients, identifiers and values are invented. Derived values are advisory, never orders.")

	// NATS: an embedded server with JetStream on a temporary store.
	ns, err := startEmbeddedNATS(filepath.Join(f.dir, "nats"))
	if err != nil {
		return err
	}
	defer ns.WaitForShutdown()
	defer ns.Shutdown()
	fmt.Fprintf(out, "  NATS      embedded JetStream at %s\n", ns.ClientURL())

	// PostgreSQL: a fresh database on DATABASE_URL's server, or a
	// throwaway cluster.
	dbURL, cluster, cleanupDB, err := demoDatabase(ctx, e, f, out)
	if err != nil {
		return err
	}
	defer func() {
		switch {
		case !f.keep:
			cleanupDB()
		case cluster != nil:
			// The server would die with this process: stop it cleanly and
			// keep its data for the printed start command.
			sctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
			if err := cluster.Stop(sctx, "fast"); err != nil {
				fmt.Fprintf(out, "stopping the kept cluster: %v\n", err)
			}
			cancel()
		}
	}()

	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		return err
	}
	defer nc.Close()
	js, err := jetstream.New(nc)
	if err != nil {
		return err
	}
	for _, sc := range []jetstream.StreamConfig{consumer.InputStreamConfig(""), consumer.OutputStreamConfig()} {
		if _, err := js.CreateStream(ctx, sc); err != nil {
			return fmt.Errorf("create stream %s: %w", sc.Name, err)
		}
	}

	// The service, in-process, exactly as serve runs it.
	var c serveConfig
	fs := flag.NewFlagSet("demo-serve", flag.ContinueOnError)
	if _, err := bindServe(fs, func(string) string { return "" }, &c); err != nil {
		return err
	}
	c.natsURL = ns.ClientURL()
	c.databaseURL = dbURL
	c.httpAddr = "127.0.0.1:0"
	c.migrate = true
	c.apparatusDeadSpaceML = scenario.ApparatusDeadSpaceML
	// The invented site's target; a real site configures its own, and no
	// target suits every patient (chronic or permissive hypercapnia).
	c.targetPaCO2mmHg = fhirmap.DefaultTargetPaCO2mmHg
	c.pipeline.Window.Before, c.pipeline.Window.After = scenario.PairingBefore, scenario.PairingAfter
	key := make([]byte, 32)
	_, _ = rand.Read(key)
	c.patientHashKey = hex.EncodeToString(key)
	fmt.Fprintf(out, "  service   apparatus dead space %g mL, site target PaCO2 %g mmHg (not a patient's goal), pairing window %s before to %s after each blood gas; logs in %s\n",
		c.apparatusDeadSpaceML, c.targetPaCO2mmHg, c.pipeline.Window.Before, c.pipeline.Window.After, logPath)

	svcCtx, stopSvc := context.WithCancel(ctx)
	ready := make(chan *consumer.Pipeline, 1)
	svcErr := make(chan error, 1)
	go func() { svcErr <- serve(svcCtx, c, log, ready) }()
	select {
	case <-ready:
	case err := <-svcErr:
		stopSvc()
		return fmt.Errorf("service: %w", err)
	}
	defer func() {
		stopSvc()
		if serr := <-svcErr; serr != nil && err == nil {
			err = fmt.Errorf("service: %w", serr)
		}
	}()

	pool, err := pgxpool.New(ctx, dbURL)
	if err != nil {
		return err
	}
	defer pool.Close()

	if err := feed(ctx, js, pool, sc, f.speed, out); err != nil {
		return err
	}
	good, poison := scenarioInputs(sc)
	want := int64(len(good) + len(poison))
	if err := waitSettled(ctx, js, consumer.DefaultDurable, pool, want, 3*time.Minute, 200*time.Millisecond); err != nil {
		return err
	}
	problems, err := summarise(ctx, pool, js, sc, len(good), len(poison), out)
	if err != nil {
		return err
	}
	if f.keep {
		fmt.Fprintf(out, "\nThe store is kept. Try, as a reviewer would:\n")
		p := sc.Patients[1].Ref
		if cluster != nil {
			start, stop := keptClusterCommands(cluster, filepath.Join(f.dir, "postgres"))
			fmt.Fprintf(out, "The throwaway PostgreSQL cluster stops when the demo exits; its data stays in %s.\n", filepath.Join(f.dir, "postgres"))
			fmt.Fprintf(out, "Start it again with:\n  %s\n(stop it with: %s; remove the directory when done)\n", start, stop)
		}
		fmt.Fprintf(out, "  export DATABASE_URL='%s'\n", dbURL)
		fmt.Fprintf(out, "  go run ./cmd/ventderive audit list --patient %s\n", p)
		fmt.Fprintf(out, "  go run ./cmd/ventderive audit refusals\n")
		fmt.Fprintf(out, "  go run ./cmd/ventderive audit changes\n")
		fmt.Fprintf(out, "  go run ./cmd/ventderive audit discrepancies --threshold 5\n")
		fmt.Fprintf(out, "  go run ./cmd/ventderive audit verify\n")
		fmt.Fprintf(out, "The reviewer console over the same store (read-only; open http://127.0.0.1:8470/):\n")
		fmt.Fprintf(out, "  go run ./cmd/ventderive review\n")
		fmt.Fprintf(out, "Files (NATS store, service log%s) are in %s\n", map[bool]string{true: ", PostgreSQL cluster", false: ""}[e.getenv("DATABASE_URL") == ""], f.dir)
	}
	if f.check && len(problems) > 0 {
		return fmt.Errorf("demo check failed: %s", strings.Join(problems, "; "))
	}
	return nil
}

// keptClusterCommands are the shell commands that start and stop a kept
// throwaway cluster in dir on its port (as the postgres user when running
// as root, as pgtest runs it).
func keptClusterCommands(c *pgtest.Cluster, dir string) (start, stop string) {
	bin, _ := pgtest.ServerBin()
	ctl := filepath.Join(bin, "pg_ctl")
	as := ""
	if os.Geteuid() == 0 {
		as = "runuser -u postgres -- "
	}
	data := filepath.Join(dir, "data")
	start = fmt.Sprintf("%s%s -D %s -l %s -o '-p %d -k /tmp -c listen_addresses=127.0.0.1' -w start",
		as, ctl, data, filepath.Join(dir, "postgres.log"), c.Port())
	stop = fmt.Sprintf("%s%s -D %s -w stop", as, ctl, data)
	return start, stop
}

// demoDatabase returns the URL of an empty database for the demo, the
// throwaway cluster it lives in (nil on DATABASE_URL's server) and a
// function that removes it.
func demoDatabase(ctx context.Context, e env, f demoFlags, out io.Writer) (string, *pgtest.Cluster, func(), error) {
	admin := e.getenv("DATABASE_URL")
	var cluster *pgtest.Cluster
	if admin == "" {
		var err error
		cluster, err = pgtest.StartCluster(ctx, filepath.Join(f.dir, "postgres"))
		if err != nil {
			if errors.Is(err, pgtest.ErrNoServer) {
				return "", nil, nil, fmt.Errorf("no DATABASE_URL and no PostgreSQL server to start a throwaway one: install the Debian package postgresql (or set DATABASE_URL to a server where this role may CREATE DATABASE): %w", err)
			}
			return "", nil, nil, fmt.Errorf("throwaway PostgreSQL: %w", err)
		}
		admin = cluster.URL()
		fmt.Fprintf(out, "  PostgreSQL throwaway cluster in %s\n", filepath.Join(f.dir, "postgres"))
	}
	name, url, err := createDatabase(ctx, admin, "ventderive_demo_")
	if err != nil {
		if cluster != nil {
			_ = cluster.Close()
		}
		return "", nil, nil, err
	}
	if cluster == nil {
		fmt.Fprintf(out, "  PostgreSQL database %s on the server DATABASE_URL names\n", name)
	}
	cleanup := func() {
		if cluster != nil {
			_ = cluster.Close()
			return
		}
		dropDatabase(admin, name)
	}
	return url, cluster, cleanup, nil
}

// feed publishes the scenario at the requested speed with a progress line.
func feed(ctx context.Context, js jetstream.JetStream, pool *pgxpool.Pool, sc scenario.Scenario, speed float64, out io.Writer) error {
	realStart := time.Now()
	lastShown := time.Time{}
	pub := newAsyncPublisher(js, 256)
	for i, m := range sc.Messages {
		if speed > 0 {
			due := realStart.Add(time.Duration(float64(m.At.Sub(sc.Start)) / speed))
			if wait := time.Until(due); wait > 0 {
				if err := pub.flush(ctx); err != nil {
					return err
				}
				select {
				case <-ctx.Done():
					return ctx.Err()
				case <-time.After(wait):
				}
			}
		}
		if err := pub.publish(ctx, m.Subject, m.MsgID, m.Payload); err != nil {
			return err
		}
		if time.Since(lastShown) > time.Second || i == len(sc.Messages)-1 {
			lastShown = time.Now()
			progress(ctx, pool, out, m.At, i+1, len(sc.Messages))
		}
	}
	if err := pub.flush(ctx); err != nil {
		return err
	}
	fmt.Fprintln(out)
	return nil
}

func progress(ctx context.Context, pool *pgxpool.Pool, out io.Writer, at time.Time, sent, total int) {
	var derived, refused, dead int64
	_ = pool.QueryRow(ctx, `SELECT (SELECT count(*) FROM derivation), (SELECT count(*) FROM refusal), (SELECT count(*) FROM dead_letter)`).Scan(&derived, &refused, &dead)
	fmt.Fprintf(out, "\r  simulated %s  sent %5d/%d  derived %5d  refused %5d  dead letters %d   ",
		at.Format("Jan 2 15:04"), sent, total, derived, refused, dead)
}

// patientSummary is what the store says of one patient.
type patientSummary struct {
	gases     int
	derived   int // current, valid derived values
	retracted int // current heads retracted
	amended   int // derivation versions amended or corrected
	refusals  map[string]int
	latest    map[string]string // kind -> value of the latest blood gas
	outside   []string          // current values outside the story's ranges
}

// summarise prints what happened per patient and checks every story's
// expectation and the message accounting; it returns the problems found.
func summarise(ctx context.Context, pool *pgxpool.Pool, js jetstream.JetStream, sc scenario.Scenario, good, poison int, out io.Writer) ([]string, error) {
	const headsSQL = `
		SELECT h.patient_ref, h.blood_gas_key, h.kind, h.refused, coalesce(r.reason, ''),
		       coalesce(d.status, ''), coalesce(d.value, 0), coalesce(d.unit, ''), coalesce(d.effective, r.effective)
		FROM head h
		LEFT JOIN refusal r ON r.id = h.refusal_id
		LEFT JOIN derivation d ON d.id = h.derivation_id
		ORDER BY h.patient_ref, 9, h.kind`
	rows, err := pool.Query(ctx, headsSQL)
	if err != nil {
		return nil, fmt.Errorf("summary: %w", err)
	}
	sum := map[string]*patientSummary{}
	get := func(ref string) *patientSummary {
		s, ok := sum[ref]
		if !ok {
			s = &patientSummary{refusals: map[string]int{}, latest: map[string]string{}}
			sum[ref] = s
		}
		return s
	}
	gases := map[string]map[string]bool{}
	lastGas := map[string]time.Time{}
	ranges := map[string][]scenario.ValueRange{}
	for _, p := range sc.Patients {
		ranges[p.Ref] = p.Expect.Ranges
	}
	for rows.Next() {
		var ref, gas, kind, reason, status, unit string
		var refused bool
		var value float64
		var eff time.Time
		if err := rows.Scan(&ref, &gas, &kind, &refused, &reason, &status, &value, &unit, &eff); err != nil {
			rows.Close()
			return nil, err
		}
		s := get(ref)
		if gases[ref] == nil {
			gases[ref] = map[string]bool{}
		}
		gases[ref][gas] = true
		switch {
		case refused:
			s.refusals[reason]++
			if status == "entered-in-error" {
				s.retracted++
			}
		case status == "entered-in-error":
			s.retracted++
		default:
			s.derived++
			for _, r := range ranges[ref] {
				if r.Kind == kind && (value < r.Min || value > r.Max) {
					s.outside = append(s.outside, fmt.Sprintf("%s %.3g outside the story's %g to %g (blood gas at %s)",
						kind, value, r.Min, r.Max, eff.UTC().Format("15:04")))
				}
			}
			if !eff.Before(lastGas[ref]) {
				if eff.After(lastGas[ref]) {
					s.latest = map[string]string{}
				}
				lastGas[ref] = eff
				s.latest[kind] = strings.TrimSpace(fhirmap.FormatValue(kind, value) + " " + physio.DisplayUnit(unit)) // as published
			}
		}
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return nil, err
	}
	for ref, g := range gases {
		get(ref).gases = len(g)
	}
	if err := scanInto(ctx, pool, `SELECT patient_ref, count(DISTINCT blood_gas_key) FROM derivation WHERE status IN ('amended','corrected') GROUP BY 1`, func(ref string, n int) { get(ref).amended = n }); err != nil {
		return nil, err
	}

	var problems []string
	fmt.Fprintf(out, "\nSummary per patient (current state of the provenance store):\n")
	tw := tabwriter.NewWriter(out, 0, 0, 2, ' ', 0)
	for _, p := range sc.Patients {
		s := get(p.Ref)
		want := p.Expect
		var bad []string
		if s.gases != want.BloodGases {
			bad = append(bad, fmt.Sprintf("%d blood gases in the store, %d sent", s.gases, want.BloodGases))
		}
		if s.derived < want.MinDerived {
			bad = append(bad, fmt.Sprintf("%d derived values, expected at least %d", s.derived, want.MinDerived))
		}
		for _, r := range want.Refusals {
			if s.refusals[r] == 0 {
				bad = append(bad, "no refusal for "+r)
			}
		}
		if s.amended < want.Amended {
			bad = append(bad, fmt.Sprintf("%d amended blood gases, expected %d", s.amended, want.Amended))
		}
		if want.Retracted > 0 && s.retracted == 0 {
			bad = append(bad, "nothing retracted")
		}
		bad = append(bad, s.outside...)
		mark := "ok"
		if len(bad) > 0 {
			mark = "UNEXPECTED: " + strings.Join(bad, "; ")
			problems = append(problems, p.Label+": "+strings.Join(bad, "; "))
		}
		fmt.Fprintf(tw, "\n%s: %s\n", p.Label, mark)
		fmt.Fprintf(tw, "  story\t%s\n", p.Story)
		if len(p.Expect.Ranges) > 0 {
			parts := make([]string, len(p.Expect.Ranges))
			for i, r := range p.Expect.Ranges {
				parts[i] = fmt.Sprintf("%s %g to %g", r.Kind, r.Min, r.Max)
			}
			fmt.Fprintf(tw, "  expected\t%s\n", strings.Join(parts, ", "))
		}
		fmt.Fprintf(tw, "  store\t%d blood gases, %d current derived values, %d retracted, %d amended\n", s.gases, s.derived, s.retracted, s.amended)
		if len(s.refusals) > 0 {
			fmt.Fprintf(tw, "  refusals\t%s\n", formatCounts(s.refusals))
		}
		if len(s.latest) > 0 {
			fmt.Fprintf(tw, "  latest gas\t%s\n", formatLatest(s.latest))
		}
	}
	tw.Flush()

	// Accounting: every message is in the inbox or a dead letter, every
	// derivation version was published once with its Provenance.
	var inbox, dead, versions, unpublished int
	if err := pool.QueryRow(ctx, `SELECT (SELECT count(*) FROM inbox), (SELECT count(*) FROM dead_letter),
		(SELECT count(*) FROM derivation), (SELECT count(*) FROM outbox WHERE published_at IS NULL)`).Scan(&inbox, &dead, &versions, &unpublished); err != nil {
		return nil, err
	}
	out2, err := streamCount(ctx, js)
	if err != nil {
		return nil, err
	}
	fmt.Fprintf(out, "\nAccounting: %d distinct inputs sent, %d recorded; %d malformed sent, %d dead letters; %d derivation versions, %d output messages (Observation + Provenance each, plus dead-letter copies); %d unpublished\n",
		good, inbox, poison, dead, versions, out2, unpublished)
	if inbox != good {
		problems = append(problems, fmt.Sprintf("%d inputs recorded of %d sent", inbox, good))
	}
	if dead != poison {
		problems = append(problems, fmt.Sprintf("%d dead letters of %d malformed sent", dead, poison))
	}
	if out2 != 2*versions+dead {
		problems = append(problems, fmt.Sprintf("%d output messages, expected %d", out2, 2*versions+dead))
	}
	if unpublished != 0 {
		problems = append(problems, fmt.Sprintf("%d outbox rows unpublished", unpublished))
	}
	if versions == 0 {
		problems = append(problems, "nothing was derived")
	}
	if len(problems) == 0 {
		fmt.Fprintln(out, "Every story behaved as expected; no message lost or duplicated.")
	} else {
		fmt.Fprintf(out, "%d problem(s):\n  %s\n", len(problems), strings.Join(problems, "\n  "))
	}
	return problems, nil
}

func streamCount(ctx context.Context, js jetstream.JetStream) (int, error) {
	s, err := js.Stream(ctx, consumer.DefaultOutputStream)
	if err != nil {
		return 0, err
	}
	info, err := s.Info(ctx)
	if err != nil {
		return 0, err
	}
	return int(info.State.Msgs), nil
}

func scanInto(ctx context.Context, pool *pgxpool.Pool, sql string, fn func(string, int)) error {
	rows, err := pool.Query(ctx, sql)
	if err != nil {
		return err
	}
	defer rows.Close()
	for rows.Next() {
		var k string
		var n int
		if err := rows.Scan(&k, &n); err != nil {
			return err
		}
		fn(k, n)
	}
	return rows.Err()
}

func formatCounts(m map[string]int) string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	slices.Sort(keys)
	parts := make([]string, len(keys))
	for i, k := range keys {
		parts[i] = fmt.Sprintf("%s x%d", k, m[k])
	}
	return strings.Join(parts, ", ")
}

func formatLatest(m map[string]string) string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	slices.Sort(keys)
	parts := make([]string, len(keys))
	for i, k := range keys {
		parts[i] = k + " " + m[k] // display units; a ratio is a plain number
	}
	return strings.Join(parts, "; ")
}

// scenarioInputs returns the distinct payloads of a scenario by inbox key
// (SHA-256), split into good ones and malformed ones.
func scenarioInputs(sc scenario.Scenario) (good, poison map[[32]byte]bool) {
	good, poison = map[[32]byte]bool{}, map[[32]byte]bool{}
	for _, m := range sc.Messages {
		if m.Malformed {
			poison[sha256.Sum256(m.Payload)] = true
		} else {
			good[sha256.Sum256(m.Payload)] = true
		}
	}
	return good, poison
}
