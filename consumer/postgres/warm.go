package postgres

import (
	"context"
	"fmt"
	"strings"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"
)

// A connection's first execution of an ingest statement prepares it (pgx
// caches prepared statements per connection) and, under pointLookupsSQL's
// force_generic_plan, makes its generic plan: 10-24 ms for each snapshot
// statement on the bench's stores (EXPLAIN EXECUTE's planning time; the
// view fact is read nine times in each, fact_row has six partitions), paid
// by whichever message first uses the statement on that connection. In a
// paced run of a few seconds most blood gases met a statement that their
// connection had not planned yet, and paid it two or three times over.
//
// WarmConn makes those plans when a connection opens, before it serves a
// message: it executes every statement of the grouped ingest path, and the
// snapshot statements the single path shares, once with every parameter
// NULL (which matches no row and inserts none) in a transaction started by
// pointLookupsSQL, the same settings as an ingest, and rolls it back. The
// prepared statements and their generic plans stay with the connection
// (pg_prepared_statements.generic_plans counts their use); a plan that
// PostgreSQL later invalidates (new statistics, a new partition) is made
// again by the next execution, as before.
//
// factsMissingSQL, the collision guard, runs only after an insert that
// skipped a fact (a resource sent again): with NULL arrays it counts no
// row.
//
// Left out are the statements that insert one row from scalar parameters
// (claimInboxSQL, insertDerivationSQL, insertRefusalSQL, insertSettingsSQL):
// NULLs violate their NOT NULL columns, and pgx drops a cached statement
// whose execution failed. They are planned by their first use, as before.
// So are the term and encounter lookups (loadTermsSQL, loadEncountersSQL,
// seedTermsSQL, seedEncountersSQL): they run on the pool outside any
// ingest transaction, under the default plan_cache_mode (custom plans for
// their first executions), and only when the Store's cache misses a value,
// so a generic plan made here would not be the one they use.
var warmStatements = []string{
	lockPatientsSQL, claimInboxesSQL, hotPatientsSQL, lockPatientSQL,
	insertFactsSQL, factsMissingSQL, otherPatientsSQL, countFactsSQL,
	affectedSQL, snapshotFactsSQL, snapshotHeadsSQL, snapshotHeadsPendingSQL,
	snapshotFactsKnownSQL, snapshotHeadsKnownSQL, snapshotHeadsPendingKnownSQL,
	insertDerivationsSQL, insertRefusalsSQL, writeHeadsSQL, insertOutboxRowsSQL, insertOutboxSQL,
}

// WarmConn prepares and plans the ingest statements on conn (see
// warmStatements). It changes no row.
func WarmConn(ctx context.Context, conn *pgx.Conn) error {
	tx, err := conn.Begin(ctx)
	if err != nil {
		return fmt.Errorf("warm connection: %w", err)
	}
	defer tx.Rollback(ctx) //nolint:errcheck // rolled back in any case; nothing was written
	b := &pgx.Batch{}
	b.Queue(pointLookupsSQL)
	for _, sql := range warmStatements {
		b.Queue(sql, make([]any, paramCount(sql))...)
	}
	if err := tx.SendBatch(ctx, b).Close(); err != nil {
		return fmt.Errorf("warm connection: %w", err)
	}
	return tx.Rollback(ctx)
}

// paramCount is the highest $n in sql.
func paramCount(sql string) int {
	n := 0
	for i := strings.IndexByte(sql, '$'); i >= 0; i = strings.IndexByte(sql, '$') {
		sql = sql[i+1:]
		v := 0
		j := 0
		for j < len(sql) && sql[j] >= '0' && sql[j] <= '9' {
			v = v*10 + int(sql[j]-'0')
			j++
		}
		n = max(n, v)
	}
	return n
}

// WarmPool makes a pool's connections ready for the Store before they
// serve a message: each new connection runs WarmConn (after any
// AfterConnect already set), and MinConns is raised to MaxConns, so that
// the pool opens all of its connections in the background when it is
// created and again when one is renewed (MaxConnLifetime), off the path of
// any message. A connection whose warm-up fails on a statement is kept
// (its statements are planned by their first use, as without warm-up); one
// that broke is refused, and the pool opens another.
func WarmPool(cfg *pgxpool.Config) {
	prev := cfg.AfterConnect
	cfg.AfterConnect = func(ctx context.Context, conn *pgx.Conn) error {
		if prev != nil {
			if err := prev(ctx, conn); err != nil {
				return err
			}
		}
		if err := WarmConn(ctx, conn); err != nil && conn.IsClosed() {
			return err
		}
		return nil
	}
	cfg.MinConns = max(cfg.MinConns, cfg.MaxConns)
}

// Rewarm closes a WarmPool pool's connections and opens them again, each
// with its warm-up, before it returns: for a pool whose connections
// opened, and tried their warm-up, before the schema existed (serve
// --migrate on a new database). Without it they would plan the ingest
// statements on the first messages, until the pool renews them.
func Rewarm(ctx context.Context, pool *pgxpool.Pool) error {
	pool.Reset()
	n := int(pool.Config().MaxConns)
	conns := make([]*pgxpool.Conn, 0, n)
	defer func() {
		for _, c := range conns {
			c.Release()
		}
	}()
	for range n {
		c, err := pool.Acquire(ctx)
		if err != nil {
			return fmt.Errorf("rewarm pool: %w", err)
		}
		conns = append(conns, c)
	}
	return nil
}
