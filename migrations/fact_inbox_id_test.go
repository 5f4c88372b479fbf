package migrations_test

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/migrations"
)

// applyBefore applies the migration files numbered below stop as plain
// SQL, recording each in schema_version as the runner does.
func applyBefore(t *testing.T, ctx context.Context, conn *pgx.Conn, stop string) {
	t.Helper()
	names, err := filepath.Glob("[0-9][0-9][0-9][0-9]_*.sql")
	if err != nil {
		t.Fatal(err)
	}
	slices.Sort(names)
	if _, err := conn.Exec(ctx, `CREATE TABLE schema_version (
    version integer PRIMARY KEY CHECK (version > 0), name text NOT NULL,
    sha256 text NOT NULL CHECK (sha256 ~ '^[0-9a-f]{64}$'), applied_at timestamptz NOT NULL DEFAULT now())`); err != nil {
		t.Fatal(err)
	}
	for _, name := range names {
		if name >= stop {
			break
		}
		b, err := os.ReadFile(name)
		if err != nil {
			t.Fatal(err)
		}
		if _, err := conn.Exec(ctx, string(b)); err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		sum := sha256.Sum256(b)
		if _, err := conn.Exec(ctx, `INSERT INTO schema_version (version, name, sha256) VALUES ($1, $2, $3)`,
			atoi(t, name[:4]), name, hex.EncodeToString(sum[:])); err != nil {
			t.Fatal(err)
		}
	}
}

// TestFactInboxIDMigratesStoredRows builds a store at version 15, stores
// facts in 0014's layout (a fact whose recording time is its inbox row's,
// one recorded at another time, one whose message has no inbox row, a
// source value equal to the value, one that is -0 beside a value of 0, one
// that differs, facts in a monthly partition and in the default one), then
// migrates to the latest version. Every column of the view fact reads back
// as before, byte for byte (floats compared by float8send), the view keeps
// its column names and types, fact_row has 0016's layout with each value
// stored the narrow way, the partitions and review_* views are there as
// before, a new fact continues the ids and a repeated version is still
// refused by the unique key.
func TestFactInboxIDMigratesStoredRows(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	conn, err := pgx.Connect(ctx, pgtest.NewEmptyDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	applyBefore(t, ctx, conn, "0016")

	const keyA = "aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa"
	const keyB = "bbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbb"
	const keyC = "cccccccccccccccccccccccccccccccccccccccccccccccccccccccccccccccc" // no inbox row
	seed := []string{
		`INSERT INTO inbox VALUES ('` + keyA + `', 'fhir.input.lab', 1, '2026-03-01 12:00:00Z', '2026-03-01 12:00:01Z', 1, 3)`,
		`INSERT INTO inbox VALUES ('` + keyB + `', 'fhir.input.vent', 2, '2026-03-01 12:01:00Z', '2026-03-01 12:01:01Z', 1, 2)`,
		`SELECT ventderive_fact_partitions('2026-03-01Z', '2026-04-01Z')`,
		`INSERT INTO fact_encounter (encounter) VALUES (''), ('Encounter/e1')`,
		`INSERT INTO fact_term (quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit,
		    code_system, code, code_display, status) VALUES
		  ('pco2', 'measured', '', 'arterial', false, 'mm[Hg]', '', 'kPa', 'http://loinc.org', '2019-8', 'PaCO2', 'final'),
		  ('tidal-volume', 'measured', '', '', false, 'mL', '', 'mL', 'http://loinc.org', '76222-9', '', 'final'),
		  ('sex', '', '', '', false, '', 'female', '', '', '', '', 'final')`,
	}
	// One row per case, in 0014's columns: key, digest byte, resource_ref,
	// version, last_updated, patient, encounter, term quantity, value,
	// source value, effective, issued, inbox key, recorded_at.
	const row = `INSERT INTO fact_row (key, digest, resource_ref, version_id, last_updated, patient_ref, encounter_id,
	    term_id, quantity, value, source_value, effective, issued, inbox_key, recorded_at)
	  SELECT $1, decode(repeat($2, 64), 'hex'), $3, $4, $5, $6, (SELECT id FROM fact_encounter WHERE encounter = $7),
	    (SELECT id FROM fact_term WHERE quantity = $8), $8, $9, $10, $11, $12, decode($13, 'hex'), $14`
	type fr struct {
		key, dig      string
		res           any
		ver           string
		lastUpd       any
		pat, enc, qty string
		val, src      float64
		eff           string
		issued        any
		inbox         string
		rec           string
	}
	negZero := func() float64 { z := 0.0; return -z }()
	rows := []fr{
		// pco2 of message A, recorded with it, source in kPa.
		{"Observation/gas#pco2", "1", nil, "2", "2026-03-01T11:59:00Z", "Patient/p1", "Encounter/e1", "pco2", 44.25, 5.9,
			"2026-03-01T11:50:00Z", "2026-03-01T11:55:00Z", keyA, "2026-03-01T12:00:01Z"},
		// a tidal volume of message A recorded at another time than its inbox row.
		{"Observation/vt1", "2", nil, "", nil, "Patient/p1", "", "tidal-volume", 450, 450,
			"2026-03-01T11:40:00Z", nil, keyA, "2026-03-01T12:30:00Z"},
		// a value of 0 with a source value of -0, message B.
		{"Observation/vt2", "3", nil, "", nil, "Patient/p1", "", "tidal-volume", 0, negZero,
			"2026-03-01T11:41:00Z", nil, keyB, "2026-03-01T12:01:01Z"},
		// a patient attribute (default partition) with its own resource reference, message A.
		{"Patient/p1#sex", "4", "Patient/p1-other", "1", nil, "Patient/p1", "", "sex", 0, 0,
			"0001-01-01T00:00:00Z", nil, keyA, "2026-03-01T12:00:01Z"},
		// a fact whose message has no inbox row.
		{"Observation/vt3", "5", nil, "", nil, "Patient/p2", "", "tidal-volume", 500, 500,
			"2026-03-01T11:42:00Z", nil, keyC, "2026-03-01T12:02:00Z"},
	}
	for _, q := range seed {
		if _, err := conn.Exec(ctx, q); err != nil {
			t.Fatalf("%s: %v", q, err)
		}
	}
	for _, r := range rows {
		if _, err := conn.Exec(ctx, row, r.key, r.dig, r.res, r.ver, r.lastUpd, r.pat, r.enc, r.qty, r.val, r.src,
			r.eff, r.issued, r.inbox, r.rec); err != nil {
			t.Fatalf("%s: %v", r.key, err)
		}
	}

	// Every column as text, floats by their bytes.
	const viewSQL = `SELECT string_agg(concat_ws(' ', id, key, digest, resource_ref, version_id, last_updated, patient_ref,
	    encounter, quantity, origin, detail, specimen, temp_corrected, encode(float8send(value), 'hex'), unit, text,
	    encode(float8send(source_value), 'hex'), source_unit, code_system, code, code_display, status, effective, issued,
	    inbox_key, recorded_at), E'\n' ORDER BY id) FROM fact`
	const columnsSQL = `SELECT string_agg(column_name || ' ' || data_type, ', ' ORDER BY ordinal_position)
	    FROM information_schema.columns WHERE table_schema = current_schema() AND table_name = $1`
	const partsSQL = `SELECT string_agg(c.relname, ' ' ORDER BY c.relname) FROM pg_inherits h JOIN pg_class c ON c.oid = h.inhrelid
	    WHERE h.inhparent = 'fact_row'::regclass`
	const viewsSQL = `SELECT string_agg(viewname, ' ' ORDER BY viewname) FROM pg_views WHERE schemaname = current_schema()`
	var viewBefore, colsBefore, partsBefore, viewsBefore string
	var reviewBefore string
	if err := conn.QueryRow(ctx, viewSQL).Scan(&viewBefore); err != nil {
		t.Fatal(err)
	}
	if err := conn.QueryRow(ctx, columnsSQL, "fact").Scan(&colsBefore); err != nil {
		t.Fatal(err)
	}
	if err := conn.QueryRow(ctx, partsSQL).Scan(&partsBefore); err != nil {
		t.Fatal(err)
	}
	if err := conn.QueryRow(ctx, viewsSQL).Scan(&viewsBefore); err != nil {
		t.Fatal(err)
	}
	if err := conn.QueryRow(ctx, `SELECT count(*)::text FROM review_fact`).Scan(&reviewBefore); err != nil {
		t.Fatal(err)
	}

	v, err := migrations.ApplyConn(ctx, conn, nil)
	if err != nil {
		t.Fatal(err)
	}
	if v != migrations.Latest() || v < 16 {
		t.Fatalf("migrated to %d, want Latest %d (>= 16)", v, migrations.Latest())
	}

	var viewAfter, colsAfter, partsAfter, viewsAfter string
	if err := conn.QueryRow(ctx, viewSQL).Scan(&viewAfter); err != nil {
		t.Fatal(err)
	}
	if viewAfter != viewBefore {
		t.Errorf("the view fact reads differently after 0016:\n before\n%s\n after\n%s", viewBefore, viewAfter)
	}
	if err := conn.QueryRow(ctx, columnsSQL, "fact").Scan(&colsAfter); err != nil {
		t.Fatal(err)
	}
	if colsAfter != colsBefore {
		t.Errorf("the view fact's columns changed:\n before %s\n after  %s", colsBefore, colsAfter)
	}
	if err := conn.QueryRow(ctx, partsSQL).Scan(&partsAfter); err != nil {
		t.Fatal(err)
	}
	if partsAfter != partsBefore || partsAfter == "" {
		t.Errorf("partitions of fact_row: before %q, after %q", partsBefore, partsAfter)
	}
	if err := conn.QueryRow(ctx, viewsSQL).Scan(&viewsAfter); err != nil {
		t.Fatal(err)
	}
	// Every view is still there (a later migration may add one: 0018's
	// review_dictionary).
	for _, v := range strings.Fields(viewsBefore) {
		if !slices.Contains(strings.Fields(viewsAfter), v) {
			t.Errorf("view %s gone: before %q, after %q", v, viewsBefore, viewsAfter)
		}
	}

	// The layout of 0016: the 8-byte columns first, the inbox by id.
	var layout string
	if err := conn.QueryRow(ctx, columnsSQL, "fact_row").Scan(&layout); err != nil {
		t.Fatal(err)
	}
	const wantLayout = "id bigint, inbox_id bigint, effective timestamp with time zone, value double precision, " +
		"source_value double precision, last_updated timestamp with time zone, issued timestamp with time zone, " +
		"recorded_at timestamp with time zone, encounter_id integer, term_id integer, key text, digest bytea, " +
		"patient_ref text, quantity text, version_id text, resource_ref text, inbox_key bytea"
	if layout != wantLayout {
		t.Errorf("fact_row columns:\n got  %s\n want %s", layout, wantLayout)
	}
	// Per row: whether inbox_id, source_value, recorded_at and inbox_key
	// are stored, and the inbox_id is the inbox row of the key.
	const storedSQL = `SELECT string_agg(concat_ws(' ', r.key, r.inbox_id IS NOT NULL AND r.inbox_id = i.id,
	    r.source_value IS NOT NULL, r.recorded_at IS NOT NULL, r.inbox_key IS NOT NULL), '; ' ORDER BY r.id)
	    FROM fact_row r LEFT JOIN inbox i ON i.id = r.inbox_id`
	var stored string
	if err := conn.QueryRow(ctx, storedSQL).Scan(&stored); err != nil {
		t.Fatal(err)
	}
	const wantStored = "Observation/gas#pco2 t t f f; Observation/vt1 t f t f; " +
		"Observation/vt2 t t f f; Patient/p1#sex t f f f; Observation/vt3 f f t t"
	if stored != wantStored {
		t.Errorf("stored columns:\n got  %s\n want %s", stored, wantStored)
	}
	var ids string
	if err := conn.QueryRow(ctx, `SELECT string_agg(i.id::text || '=' || left(encode(i.inbox_key, 'hex'), 1), ' ' ORDER BY i.id) FROM inbox i`).Scan(&ids); err != nil {
		t.Fatal(err)
	}
	if ids != "1=a 2=b" {
		t.Errorf("inbox ids %q, want 1=a 2=b (in stored order)", ids)
	}

	// A new fact (as the writer stores it) continues the ids; the same
	// version again is refused by the unique key.
	const newSQL = `INSERT INTO fact_row (inbox_id, effective, value, encounter_id, term_id, key, digest, patient_ref,
	    quantity, version_id)
	  SELECT (SELECT id FROM inbox WHERE inbox_key = decode($1, 'hex')), '2026-03-01T11:43:00Z', 400, e.id, t.id, 'Observation/vt4',
	    decode(repeat('6', 64), 'hex'), 'Patient/p1', 'tidal-volume', ''
	  FROM fact_encounter e, fact_term t WHERE e.encounter = '' AND t.quantity = 'tidal-volume'
	  ON CONFLICT (hashtextextended(key, 0), digest, effective) DO NOTHING` // the unique index since 0017
	for i, want := range []int64{1, 0} {
		tag, err := conn.Exec(ctx, newSQL, keyB)
		if err != nil {
			t.Fatal(err)
		}
		if tag.RowsAffected() != want {
			t.Errorf("insert %d stored %d rows, want %d", i+1, tag.RowsAffected(), want)
		}
	}
	var newID int64
	var newInbox, newRec string
	if err := conn.QueryRow(ctx, `SELECT id, inbox_key, recorded_at::text FROM fact WHERE key = 'Observation/vt4'`).Scan(&newID, &newInbox, &newRec); err != nil {
		t.Fatal(err)
	}
	if newID != int64(len(rows))+1 || newInbox != keyB || newRec != "2026-03-01 12:01:01+00" {
		t.Errorf("new fact: id %d inbox %s recorded %s, want id %d, inbox B, its inbox row's time", newID, newInbox, newRec, len(rows)+1)
	}
	// A row must name its message one way, and say when it was recorded
	// when the inbox row cannot.
	for _, q := range []struct{ sql, constraint string }{
		{`UPDATE fact_row SET inbox_key = decode(repeat('a', 64), 'hex') WHERE key = 'Observation/vt1'`, "fact_row_inbox"},
		{`UPDATE fact_row SET inbox_id = NULL WHERE key = 'Observation/vt1'`, "fact_row_inbox"},
		{`UPDATE fact_row SET recorded_at = NULL WHERE key = 'Observation/vt3'`, "fact_row_recorded"},
	} {
		_, err := conn.Exec(ctx, q.sql)
		if err == nil || !containsConstraint(err, q.constraint) {
			t.Errorf("%s: error %v, want a violation of %s", q.sql, err, q.constraint)
		}
	}
	var reviewAfter string
	if err := conn.QueryRow(ctx, `SELECT count(*)::text FROM review_fact`).Scan(&reviewAfter); err != nil {
		t.Fatal(err)
	}
	if reviewAfter != "6" || reviewBefore != "5" {
		t.Errorf("review_fact rows: %s before, %s after (one new), want 5 and 6", reviewBefore, reviewAfter)
	}
}

// containsConstraint reports a CHECK violation (23514) of the named constraint.
func containsConstraint(err error, name string) bool {
	var pgErr *pgconn.PgError
	return errors.As(err, &pgErr) && pgErr.Code == "23514" && pgErr.ConstraintName == name
}
