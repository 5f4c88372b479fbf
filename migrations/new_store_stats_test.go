package migrations_test

import (
	"testing"

	"github.com/jackc/pgx/v5"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
)

// TestNewStoreTablesLeftUnanalyzed checks that migrating a new, empty store
// leaves the tables 0019 rewrites without statistics, as every other
// table of a new store: statistics that say "empty" made the generic plans
// a connection makes at warm-up read fact and inbox by the wrong plans once
// the tables filled (ventderive bench on a new store, 2026-12-04:
// PostgreSQL CPU 605-719 us an input with 0019 analyzing its empty tables,
// 243-260 without). PostgreSQL marks a table never vacuumed or analyzed by
// pg_class.reltuples = -1 (PostgreSQL 14 and later; its documentation of
// pg_class: "If the table has never yet been vacuumed or analyzed,
// reltuples contains -1").
func TestNewStoreTablesLeftUnanalyzed(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	for _, table := range []string{"inbox", "inbox_subject", "derivation", "refusal", "outbox", "site_settings",
		"input_resource", "dead_letter"} {
		var reltuples float64
		if err := conn.QueryRow(ctx, `SELECT reltuples FROM pg_class WHERE oid = to_regclass($1)`, table).Scan(&reltuples); err != nil {
			t.Fatalf("%s: %v", table, err)
		}
		if reltuples != -1 {
			t.Errorf("%s: reltuples %v after migrating a new store, want -1 (never analyzed)", table, reltuples)
		}
	}
}
