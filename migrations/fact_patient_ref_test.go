package migrations_test

import (
	"crypto/sha256"
	"encoding/hex"
	"os"
	"path/filepath"
	"slices"
	"testing"

	"github.com/jackc/pgx/v5"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/migrations"
)

// TestFactPatientRefMigratesStoredRows builds a store at version 11 (the
// files before 0012, recorded as the runner records them), stores facts
// and a refusal for want of a ventilator reading the way the service did
// (with the keyed hash in every fact row), then migrates to the latest
// version: every fact stays, the hash column and the hash indexes are gone,
// the reference indexes serve the patient lookups, and
// review_refusal_nearest names the same reading as before (the nearest of
// the refusal's patient, not the other patient's reading just beside the
// blood gas), and no index on patient_hash is left in any table.
func TestFactPatientRefMigratesStoredRows(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	conn, err := pgx.Connect(ctx, pgtest.NewEmptyDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)

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
		if name >= "0012" {
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

	const key = "aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa"
	const dig = "bbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbbb"
	const h1, h2 = "11111111111111111111111111111111", "22222222222222222222222222222222"
	seed := []string{
		`INSERT INTO inbox VALUES ('` + key + `', 'fhir.input.lab', 1, now(), now(), 0, 0)`,
		// Patient/p1: a blood gas at 12:00 and tidal volumes at 10:00 (the
		// nearest, outside the default window) and 08:00; Patient/p2: a
		// tidal volume at 12:05, nearer but another patient's.
		factRow("Observation/gas#pco2", "Patient/p1", h1, "pco2", "arterial", "2026-03-01 12:00:00Z"),
		factRow("Observation/vt1#vt", "Patient/p1", h1, "tidal-volume", "", "2026-03-01 10:00:00Z"),
		factRow("Observation/vt0#vt", "Patient/p1", h1, "tidal-volume", "", "2026-03-01 08:00:00Z"),
		factRow("Observation/vt2#vt", "Patient/p2", h2, "tidal-volume", "", "2026-03-01 12:05:00Z"),
		`INSERT INTO refusal (key, kind, patient_ref, patient_hash, blood_gas_key, effective, reason, detail, digest, inbox_key, created_at)
		 VALUES ('Patient/p1|Observation/gas#pco2|vdvt', 'vdvt', 'Patient/p1', '` + h1 + `', 'Observation/gas#pco2',
		 '2026-03-01 12:00:00Z', 'no-ventilator-data-in-window', '', '` + dig + `', '` + key + `', now() + interval '1 hour')`,
		`INSERT INTO refusal_input (refusal_id, ordinal, role, fact_key, fact_digest, resource_ref, time_offset, fallback)
		 SELECT id, 1, 'paco2', 'Observation/gas#pco2', '` + dig + `', 'Observation/gas', interval '0', '' FROM refusal`,
	}
	for _, q := range seed {
		if _, err := conn.Exec(ctx, q); err != nil {
			t.Fatalf("%s: %v", q, err)
		}
	}
	const nearestSQL = `SELECT fact_key || ' ' || time_offset::text FROM review_refusal_nearest`
	var before string
	if err := conn.QueryRow(ctx, nearestSQL).Scan(&before); err != nil {
		t.Fatal(err)
	}
	if want := "Observation/vt1#vt -02:00:00"; before != want {
		t.Fatalf("at version 11 the nearest reading is %q, want %q", before, want)
	}
	const factsSQL = `SELECT string_agg(key || ' ' || patient_ref || ' ' || quantity || ' ' || effective::text, ';' ORDER BY id) FROM fact`
	var factsBefore string
	if err := conn.QueryRow(ctx, factsSQL).Scan(&factsBefore); err != nil {
		t.Fatal(err)
	}

	v, err := migrations.ApplyConn(ctx, conn, nil)
	if err != nil {
		t.Fatal(err)
	}
	if v != migrations.Latest() || v < 12 {
		t.Fatalf("migrated to %d, want Latest %d (>= 12)", v, migrations.Latest())
	}
	var after, factsAfter string
	if err := conn.QueryRow(ctx, nearestSQL).Scan(&after); err != nil {
		t.Fatal(err)
	}
	if after != before {
		t.Errorf("after 0012 the nearest reading is %q, before %q", after, before)
	}
	if err := conn.QueryRow(ctx, factsSQL).Scan(&factsAfter); err != nil {
		t.Fatal(err)
	}
	if factsAfter != factsBefore {
		t.Errorf("facts changed by the migration:\n before %s\n after  %s", factsBefore, factsAfter)
	}
	var hashColumns int
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM information_schema.columns
		WHERE table_schema = current_schema() AND table_name = 'fact' AND column_name = 'patient_hash'`).Scan(&hashColumns); err != nil {
		t.Fatal(err)
	}
	if hashColumns != 0 {
		t.Errorf("fact still has patient_hash")
	}
	rows, err := conn.Query(ctx, `SELECT indexname || ' ' || indexdef FROM pg_indexes
		WHERE schemaname = current_schema() AND tablename = 'fact_row' ORDER BY 1`)
	if err != nil {
		t.Fatal(err)
	}
	idx, err := pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		t.Fatal(err)
	}
	// Since 0014 the facts are rows of fact_row, with 0012's two patient
	// indexes; since 0017 the unique index holds the key's 64-bit hash and
	// the (patient_ref, quantity, effective) index only the quantities
	// looked up by quantity.
	want := []string{
		"fact_row_key_hash_digest_effective CREATE UNIQUE INDEX fact_row_key_hash_digest_effective ON ONLY public.fact_row USING btree (hashtextextended(key, (0)::bigint), digest, effective)",
		"fact_row_patient_ref_effective CREATE INDEX fact_row_patient_ref_effective ON ONLY public.fact_row USING btree (((patient_ref || ''::text)), effective)",
		"fact_row_patient_ref_quantity_effective CREATE INDEX fact_row_patient_ref_quantity_effective ON ONLY public.fact_row USING btree (patient_ref, quantity, effective) WHERE (quantity = ANY (ARRAY['pco2'::text, 'body-temp'::text, 'sex'::text, 'birth-date'::text, 'body-height'::text, 'body-weight'::text, 'target-paco2'::text, 'apparatus-dead-space'::text, 'airway'::text]))",
	}
	if !slices.Equal(idx, want) {
		t.Errorf("fact_row indexes after 0012, 0014 and 0017:\n got  %q\n want %q", idx, want)
	}
	var hashIndexes int
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM pg_indexes
		WHERE schemaname = current_schema() AND indexdef LIKE '%patient_hash%'`).Scan(&hashIndexes); err != nil {
		t.Fatal(err)
	}
	if hashIndexes != 0 {
		t.Errorf("%d indexes on patient_hash left after 0012", hashIndexes)
	}
}

func factRow(key, patient, hash, quantity, specimen, effective string) string {
	return `INSERT INTO fact (key, digest, resource_ref, version_id, patient_ref, patient_hash, encounter,
	  quantity, origin, detail, specimen, temp_corrected, value, unit, text, source_value, source_unit,
	  code_system, code, code_display, status, effective, inbox_key, recorded_at)
	  VALUES ('` + key + `', repeat('b', 64), split_part('` + key + `', '#', 1), '', '` + patient + `', '` + hash + `', '',
	  '` + quantity + `', 'measured', '', '` + specimen + `', false, 40, 'mL', '', 40, 'mL', 'http://loinc.org', 'x', '',
	  'final', '` + effective + `', repeat('a', 64), now())`
}

func atoi(t *testing.T, s string) int {
	t.Helper()
	n := 0
	for _, c := range s {
		if c < '0' || c > '9' {
			t.Fatalf("not a version: %q", s)
		}
		n = n*10 + int(c-'0')
	}
	return n
}
