package main

import (
	"context"
	"fmt"
	"log/slog"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
)

// sessionLimits are the writer role's session settings in
// deploy/postgres/roles.sql, which the service's behaviour relies on: a
// frozen replica's transaction ends after idle_in_transaction_session_timeout,
// a group commit meeting a locked patient gives up after lock_timeout, and
// no statement runs longer than statement_timeout.
var sessionLimits = []struct {
	name string
	max  time.Duration
}{
	{"statement_timeout", 30 * time.Second},
	{"idle_in_transaction_session_timeout", 15 * time.Second},
	{"lock_timeout", 2 * time.Second},
}

// checkSessionLimits reads the session settings the service's database
// role gives its sessions and warns, naming each, when one is off (0) or
// longer than roles.sql sets. PostgreSQL lets every role SET these in its
// session and give itself other defaults (ALTER ROLE ... SET), so they
// cannot be locked; a lifted one shows here at the next start. It returns
// the names it warned about.
func checkSessionLimits(ctx context.Context, pool *pgxpool.Pool, log *slog.Logger) ([]string, error) {
	var lifted []string
	for _, l := range sessionLimits {
		var ms int64 // these settings are kept in milliseconds
		if err := pool.QueryRow(ctx, `SELECT setting::bigint FROM pg_settings WHERE name = $1`, l.name).Scan(&ms); err != nil {
			return nil, fmt.Errorf("read %s: %w", l.name, err)
		}
		got := time.Duration(ms) * time.Millisecond
		if ms > 0 && got <= l.max {
			continue
		}
		lifted = append(lifted, l.name)
		value := got.String()
		if ms == 0 {
			value = "off"
		}
		log.Warn("database session limit lifted", "setting", l.name, "value", value, "want_at_most", l.max.String(),
			"fix", "run deploy/postgres/roles.sql as an administrator (it sets the role's defaults again); "+
				"look for ALTER ROLE ... SET or options in DATABASE_URL")
	}
	return lifted, nil
}
