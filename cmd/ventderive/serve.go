package main

import (
	"bytes"
	"context"
	"crypto/sha256"
	"crypto/tls"
	"crypto/x509"
	"encoding/hex"
	"errors"
	"flag"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"net/url"
	"os"
	"strconv"
	"strings"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/nats-io/nats.go"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/migrations"
	"github.com/ventderive/ventderive/physio"
)

func init() {
	register(command{name: "serve", summary: "run the service: consume, derive, record, publish", run: runServe})
}

// envPrefix is the one prefix of every environment variable the service
// reads (DATABASE_URL excepted, the name every PostgreSQL tool knows).
const envPrefix = "VENTDERIVE_"

// serveConfig is the resolved configuration of serve (and of demo).
type serveConfig struct {
	natsURL, natsCreds, tlsCA, tlsCert, tlsKey string
	databaseURL                                string
	httpAddr                                   string
	logLevel                                   string
	codeAliases                                string
	codeSystemURL                              string
	patientHashKey                             string
	apparatusDeadSpaceML                       float64 // < 0: not configured
	targetPaCO2mmHg                            float64 // 0: not configured
	anatomicDeadSpace                          string  // physio.AnatomicModel name
	migrate                                    bool
	workers                                    int
	pipeline                                   consumer.Config
}

// settings binds each flag to its environment variable, so that one
// table documents both (README "Configuration").
type settings struct {
	fs      *flag.FlagSet
	getenv  func(string) string
	secrets map[string]bool
	order   []string
}

func (s *settings) env(name string) string {
	if name == "database-url" {
		return "DATABASE_URL"
	}
	return envPrefix + strings.ToUpper(strings.ReplaceAll(name, "-", "_"))
}

func (s *settings) str(p *string, name, def, usage string) {
	if v := s.getenv(s.env(name)); v != "" {
		def = v
	}
	s.fs.StringVar(p, name, def, usage+" (env "+s.env(name)+")")
	s.order = append(s.order, name)
}

func (s *settings) secret(p *string, name, def, usage string) {
	s.str(p, name, def, usage)
	s.secrets[name] = true
}

func (s *settings) dur(p *time.Duration, name string, def time.Duration, usage string) error {
	if v := s.getenv(s.env(name)); v != "" {
		d, err := time.ParseDuration(v)
		if err != nil {
			return fmt.Errorf("%s: %w", s.env(name), err)
		}
		def = d
	}
	s.fs.DurationVar(p, name, def, usage+" (env "+s.env(name)+")")
	s.order = append(s.order, name)
	return nil
}

func (s *settings) num(p *float64, name string, def float64, usage string) error {
	if v := s.getenv(s.env(name)); v != "" {
		f, err := strconv.ParseFloat(v, 64)
		if err != nil {
			return fmt.Errorf("%s: %w", s.env(name), err)
		}
		def = f
	}
	s.fs.Float64Var(p, name, def, usage+" (env "+s.env(name)+")")
	s.order = append(s.order, name)
	return nil
}

func (s *settings) integer(p *int, name string, def int, usage string) error {
	if v := s.getenv(s.env(name)); v != "" {
		n, err := strconv.Atoi(v)
		if err != nil {
			return fmt.Errorf("%s: %w", s.env(name), err)
		}
		def = n
	}
	s.fs.IntVar(p, name, def, usage+" (env "+s.env(name)+")")
	s.order = append(s.order, name)
	return nil
}

// resolved lists every setting with secrets masked, for the start log.
func (s *settings) resolved() []any {
	var out []any
	for _, name := range s.order {
		v := s.fs.Lookup(name).Value.String()
		switch {
		case s.secrets[name] && v != "":
			v = "****"
		case name == "database-url" || name == "nats-url":
			v = maskURL(v)
		}
		out = append(out, slog.String(name, v))
	}
	return out
}

// maskURL hides the passwords of a URL, of a comma-separated list of URLs
// (as --nats-url takes), or of a key=value DSN. A URL it cannot parse is
// replaced whole, since it may hold a password.
func maskURL(raw string) string {
	if strings.Contains(raw, "://") {
		parts := strings.Split(raw, ",")
		for i, p := range parts {
			u, err := url.Parse(strings.TrimSpace(p))
			switch {
			case err != nil:
				parts[i] = "(unparsable url)"
			case u.User != nil:
				if _, ok := u.User.Password(); ok {
					u.User = url.UserPassword(u.User.Username(), "****")
				}
				parts[i] = u.String()
			default:
				parts[i] = u.String()
			}
		}
		return strings.Join(parts, ",")
	}
	if strings.Contains(raw, "password=") {
		fields := strings.Fields(raw)
		for i, f := range fields {
			if strings.HasPrefix(f, "password=") {
				fields[i] = "password=****"
			}
		}
		return strings.Join(fields, " ")
	}
	return raw
}

// bindServe declares serve's flags on fs; demo reuses it.
func bindServe(fs *flag.FlagSet, getenv func(string) string, c *serveConfig) (*settings, error) {
	s := &settings{fs: fs, getenv: getenv, secrets: map[string]bool{}}
	d := consumer.DefaultConfig()
	c.pipeline = d
	s.str(&c.natsURL, "nats-url", nats.DefaultURL, "NATS server URL(s), comma-separated")
	s.str(&c.natsCreds, "nats-creds", "", "NATS credentials file (JWT and NKey seed)")
	s.str(&c.tlsCA, "nats-tls-ca", "", "CA certificate file for the NATS server")
	s.str(&c.tlsCert, "nats-tls-cert", "", "client certificate file for NATS")
	s.str(&c.tlsKey, "nats-tls-key", "", "client key file for NATS")
	s.str(&c.databaseURL, "database-url", "", "PostgreSQL connection URL of the service writer role")
	s.str(&c.pipeline.InputStream, "input-stream", d.InputStream, "JetStream stream holding the input subjects")
	s.str(&c.pipeline.Durable, "durable", d.Durable, "durable pull consumer name shared by all replicas")
	s.str(&c.pipeline.ObservationSub, "subject-observation", d.ObservationSub, "subject for derived Observations")
	s.str(&c.pipeline.ProvenanceSub, "subject-provenance", d.ProvenanceSub, "subject for Provenance resources")
	s.str(&c.pipeline.DeadLetterSub, "subject-deadletter", d.DeadLetterSub, "subject for dead-letter copies")
	errs := []error{
		s.dur(&c.pipeline.Window.Before, "window-before", fhirmap.DefaultSite().Window.Before, "pair ventilator data up to this long before a blood gas"),
		s.dur(&c.pipeline.Window.After, "window-after", fhirmap.DefaultSite().Window.After, "pair ventilator data up to this long after a blood gas"),
		s.num(&c.apparatusDeadSpaceML, "apparatus-dead-space-ml", -1, "apparatus dead space of the site's circuits in mL (HME, closed suction); a value recorded for the patient's circuit is preferred; negative: not configured, and without a recorded value derivations that need it are refused"),
		s.dur(&c.pipeline.TemperatureWindow.Before, "temperature-window-before", fhirmap.DefaultTemperatureWindowBefore, "pair a body temperature up to this long before a blood gas (charted hourly or less often)"),
		s.dur(&c.pipeline.TemperatureWindow.After, "temperature-window-after", fhirmap.DefaultTemperatureWindowAfter, "pair a body temperature up to this long after a blood gas"),
		s.num(&c.targetPaCO2mmHg, "target-paco2", 0, "the site's target PaCO2 in mm[Hg] for the ventilation-for-target values; a patient's PaCO2 Goal in force overrides it; 0: not configured, and without a Goal those values are refused (40 is the usual adult suggestion)"),
	}
	s.str(&c.anatomicDeadSpace, "anatomic-dead-space", fhirmap.DefaultAnatomicDeadSpace.String(), "anatomic dead space model of predicted PaCO2: artificial-airway (tracheal tube or tracheostomy, 0.948 mL/kg PBW) or whole-airway (2.2 mL/kg PBW); a patient's airway recorded by an aliased Observation is preferred")
	s.str(&c.codeAliases, "code-aliases", "", "site code-alias file mapping local codes onto known quantities")
	s.str(&c.codeSystemURL, "codesystem-url", fhirmap.DefaultSite().CodeSystemURL, "canonical URL of the service's CodeSystem for derived values")
	s.secret(&c.patientHashKey, "patient-hash-key", "", "secret key for the keyed hash of patient references in logs and lookups (required)")
	s.str(&c.httpAddr, "http-addr", ":8080", "listen address for /healthz, /readyz and /metrics")
	s.str(&c.logLevel, "log-level", "info", "debug, info, warn or error")
	errs = append(errs,
		s.dur(&c.pipeline.AckWait, "ack-wait", d.AckWait, "consumer ack wait: how long before a dead replica's messages go to another"),
		s.integer(&c.pipeline.MaxAckPending, "max-ack-pending", d.MaxAckPending, "consumer max ack pending"),
		s.integer(&c.workers, "workers", 4, "messages handled at once per replica"),
		s.dur(&c.pipeline.FreshAge, "fresh-age", d.FreshAge, "fresh lane: input published while the replica runs and younger than this is recorded ahead of a backlog the main consumer drains (consumer <durable>-fresh); negative (e.g. -1s): off"),
	)
	fs.BoolVar(&c.migrate, "migrate", false, "apply database migrations before starting (needs the owner role)")
	return s, errors.Join(errs...)
}

func runServe(ctx context.Context, args []string, e env) error {
	fs := flag.NewFlagSet("serve", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	var c serveConfig
	s, err := bindServe(fs, e.getenv, &c)
	if err != nil {
		return err
	}
	if done, err := parseFlags(fs, args); done {
		return err
	}
	log, err := newLogger(e, c.logLevel)
	if err != nil {
		return err
	}
	log.Info("ventderive serve starting", append(readBuildInfo().attrs(), s.resolved()...)...)
	if c.databaseURL == "" {
		return errors.New("no database: set DATABASE_URL or --database-url")
	}
	if c.patientHashKey == "" {
		return errors.New("no patient hash key: set VENTDERIVE_PATIENT_HASH_KEY (a long random secret)")
	}
	return serve(ctx, c, log, nil)
}

// anatomicModel reads the --anatomic-dead-space setting; "" is the default.
func anatomicModel(name string) (physio.AnatomicModel, error) {
	if name == "" {
		return fhirmap.DefaultAnatomicDeadSpace, nil
	}
	m, ok := physio.ParseAnatomicModel(name)
	if !ok {
		return 0, fmt.Errorf("anatomic dead space %q: not artificial-airway or whole-airway", name)
	}
	return m, nil
}

// newLogger builds the JSON logger every command that logs uses.
func newLogger(e env, level string) (*slog.Logger, error) {
	var l slog.Level
	if err := l.UnmarshalText([]byte(level)); err != nil {
		return nil, fmt.Errorf("log level: %w", err)
	}
	return slog.New(slog.NewJSONHandler(e.stderr, &slog.HandlerOptions{Level: l})), nil
}

// serve runs the service until ctx ends. ready, when not nil, receives the
// pipeline once it consumes (the demo waits for it).
func serve(ctx context.Context, c serveConfig, log *slog.Logger, ready chan<- *consumer.Pipeline) error {
	site := fhirmap.DefaultSite()
	site.Window = c.pipeline.Window
	site.TemperatureWindow = c.pipeline.TemperatureWindow
	model, err := anatomicModel(c.anatomicDeadSpace)
	if err != nil {
		return err
	}
	site.AnatomicDeadSpace = model
	site.CodeSystemURL = c.codeSystemURL
	if c.apparatusDeadSpaceML >= 0 {
		site.ApparatusDeadSpaceML = c.apparatusDeadSpaceML
		site.ApparatusDeadSpaceConfigured = true
	}
	site.TargetPaCO2mmHg = c.targetPaCO2mmHg
	if err := site.Validate(); err != nil {
		return fmt.Errorf("site settings: %w", err)
	}
	codes, aliasDigest, err := loadCodes(c.codeAliases)
	if err != nil {
		return err
	}

	// Start order: database, NATS, pipeline, HTTP. Stop in reverse.
	pcfg, err := pgxpool.ParseConfig(c.databaseURL)
	if err != nil {
		return fmt.Errorf("database: %w", err)
	}
	// Each connection plans the ingest statements when it opens, not on
	// the path of the first message that uses it (postgres.WarmPool).
	postgres.WarmPool(pcfg)
	pool, err := pgxpool.NewWithConfig(ctx, pcfg)
	if err != nil {
		return fmt.Errorf("database: %w", err)
	}
	defer pool.Close()
	if err := waitDatabase(ctx, pool, log); err != nil {
		return err
	}
	if _, err := checkSessionLimits(ctx, pool, log); err != nil {
		return fmt.Errorf("database: %w", err)
	}
	if c.migrate {
		v, err := migrations.Apply(ctx, pool, log)
		if err != nil {
			return fmt.Errorf("migrate: %w", err)
		}
		log.Info("database migrated", "version", v)
		// The pool's connections opened, and tried their warm-up
		// (postgres.WarmPool), before the migrations: open them again on
		// the migrated schema.
		if err := postgres.Rewarm(ctx, pool); err != nil {
			return fmt.Errorf("database: %w", err)
		}
	}
	if err := postgres.EnsurePartitions(ctx, pool, time.Now()); err != nil {
		return fmt.Errorf("database: %w", err)
	}
	store := postgres.New(pool, postgres.Options{PatientKey: []byte(c.patientHashKey), Logger: log})

	reg := prometheus.NewRegistry()
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	metrics := consumer.NewMetrics(reg)
	// shared_buffers against the random-order indexes: now, while NATS
	// may still be out of reach, and then every bufferCheckInterval;
	// warnings only, never a reason to stop or to be unready.
	bctx, stopBuffers := context.WithCancel(ctx)
	buffersDone := make(chan struct{})
	go func() {
		defer close(buffersDone)
		watchBuffers(bctx, pool, log, metrics, bufferCheckInterval, randomIndexShare)
	}()
	defer func() { stopBuffers(); <-buffersDone }()

	nc, err := connectNATS(ctx, c, log)
	if err != nil {
		return err
	}
	defer nc.Close()

	p, err := consumer.New(nc, store, consumer.Options{
		Config: c.pipeline, Site: site, Codes: codes, AliasDigest: aliasDigest, Logger: log,
		Metrics: metrics, Workers: c.workers,
	})
	if err != nil {
		return err
	}

	var srv *http.Server
	if c.httpAddr != "" {
		ln, err := net.Listen("tcp", c.httpAddr)
		if err != nil {
			return fmt.Errorf("http listen: %w", err)
		}
		srv = &http.Server{Handler: p.Handler(reg), ReadHeaderTimeout: 5 * time.Second}
		go func() {
			if err := srv.Serve(ln); err != nil && !errors.Is(err, http.ErrServerClosed) {
				log.Error("http server", "err", err)
			}
		}()
		log.Info("http listening", "addr", ln.Addr().String())
	}

	runErr := make(chan error, 1)
	go func() { runErr <- p.Run(ctx) }()
	if ready != nil {
		ready <- p
	}
	err = <-runErr
	log.Info("pipeline stopped; draining NATS")
	if srv != nil {
		sctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
		_ = srv.Shutdown(sctx)
		cancel()
	}
	if derr := nc.Drain(); derr != nil {
		log.Warn("nats drain", "err", derr)
	}
	return err
}

// connectNATS connects with reconnection forever once connected: a replica
// must outlive any NATS outage on its own. The first connection is retried
// here, with a log line naming the servers (passwords masked), while the
// servers are unreachable; a refusal of the credentials is fatal.
func connectNATS(ctx context.Context, c serveConfig, log *slog.Logger) (*nats.Conn, error) {
	opts := []nats.Option{
		nats.Name("ventderive"),
		nats.MaxReconnects(-1),
		nats.ReconnectWait(time.Second),
		nats.DisconnectErrHandler(func(_ *nats.Conn, err error) {
			log.Warn("nats disconnected", "err", err)
		}),
		nats.ReconnectHandler(func(nc *nats.Conn) { log.Info("nats reconnected", "url", nc.ConnectedUrlRedacted()) }),
		// Asynchronous errors (a permissions violation, a slow consumer)
		// go to the service's log; the client's default handler would
		// print a plain line on stderr.
		nats.ErrorHandler(func(_ *nats.Conn, _ *nats.Subscription, err error) {
			log.Warn("nats async error", "err", err)
		}),
	}
	auth, err := natsAuth(c.natsCreds, c.tlsCA, c.tlsCert, c.tlsKey)
	if err != nil {
		return nil, err
	}
	opts = append(opts, auth...)
	servers := maskURL(c.natsURL)
	for attempt := 1; ; attempt++ {
		nc, err := nats.Connect(c.natsURL, opts...)
		if err == nil {
			if err := consumer.CheckServerVersion(nc.ConnectedServerVersion()); err != nil {
				nc.Close()
				return nil, fmt.Errorf("nats %s: %w", nc.ConnectedUrlRedacted(), err)
			}
			log.Info("nats connected", "url", nc.ConnectedUrlRedacted(), "server_version", nc.ConnectedServerVersion())
			return nc, nil
		}
		if natsAuthError(err) {
			return nil, fmt.Errorf("nats %s refused the credentials (%v): check the user in --nats-url / VENTDERIVE_NATS_URL, "+
				"the credentials file --nats-creds / VENTDERIVE_NATS_CREDS and the server's authorization", servers, err)
		}
		if ctx.Err() != nil {
			return nil, fmt.Errorf("nats connect: %w", ctx.Err())
		}
		delay := startDelay(attempt)
		log.Warn("nats unreachable; retrying", "servers", servers, "err", maskURLsIn(err.Error(), c.natsURL), "delay", delay)
		select {
		case <-ctx.Done():
		case <-time.After(delay):
		}
	}
}

// loadCodes returns the standard code table, extended with the site's
// alias file when path is not empty (serve --code-aliases, derive
// --aliases), and the hex SHA-256 of the file's bytes ("" without one),
// which the settings snapshot of every stored value records.
func loadCodes(path string) (*fhirmap.CodeTable, string, error) {
	codes := fhirmap.DefaultCodes()
	if path == "" {
		return codes, "", nil
	}
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, "", fmt.Errorf("code aliases: %w", err)
	}
	if codes, err = codes.WithAliases(bytes.NewReader(b)); err != nil {
		return nil, "", fmt.Errorf("code aliases %s: %w", path, err)
	}
	sum := sha256.Sum256(b)
	return codes, hex.EncodeToString(sum[:]), nil
}

// natsAuth turns the credentials and TLS settings shared by serve and
// simulate into connection options.
func natsAuth(creds, caFile, certFile, keyFile string) ([]nats.Option, error) {
	var opts []nats.Option
	if creds != "" {
		opts = append(opts, nats.UserCredentials(creds))
	}
	if (certFile == "") != (keyFile == "") {
		return nil, errors.New("nats tls: a client certificate needs its key, and a key its certificate")
	}
	if caFile == "" && certFile == "" {
		return opts, nil
	}
	tc := &tls.Config{MinVersion: tls.VersionTLS12}
	if caFile != "" {
		pem, err := os.ReadFile(caFile)
		if err != nil {
			return nil, fmt.Errorf("nats tls ca: %w", err)
		}
		tc.RootCAs = x509.NewCertPool()
		if !tc.RootCAs.AppendCertsFromPEM(pem) {
			return nil, errors.New("nats tls ca: no certificate found")
		}
	}
	if certFile != "" {
		cert, err := tls.LoadX509KeyPair(certFile, keyFile)
		if err != nil {
			return nil, fmt.Errorf("nats tls client certificate: %w", err)
		}
		tc.Certificates = []tls.Certificate{cert}
	}
	return append(opts, nats.Secure(tc)), nil
}
