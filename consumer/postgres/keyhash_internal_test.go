package postgres

import (
	"context"
	"errors"
	"regexp"
	"slices"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgtype"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/migrations"
)

func quoted(sql string) []string {
	var out []string
	for _, m := range regexp.MustCompile(`'([a-z0-9-]+)'`).FindAllStringSubmatch(sql, -1) {
		out = append(out, m[1])
	}
	slices.Sort(out)
	return out
}

// TestIndexedQuantitiesMatchIndex checks the literal list that the lookups
// by patient and quantity repeat (indexedQuantitiesSQL) against the
// quantities they look up (the blood gas, the body temperature and
// patientLevel) and against the predicate of the partial index of
// migration 0017 on a migrated store: a quantity looked up but missing
// from the index would be read through no index, and one in the list but
// not in the predicate would keep the planner from using the index.
func TestIndexedQuantitiesMatchIndex(t *testing.T) {
	t.Parallel()
	want := append([]string{string(fhirmap.QPCO2), string(fhirmap.QBodyTemp)}, patientLevel...)
	slices.Sort(want)
	if got := quoted(indexedQuantitiesSQL); !slices.Equal(got, want) {
		t.Errorf("indexedQuantitiesSQL lists %q, want the looked-up quantities %q", got, want)
	}
	for _, q := range quoted(ventilatorQuantitiesSQL) {
		if slices.Contains(quoted(indexedQuantitiesSQL), q) {
			t.Errorf("ventilator quantity %s is in the partial index", q)
		}
	}
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	var pred string
	if err := conn.QueryRow(ctx, `SELECT pg_get_expr(indpred, indrelid) FROM pg_index
		WHERE indexrelid = 'fact_row_patient_ref_quantity_effective'::regclass`).Scan(&pred); err != nil {
		t.Fatal(err)
	}
	if got := quoted(pred); !slices.Equal(got, want) {
		t.Errorf("the partial index holds %q (%s), want %q", got, pred, want)
	}
	var v int
	if err := conn.QueryRow(ctx, `SELECT max(version) FROM schema_version`).Scan(&v); err != nil || v != migrations.Latest() {
		t.Fatalf("store at version %d (%v), want %d", v, err, migrations.Latest())
	}
}

// TestGuardSkippedFindsForeignRow runs the writer's collision guard
// against real rows: a stored fact, and a given fact with the same digest
// and effective time under another key (what a 64-bit collision of the two
// keys would have made ON CONFLICT skip). The guard passes the stored key
// and refuses the other, and an insert that stored every fact is not
// checked at all.
func TestGuardSkippedFindsForeignRow(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	digest := make([]byte, 32)
	digest[0] = 7
	at := time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
	if _, err := conn.Exec(ctx, `
INSERT INTO fact_encounter (encounter) VALUES ('');
INSERT INTO fact_term (quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit, code_system, code, code_display, status)
VALUES ('minute-volume', 'measured', '', '', false, 'L/min', '', 'L/min', 'http://loinc.org', 'x', '', 'final');
INSERT INTO fact_row (inbox_key, recorded_at, effective, value, encounter_id, term_id, key, digest, patient_ref, quantity, version_id)
SELECT decode(repeat('ab', 32), 'hex'), now(), '2026-03-01T08:00:00Z', 10, e.id, t.id, 'Observation/stored',
    decode('07' || repeat('00', 31), 'hex'), 'Patient/lg-icu-0001', 'minute-volume', '1'
FROM fact_encounter e, fact_term t`); err != nil {
		t.Fatal(err)
	}
	args := func(key string) []any {
		a := make([]any, 27)
		a[0], a[1], a[21] = []string{key}, [][]byte{digest}, []pgtype.Timestamptz{{Time: at, Valid: true}}
		return a
	}
	tx, err := conn.Begin(ctx)
	if err != nil {
		t.Fatal(err)
	}
	defer tx.Rollback(ctx) //nolint:errcheck // read-only
	if err := guardSkipped(ctx, tx, 0, args("Observation/stored")); err != nil {
		t.Errorf("a skipped fact stored under its own key: %v, want nil", err)
	}
	if err := guardSkipped(ctx, tx, 0, args("Observation/other")); !errors.Is(err, ErrFactKeyCollision) {
		t.Errorf("a skipped fact whose key no row has: %v, want ErrFactKeyCollision", err)
	}
	if err := guardSkipped(ctx, tx, 1, args("Observation/other")); err != nil {
		t.Errorf("an insert that stored every fact: %v, want no check", err)
	}
}
