package main

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"strings"
	"time"

	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgxpool"
	"github.com/nats-io/nats.go"
)

// waitDatabase waits until PostgreSQL answers, logging each failed attempt
// with the host and port (never the password). A server that answers but
// refuses the login (authentication, a missing database or CONNECT right)
// is fatal: retrying cannot mend a wrong setting.
func waitDatabase(ctx context.Context, pool *pgxpool.Pool, log *slog.Logger) error {
	cc := pool.Config().ConnConfig
	host := fmt.Sprintf("%s:%d", cc.Host, cc.Port)
	for attempt := 1; ; attempt++ {
		pctx, cancel := context.WithTimeout(ctx, 10*time.Second)
		err := pool.Ping(pctx)
		cancel()
		if err == nil {
			if attempt > 1 {
				log.Info("database reachable", "host", host, "database", cc.Database)
			}
			return nil
		}
		if code, ok := loginRefused(err); ok {
			return fmt.Errorf("database %q at %s refused user %q (SQLSTATE %s): check the user and password in "+
				"DATABASE_URL / --database-url, the role's LOGIN and CONNECT rights and pg_hba.conf", cc.Database, host, cc.User, code)
		}
		if ctx.Err() != nil {
			return fmt.Errorf("database %s: %w", host, ctx.Err())
		}
		delay := startDelay(attempt)
		log.Warn("database unreachable; retrying", "host", host, "database", cc.Database, "err", connectErrText(err), "delay", delay)
		select {
		case <-ctx.Done():
		case <-time.After(delay):
		}
	}
}

// loginRefused reports the SQLSTATE of a server's refusal of the login:
// class 28 (invalid authorisation, wrong password), 3D000 (no such
// database), 42501 (no CONNECT right).
func loginRefused(err error) (string, bool) {
	var pgErr *pgconn.PgError
	if !errors.As(err, &pgErr) {
		return "", false
	}
	return pgErr.Code, strings.HasPrefix(pgErr.Code, "28") || pgErr.Code == "3D000" || pgErr.Code == "42501"
}

// connectErrText is a connection error without the server's message (which
// may quote the user and database, never the password, but is long).
func connectErrText(err error) string {
	var ce *pgconn.ConnectError
	if errors.As(err, &ce) && ce.Unwrap() != nil {
		return ce.Unwrap().Error()
	}
	return err.Error()
}

// natsAuthError reports a server's refusal of the credentials.
func natsAuthError(err error) bool {
	if errors.Is(err, nats.ErrAuthorization) || errors.Is(err, nats.ErrAuthExpired) || errors.Is(err, nats.ErrAuthRevoked) {
		return true
	}
	msg := strings.ToLower(err.Error())
	return strings.Contains(msg, "authorization violation") || strings.Contains(msg, "authentication")
}

// startDelay is the wait before start attempt attempt+1: 1 s doubling to 30 s.
func startDelay(attempt int) time.Duration {
	return min(time.Second<<min(attempt-1, 5), 30*time.Second)
}

// maskURLsIn replaces each URL of list (as given) in s by its masked form.
func maskURLsIn(s, list string) string {
	for _, u := range strings.Split(list, ",") {
		if u = strings.TrimSpace(u); u != "" {
			s = strings.ReplaceAll(s, u, maskURL(u))
		}
	}
	return s
}
