package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"net/netip"
	"strings"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/review"
)

func init() {
	register(command{name: "review", summary: "serve the read-only reviewer console (web pages over the provenance store)", run: runReview})
}

const reviewUsage = `usage: ventderive review [flags]
Serves the reviewer console: patients, timelines with plots, every derived value's basis, quality views,
CSV and a printable report. Read-only: connect as the ventderive_reviewer role.
  --database-url URL     PostgreSQL URL (default $DATABASE_URL; normally the reviewer role)
  --listen ADDR          where to listen (default 127.0.0.1:8470; loopback needs no authentication)
  --tls-cert FILE --tls-key FILE   serve HTTPS
  --proxy-header NAME    trust this header (e.g. X-Forwarded-User) as the authenticated user ...
  --trusted-proxy CIDRS  ... when the request comes from one of these addresses (comma-separated)
  --user NAME            built-in credential (HTTP Basic) user, default "reviewer"; the password is read
                         from $VENTDERIVE_REVIEW_PASSWORD (never a flag: flags show in process lists)
Bound beyond loopback, the console refuses to start without a proxy header or a password.`

// reviewConfig is the resolved configuration of the console.
type reviewConfig struct {
	databaseURL    string
	listen         string
	tlsCert        string
	tlsKey         string
	proxyHeader    string
	trustedProxies []netip.Prefix
	user, password string
}

func runReview(ctx context.Context, args []string, e env) error {
	fs := flag.NewFlagSet("review", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	fs.Usage = func() { fmt.Fprintln(e.stderr, reviewUsage) }
	var c reviewConfig
	var proxies string
	fs.StringVar(&c.databaseURL, "database-url", e.getenv("DATABASE_URL"), "PostgreSQL URL (reviewer role)")
	fs.StringVar(&c.listen, "listen", "127.0.0.1:8470", "listen address")
	fs.StringVar(&c.tlsCert, "tls-cert", "", "TLS certificate file")
	fs.StringVar(&c.tlsKey, "tls-key", "", "TLS key file")
	fs.StringVar(&c.proxyHeader, "proxy-header", "", "header a trusted reverse proxy sets to the authenticated user")
	fs.StringVar(&proxies, "trusted-proxy", "", "comma-separated addresses or CIDRs of the trusted reverse proxies")
	fs.StringVar(&c.user, "user", "reviewer", "built-in credential user (password from $VENTDERIVE_REVIEW_PASSWORD)")
	if done, err := parseFlags(fs, args); done {
		return err
	}
	usageErr := func(msg string) error {
		fmt.Fprintf(e.stderr, "ventderive review: %s\n", msg)
		return errUsage
	}
	if fs.NArg() > 0 {
		return usageErr("unexpected arguments")
	}
	c.password = e.getenv("VENTDERIVE_REVIEW_PASSWORD")
	for _, p := range strings.Split(proxies, ",") {
		if p = strings.TrimSpace(p); p == "" {
			continue
		}
		pfx, err := netip.ParsePrefix(p)
		if err != nil {
			a, aerr := netip.ParseAddr(p)
			if aerr != nil {
				return usageErr(fmt.Sprintf("--trusted-proxy %q: want an address or CIDR", p))
			}
			pfx = netip.PrefixFrom(a, a.BitLen())
		}
		c.trustedProxies = append(c.trustedProxies, pfx)
	}
	if (c.tlsCert == "") != (c.tlsKey == "") {
		return usageErr("--tls-cert and --tls-key go together")
	}
	if c.proxyHeader != "" && len(c.trustedProxies) == 0 {
		return usageErr("--proxy-header needs --trusted-proxy: a header is believed only from the proxy that sets it")
	}
	if c.databaseURL == "" {
		return usageErr("no database: set --database-url or DATABASE_URL")
	}
	log := slog.New(slog.NewJSONHandler(e.stderr, nil))
	return serveReview(ctx, c, log, e, nil)
}

// serveReview listens, connects and serves until ctx ends. ready, when not
// nil, receives the console's URL once it accepts requests.
func serveReview(ctx context.Context, c reviewConfig, log *slog.Logger, e env, ready chan<- string) error {
	ln, err := net.Listen("tcp", c.listen)
	if err != nil {
		return fmt.Errorf("listen: %w", err)
	}
	defer ln.Close()
	loopback := isLoopback(ln.Addr())
	rc := review.Config{Loopback: loopback, ProxyHeader: c.proxyHeader, TrustedProxies: c.trustedProxies,
		User: c.user, Password: c.password, Log: log}
	// Refuse before connecting: a console beyond loopback without
	// authentication never serves a page.
	if !loopback && c.proxyHeader == "" && c.password == "" {
		return fmt.Errorf("review: %w", review.ErrNoAuth)
	}
	cfg, err := pgxpool.ParseConfig(c.databaseURL)
	if err != nil {
		return errors.New("--database-url: cannot parse")
	}
	cfg.ConnConfig.RuntimeParams["default_transaction_read_only"] = "on"
	cfg.ConnConfig.RuntimeParams["application_name"] = "ventderive review"
	cfg.MaxConns = 4
	pool, err := pgxpool.NewWithConfig(ctx, cfg)
	if err != nil {
		return fmt.Errorf("database: %w", err)
	}
	defer pool.Close()
	srv, err := review.New(review.NewStore(pool), rc)
	if err != nil {
		return fmt.Errorf("review: %w", err)
	}
	scheme := "http"
	if c.tlsCert != "" {
		scheme = "https"
	}
	url := fmt.Sprintf("%s://%s/", scheme, ln.Addr())
	auth := "none (loopback only)"
	switch {
	case c.proxyHeader != "" && c.password != "":
		auth = "trusted proxy header " + c.proxyHeader + " or built-in credential"
	case c.proxyHeader != "":
		auth = "trusted proxy header " + c.proxyHeader
	case c.password != "":
		auth = "built-in credential (user " + c.user + ", password ****)"
	}
	log.Info("reviewer console", "url", url, "tls", c.tlsCert != "", "auth", auth, "loopback", loopback,
		"database", maskURL(c.databaseURL))
	fmt.Fprintf(e.stdout, "ventderive review: serving %s (auth: %s). Advisory only: not a medical device.\n", url, auth)
	hs := &http.Server{Handler: srv, ReadHeaderTimeout: 5 * time.Second, ReadTimeout: 30 * time.Second,
		WriteTimeout: 60 * time.Second, ErrorLog: slog.NewLogLogger(log.Handler(), slog.LevelWarn)}
	errc := make(chan error, 1)
	go func() {
		if c.tlsCert != "" {
			errc <- hs.ServeTLS(ln, c.tlsCert, c.tlsKey)
		} else {
			errc <- hs.Serve(ln)
		}
	}()
	if ready != nil {
		ready <- url
	}
	select {
	case err := <-errc:
		return fmt.Errorf("serve: %w", err)
	case <-ctx.Done():
	}
	sctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	return hs.Shutdown(sctx)
}

func isLoopback(a net.Addr) bool {
	ta, ok := a.(*net.TCPAddr)
	return ok && ta.IP.IsLoopback()
}
