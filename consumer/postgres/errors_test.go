package postgres_test

import (
	"errors"
	"testing"

	"github.com/jackc/pgx/v5/pgconn"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
)

// Only errors the input can cause become dead letters; the states of a
// failover, an overloaded or misconfigured server are retried (codes from
// the PostgreSQL manual, Appendix A "PostgreSQL Error Codes" [published]).
func TestTransientSQLStates(t *testing.T) {
	t.Parallel()
	for _, tc := range []struct {
		code      string
		name      string
		transient bool
	}{
		{"25006", "read_only_sql_transaction (failover, default_transaction_read_only)", true},
		{"57P01", "admin_shutdown", true},
		{"57P02", "crash_shutdown", true},
		{"57P03", "cannot_connect_now (starting up, recovery)", true},
		{"08006", "connection_failure", true},
		{"08003", "connection_does_not_exist", true},
		{"40001", "serialization_failure", true},
		{"40P01", "deadlock_detected", true},
		{"55P03", "lock_not_available", true},
		{"57014", "query_canceled (statement_timeout)", true},
		{"53300", "too_many_connections", true},
		{"53100", "disk_full", true},
		{"42501", "insufficient_privilege (a grant missing)", true},
		{"25P03", "idle_in_transaction_session_timeout", true},
		{"23505", "unique_violation", false},
		{"23514", "check_violation", false},
		{"22P02", "invalid_text_representation", false},
		{"22021", "character_not_in_repertoire", false},
		{"54000", "program_limit_exceeded", false},
	} {
		t.Run(tc.code+" "+tc.name, func(t *testing.T) {
			err := postgres.TranslateForTest("op", &pgconn.PgError{Code: tc.code})
			if got := errors.Is(err, consumer.ErrTransient); got != tc.transient {
				t.Errorf("%s: transient = %v, want %v", tc.code, got, tc.transient)
			}
		})
	}
}
