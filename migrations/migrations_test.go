package migrations_test

import (
	"context"
	"errors"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/migrations"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

func ctxFor(t *testing.T) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	t.Cleanup(cancel)
	return ctx
}

// schemaState is what a migration run leaves: tables, views, constraints,
// versions. Applying twice must leave it unchanged.
const schemaStateSQL = `
SELECT string_agg(x, E'\n' ORDER BY x) FROM (
  SELECT 'rel ' || c.relname || ' ' || c.relkind::text FROM pg_class c
  JOIN pg_namespace n ON n.oid = c.relnamespace WHERE n.nspname = 'public'
  UNION ALL
  SELECT 'con ' || conname || ' ' || pg_get_constraintdef(oid) FROM pg_constraint
  WHERE connamespace = 'public'::regnamespace
  UNION ALL
  SELECT 'ver ' || version || ' ' || name || ' ' || sha256 || ' ' || applied_at FROM schema_version
) s(x)`

func TestApplyFromEmpty(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	pool, err := pgxpool.New(ctx, pgtest.NewEmptyDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()

	v, err := migrations.Apply(ctx, pool, nil)
	if err != nil {
		t.Fatalf("Apply: %v", err)
	}
	if v != migrations.Latest() || v < 1 {
		t.Fatalf("Apply = version %d, want Latest %d (>= 1)", v, migrations.Latest())
	}
	var first string
	if err := pool.QueryRow(ctx, schemaStateSQL).Scan(&first); err != nil {
		t.Fatal(err)
	}
	for _, table := range []string{"inbox", "input_resource", "fact", "derivation", "derivation_input",
		"refusal", "refusal_input", "head", "outbox", "dead_letter", "review_derivation"} {
		var ok bool
		if err := pool.QueryRow(ctx, `SELECT to_regclass($1) IS NOT NULL`, table).Scan(&ok); err != nil || !ok {
			t.Errorf("relation %s missing after migration (err %v)", table, err)
		}
	}

	v2, err := migrations.Apply(ctx, pool, nil)
	if err != nil || v2 != v {
		t.Fatalf("second Apply = %d, %v; want %d, nil", v2, err, v)
	}
	var second string
	if err := pool.QueryRow(ctx, schemaStateSQL).Scan(&second); err != nil {
		t.Fatal(err)
	}
	if first != second {
		t.Errorf("applying twice changed the schema:\nfirst:\n%s\nsecond:\n%s", first, second)
	}
}

func TestApplyConcurrent(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	u := pgtest.NewEmptyDatabase(t)
	const replicas = 4
	var wg sync.WaitGroup
	versions := make([]int, replicas)
	errs := make([]error, replicas)
	for i := range replicas {
		wg.Go(func() {
			conn, err := pgx.Connect(ctx, u)
			if err != nil {
				errs[i] = err
				return
			}
			defer conn.Close(ctx)
			versions[i], errs[i] = migrations.ApplyConn(ctx, conn, nil)
		})
	}
	wg.Wait()
	for i := range replicas {
		if errs[i] != nil || versions[i] != migrations.Latest() {
			t.Errorf("replica %d: version %d, err %v; want %d, nil", i, versions[i], errs[i], migrations.Latest())
		}
	}
	conn, err := pgx.Connect(ctx, u)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	var rows int
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM schema_version`).Scan(&rows); err != nil {
		t.Fatal(err)
	}
	// Versions may have gaps (branches number their files apart), so the
	// rows are counted against the files.
	files, err := filepath.Glob("*.sql")
	if err != nil {
		t.Fatal(err)
	}
	if rows != len(files) {
		t.Errorf("schema_version has %d rows, want one per migration file (%d)", rows, len(files))
	}
}

func TestApplyRefusesChangedMigration(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	if _, err := conn.Exec(ctx, `UPDATE schema_version SET sha256 = repeat('0', 64) WHERE version = 1`); err != nil {
		t.Fatal(err)
	}
	_, err = migrations.ApplyConn(ctx, conn, nil)
	if !errors.Is(err, migrations.ErrChanged) {
		t.Fatalf("Apply after an applied file changed: err = %v, want ErrChanged", err)
	}
}

// TestChecksRefuseBadRows inserts rows that break a CHECK constraint
// directly, so that the rule holds whatever the code above does.
func TestChecksRefuseBadRows(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	const key = "aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa"
	if _, err := conn.Exec(ctx, `WITH s AS (INSERT INTO inbox_subject (subject) VALUES ('fhir.input.lab') RETURNING id)
	    INSERT INTO inbox VALUES (decode($1, 'hex'), (SELECT id FROM s), 1, now(), now(), 0, 0)`, key); err != nil {
		t.Fatal(err)
	}
	const hash = "0123456789abcdef0123456789abcdef"
	const dig = "bbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbb"
	// Since 0014 a fact is a fact_row with keys into fact_encounter and
	// fact_term, whose checks run when a new term is stored (as the store's writer does it, in one statement).
	factSQL := `WITH e AS (
	  INSERT INTO fact_encounter (encounter) VALUES ('')
	  ON CONFLICT (encounter) DO UPDATE SET encounter = EXCLUDED.encounter RETURNING id
	), t AS (
	  INSERT INTO fact_term (quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit,
	    code_system, code, code_display, status)
	  VALUES ($3, 'measured', '', $4, false, 'mm[Hg]', '', 'mm[Hg]', 'http://loinc.org', '2019-8', '', $6)
	  ON CONFLICT ON CONSTRAINT fact_term_values DO UPDATE SET quantity = EXCLUDED.quantity RETURNING id
	)
	INSERT INTO fact_row (key, digest, version_id, patient_ref, encounter_id, term_id, quantity, value, source_value,
	  effective, inbox_key, recorded_at)
	SELECT 'Observation/a', decode($1, 'hex'), '', $2, e.id, t.id, $3, $5::float8, 1, now(), decode($7, 'hex'), now()
	FROM e, t`
	derivSQL := `INSERT INTO derivation (key, version, observation_id, kind, patient_ref, patient_hash, encounter,
	  blood_gas_key, effective, value, unit, method, method_version, constants, assumptions, basis,
	  interp_code, interp_text, interp_source, flags, status, retracted, algorithm, digest, inbox_key, created_at)
	  VALUES ($1, $2, gen_random_uuid(), 'vdvt', 'Patient/p1', $3, '', 'Observation/a', now(), $4, $5, 'm', '1',
	  '[]', '[]', '', '', '', '', '[]', $6, '', 'a/1', $7, decode($8, 'hex'), now())`
	tests := []struct {
		name       string
		sql        string
		args       []any
		constraint string // "" : must succeed; else the constraint(s) it breaks, "|"-separated
	}{
		{"fact ok", factSQL, []any{dig, "Patient/p1", "pco2", "arterial", 40.0, "final", key}, ""},
		{"fact unknown status", factSQL, []any{dig, "Patient/p1", "po2", "", 40.0, "done", key}, "fact_term_status_check"},
		{"fact NaN value", factSQL, []any{dig, "Patient/p1", "po2", "", nan(), "final", key}, "fact_row_value_check"},
		{"fact blood gas without specimen", factSQL, []any{dig, "Patient/p1", "pco2", "", 40.0, "final", key}, "fact_blood_gas_has_specimen"},
		{"fact short digest", factSQL, []any{"abcd", "Patient/p1", "po2", "", 40.0, "final", key}, "fact_row_digest_check"},
		// The patient reference's pattern went with 0014 (fhirmap validates
		// it before a fact exists).
		{"derivation ok", derivSQL, []any{"Patient/p1|Observation/a|vdvt", 1, hash, 0.3, "1", "final", dig, key}, ""},
		{"derivation key mismatch", derivSQL, []any{"Patient/p2|Observation/a|vdvt", 1, hash, 0.3, "1", "final", dig, key}, "derivation_key_parts"},
		{"derivation version 0", derivSQL, []any{"Patient/p1|Observation/a|vdvt", 0, hash, 0.3, "1", "final", dig, key}, "derivation_version_check|derivation_supersedes_previous"},
		{"derivation version 2 superseding nothing", derivSQL, []any{"Patient/p1|Observation/a|vdvt", 2, hash, 0.3, "1", "final", dig, key}, "derivation_supersedes_previous"},
		{"derivation negative volume mL", derivSQL, []any{"Patient/p1|Observation/a|vdvt", 1, hash, -5.0, "mL", "final", dig, key}, "derivation_positive_amounts"},
		{"derivation zero flow L/min", derivSQL, []any{"Patient/p1|Observation/a|vdvt", 1, hash, 0.0, "L/min", "final", dig, key}, "derivation_positive_amounts"},
		{"derivation status cancelled", derivSQL, []any{"Patient/p1|Observation/a|vdvt", 1, hash, 0.3, "1", "cancelled", dig, key}, "derivation_status_check"},
		{"derivation infinite value", derivSQL, []any{"Patient/p1|Observation/a|vdvt", 1, hash, inf(), "1", "final", dig, key}, "derivation_value_check"},
		// inbox_inbox_key_check and refusal_reason_check were dropped by
		// 0013 (values the service computes): TestServiceChecksDropped.
		{"refusal of another patient's key", `INSERT INTO refusal (key, kind, patient_ref, patient_hash, blood_gas_key, effective, reason, detail, digest, inbox_key, created_at)
		  VALUES ('Patient/p2|Observation/a|vdvt', 'vdvt', 'Patient/p1', $1, 'Observation/a', now(), 'venous-specimen', '', $2, decode($3, 'hex'), now())`,
			[]any{hash, dig, key}, "refusal_key_parts"},
		{"outbox subject with space", `INSERT INTO outbox (subject, msg_id, headers, stored_payload, inbox_key, created_at) VALUES ('a b', 'm1', '{}', '', decode($1, 'hex'), now())`,
			[]any{key}, "outbox_subject_check"},
		{"resource digest not of its bytes", `INSERT INTO input_resource (reference, resource_type, version_id, patient_ref, patient_hash, digest, raw, inbox_key, received, recorded_at)
		  VALUES ('Observation/a', 'Observation', '', 'Patient/p1', $1, $2, '\x7b7d', decode($3, 'hex'), now(), now())`,
			[]any{hash, dig, key}, "input_resource_digest_matches"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			tx, err := conn.Begin(ctx)
			if err != nil {
				t.Fatal(err)
			}
			defer tx.Rollback(ctx)
			_, err = tx.Exec(ctx, tc.sql, tc.args...)
			if tc.constraint == "" {
				if err != nil {
					t.Fatalf("valid row refused: %v", err)
				}
				return
			}
			var pgErr *pgconn.PgError
			if !errors.As(err, &pgErr) || pgErr.Code != "23514" || !slices.Contains(strings.Split(tc.constraint, "|"), pgErr.ConstraintName) {
				t.Fatalf("err = %v, want check violation (23514) of %s", err, tc.constraint)
			}
		})
	}
}
