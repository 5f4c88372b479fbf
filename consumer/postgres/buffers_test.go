package postgres_test

import (
	"context"
	"os"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/migrations"
)

// everyInputTables are the tables with unique indexes that every input (or
// every derived version) inserts into: the message, its facts, the
// outputs. (derivation, head and refusal are keyed by patient and blood
// gas: their inserts gather on each patient's pages, not at random.)
var everyInputTables = []string{"inbox", "fact_row", "outbox"}

// timeOrderedUnique are the unique indexes of everyInputTables whose keys
// grow with time (identity columns): their inserts land on the rightmost
// leaf page, which stays in shared_buffers whatever the index's size.
var timeOrderedUnique = []string{"inbox_id_key", "outbox_pkey"}

// TestRandomIndexesInStepWithMigrations: on a migrated database every
// index of postgres.RandomIndexes exists under its name, is unique, is on
// its table (partitioned when the list says so) with its key columns; and
// every unique index of those tables is either in the list or a known
// time-ordered one (everyInputTables), so that a migration that renames
// one, or adds another unique index to them, fails here until the lists say
// what it is.
func TestRandomIndexesInStepWithMigrations(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	pool, err := pgxpool.New(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	for _, ix := range postgres.RandomIndexes {
		var table, def string
		var unique bool
		var kind string
		err := pool.QueryRow(ctx, `SELECT t.relname, i.indisunique, c.relkind::text, pg_get_indexdef(c.oid)
			FROM pg_class c JOIN pg_index i ON i.indexrelid = c.oid JOIN pg_class t ON t.oid = i.indrelid
			WHERE c.oid = to_regclass($1)`, ix.Name).Scan(&table, &unique, &kind, &def)
		if err != nil {
			t.Errorf("index %s (RandomIndexes): %v; a migration renamed or dropped it? keep postgres.RandomIndexes in step", ix.Name, err)
			continue
		}
		wantKind := "i"
		if ix.Partitioned {
			wantKind = "I"
		}
		if table != ix.Table || !unique || kind != wantKind {
			t.Errorf("index %s: on %s, unique %v, relkind %s; want on %s, unique, relkind %s", ix.Name, table, unique, kind, ix.Table, wantKind)
		}
		if !strings.HasSuffix(def, "USING btree ("+ix.Key+")") {
			t.Errorf("index %s is %q; want key (%s)", ix.Name, def, ix.Key)
		}
		if !slices.Contains(everyInputTables, ix.Table) {
			t.Errorf("index %s is on %s, not one of %v", ix.Name, ix.Table, everyInputTables)
		}
	}
	rows, err := pool.Query(ctx, `SELECT c.relname FROM pg_index i JOIN pg_class c ON c.oid = i.indexrelid
		WHERE i.indisunique AND i.indrelid IN (SELECT to_regclass(n) FROM unnest($1::text[]) n) ORDER BY 1`, everyInputTables)
	if err != nil {
		t.Fatal(err)
	}
	for rows.Next() {
		var name string
		if err := rows.Scan(&name); err != nil {
			t.Fatal(err)
		}
		known := slices.Contains(timeOrderedUnique, name) ||
			slices.ContainsFunc(postgres.RandomIndexes, func(r postgres.RandomIndex) bool { return r.Name == name })
		if !known {
			t.Errorf("unique index %s is in neither postgres.RandomIndexes nor timeOrderedUnique: say which it is", name)
		}
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
}

// TestReadBuffersFindsLiveIndexes: on a migrated database with the monthly
// partitions postgres.EnsurePartitions makes (last month to three months
// ahead), the check measures exactly inbox_pkey, outbox_msg_id_key and the
// fact hash index of the current month's partition, the next month's and
// the default partition, each at its pg_relation_size; in a month with no
// partition (rows go to the default partition), the default alone.
func TestReadBuffersFindsLiveIndexes(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	pool, err := pgxpool.New(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	now := time.Date(2026, 12, 31, 23, 30, 0, 0, time.UTC) // invented; the last half hour of a month
	if err := postgres.EnsurePartitions(ctx, pool, now); err != nil {
		t.Fatal(err)
	}
	var parts []string
	rows, _ := pool.Query(ctx, `SELECT inhrelid::regclass::text FROM pg_inherits WHERE inhparent = 'fact_row'::regclass ORDER BY 1`)
	for rows.Next() {
		var p string
		_ = rows.Scan(&p)
		parts = append(parts, p)
	}
	if err := rows.Err(); err != nil {
		t.Fatal(err)
	}
	// The control: the partitions exist, so choosing among them is tested.
	if want := []string{"fact_row_2026_11", "fact_row_2026_12", "fact_row_2027_01", "fact_row_2027_02", "fact_row_2027_03", "fact_row_default"}; !slices.Equal(parts, want) {
		t.Fatalf("partitions %v, want %v", parts, want)
	}
	// A session in another time zone and date style: the bounds it reads
	// back are still UTC months.
	if _, err := pool.Exec(ctx, `ALTER DATABASE `+currentDB(t, ctx, pool)+` SET TimeZone = 'Pacific/Kiritimati'`); err != nil {
		t.Fatal(err)
	}
	if _, err := pool.Exec(ctx, `ALTER DATABASE `+currentDB(t, ctx, pool)+` SET DateStyle = 'SQL, DMY'`); err != nil {
		t.Fatal(err)
	}
	pool.Reset()

	check := func(now time.Time, wantParts []string) {
		t.Helper()
		r, err := postgres.ReadBuffers(ctx, pool, now)
		if err != nil {
			t.Fatal(err)
		}
		var got, wantRel []string
		for _, ix := range r.Indexes {
			got = append(got, ix.Index+" "+ix.Table)
			var size int64
			if err := pool.QueryRow(ctx, `SELECT pg_relation_size(to_regclass($1))`, ix.Relation).Scan(&size); err != nil || size != ix.Bytes || size <= 0 {
				t.Errorf("%s: %d bytes, pg_relation_size %d, %v", ix.Relation, ix.Bytes, size, err)
			}
		}
		wantRel = append(wantRel, "inbox_pkey inbox", "outbox_msg_id_key outbox")
		for _, p := range wantParts {
			wantRel = append(wantRel, "fact_row_key_hash_digest_effective "+p)
		}
		slices.Sort(got)
		slices.Sort(wantRel)
		if !slices.Equal(got, wantRel) {
			t.Errorf("at %s: measured %v, want %v", now, got, wantRel)
		}
		live, err := postgres.LivePartitions(ctx, pool, now)
		if err != nil {
			t.Fatal(err)
		}
		if !slices.Equal(live, wantParts) {
			t.Errorf("at %s: live partitions %v, want %v", now, live, wantParts)
		}
	}
	check(now, []string{"fact_row_2026_12", "fact_row_2027_01", "fact_row_default"})
	check(time.Date(2027, 1, 1, 0, 0, 0, 0, time.UTC), []string{"fact_row_2027_01", "fact_row_2027_02", "fact_row_default"})
	check(time.Date(2027, 3, 15, 0, 0, 0, 0, time.UTC), []string{"fact_row_2027_03", "fact_row_default"})
	check(time.Date(2030, 6, 1, 0, 0, 0, 0, time.UTC), []string{"fact_row_default"})
	check(time.Date(2026, 6, 1, 0, 0, 0, 0, time.UTC), []string{"fact_row_2026_11", "fact_row_default"})
}

func currentDB(t *testing.T, ctx context.Context, pool *pgxpool.Pool) string {
	t.Helper()
	var name string
	if err := pool.QueryRow(ctx, `SELECT current_database()`).Scan(&name); err != nil {
		t.Fatal(err)
	}
	return name
}

// TestReadBuffersSharedBuffers: shared_buffers in bytes is what PostgreSQL
// itself computes, pg_size_bytes(current_setting('shared_buffers')) (the
// setting is kept in 8 kB blocks: 128 MB is 16384).
func TestReadBuffersSharedBuffers(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	pool, err := pgxpool.New(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	r, err := postgres.ReadBuffers(ctx, pool, time.Now())
	if err != nil {
		t.Fatal(err)
	}
	var want int64
	var setting string
	if err := pool.QueryRow(ctx, `SELECT pg_size_bytes(current_setting('shared_buffers')), current_setting('shared_buffers')`).Scan(&want, &setting); err != nil {
		t.Fatal(err)
	}
	if r.SharedBuffers != want || want <= 0 {
		t.Errorf("shared_buffers %d bytes, PostgreSQL says %d (%s)", r.SharedBuffers, want, setting)
	}
}

func TestUnitBytes(t *testing.T) {
	// The units pg_settings shows for memory settings (PostgreSQL
	// documentation, "pg_settings": unit is the implicit unit of the
	// parameter; shared_buffers is "8kB", blocks of BLCKSZ).
	for unit, want := range map[string]int64{"8kB": 8192, "16kB": 16384, "kB": 1024, "B": 1, "MB": 1 << 20, "GB": 1 << 30} {
		if got, err := postgres.UnitBytes(unit); err != nil || got != want {
			t.Errorf("UnitBytes(%q) = %d, %v; want %d", unit, got, err, want)
		}
	}
	for _, unit := range []string{"", "ms", "s", "0kB", "8 kB"} {
		if got, err := postgres.UnitBytes(unit); err == nil {
			t.Errorf("UnitBytes(%q) = %d, want an error", unit, got)
		}
	}
}

// TestReadBuffersAsWriter: the service's writer role (deploy/postgres/roles.sql,
// grants of migrations/0018) runs the check and sees what the owner sees.
func TestReadBuffersAsWriter(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	rolesSQL, err := os.ReadFile("../../deploy/postgres/roles.sql")
	if err != nil {
		t.Fatal(err)
	}
	u := pgtest.NewEmptyDatabase(t)
	pgtest.ApplyRoles(t, u, string(rolesSQL))
	owner := poolAs(t, ctx, u, "ventderive_owner")
	if _, err := migrations.Apply(ctx, owner, nil); err != nil {
		t.Fatal(err)
	}
	now := time.Now()
	writer := poolAs(t, ctx, u, "ventderive_writer")
	if err := postgres.EnsurePartitions(ctx, writer, now); err != nil {
		t.Fatal(err)
	}
	asOwner, err := postgres.ReadBuffers(ctx, owner, now)
	if err != nil {
		t.Fatal(err)
	}
	asWriter, err := postgres.ReadBuffers(ctx, writer, now)
	if err != nil {
		t.Fatalf("check as the writer: %v", err)
	}
	if len(asWriter.Indexes) != len(postgres.RandomIndexes)+2 || !slices.Equal(asWriter.Indexes, asOwner.Indexes) ||
		asWriter.SharedBuffers != asOwner.SharedBuffers {
		t.Errorf("as the writer %+v, as the owner %+v", asWriter, asOwner)
	}
	var who string
	if err := writer.QueryRow(ctx, `SELECT current_user`).Scan(&who); err != nil || who != "ventderive_writer" {
		t.Fatalf("writer pool runs as %q, %v", who, err)
	}
}
