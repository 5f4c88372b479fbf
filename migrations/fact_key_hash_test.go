package migrations_test

import (
	"strings"
	"testing"

	"github.com/jackc/pgx/v5"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/migrations"
)

// TestFactKeyHashMigratesStoredRows builds a store at version 16 with facts
// in a monthly partition and in the default one (two versions of one key,
// a blood gas, a patient attribute, ventilator readings), then migrates to
// the latest version. Every row of the view fact reads back as before,
// byte for byte; the unique index on (hashtextextended(key, 0), digest,
// effective) is on every partition and the old unique constraint is gone;
// re-sending a stored version (the writer's insert, ON CONFLICT naming the
// expression) stores nothing, a new version stores one row; a lookup by
// key through the hash finds the key's latest version; and the partial
// quantity index holds only the blood gas and the patient attribute.
func TestFactKeyHashMigratesStoredRows(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	conn, err := pgx.Connect(ctx, pgtest.NewEmptyDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	applyBefore(t, ctx, conn, "0017")

	const keyA = "aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa"
	seed := []string{
		`INSERT INTO inbox (inbox_key, subject, stream_seq, received, recorded_at, resources, facts)
		 VALUES ('` + keyA + `', 'fhir.input.lab', 1, '2026-03-01 12:00:00Z', '2026-03-01 12:00:01Z', 5, 5)`,
		`SELECT ventderive_fact_partitions('2026-03-01Z', '2026-04-01Z')`,
		`INSERT INTO fact_encounter (encounter) VALUES ('')`,
		`INSERT INTO fact_term (quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit,
		    code_system, code, code_display, status) VALUES
		  ('pco2', 'measured', '', 'arterial', false, 'mm[Hg]', '', 'mm[Hg]', 'http://loinc.org', '2019-8', '', 'final'),
		  ('tidal-volume', 'measured', '', '', false, 'mL', '', 'mL', 'http://loinc.org', '76222-9', '', 'final'),
		  ('sex', '', '', '', false, '', 'female', '', '', '', '', 'final')`,
	}
	for _, q := range seed {
		if _, err := conn.Exec(ctx, q); err != nil {
			t.Fatalf("%s: %v", q, err)
		}
	}
	// The writer's columns (0016); $2 is the digest's repeated hex digit.
	const insert = `INSERT INTO fact_row (inbox_id, effective, value, encounter_id, term_id, key, digest, patient_ref,
	    quantity, version_id)
	  SELECT (SELECT id FROM inbox), $3, $4, e.id, t.id, $1, decode(repeat($2, 64), 'hex'), 'Patient/p1', $5, $6
	  FROM fact_encounter e, fact_term t WHERE e.encounter = '' AND t.quantity = $5`
	type fr struct {
		key, dig, eff string
		val           float64
		qty, ver      string
	}
	rows := []fr{
		{"Observation/gas#pco2", "1", "2026-03-01T11:50:00Z", 44.25, "pco2", "1"},
		{"Observation/vt1", "2", "2026-03-01T11:40:00Z", 450, "tidal-volume", "1"},
		{"Observation/vt1", "3", "2026-03-01T11:40:00Z", 430, "tidal-volume", "2"},
		{"Observation/vt2", "4", "2026-03-01T11:41:00Z", 460, "tidal-volume", "1"},
		{"Patient/p1#sex", "5", "0001-01-01T00:00:00Z", 0, "sex", "1"},
	}
	for _, r := range rows {
		if _, err := conn.Exec(ctx, insert+` ON CONFLICT (key, digest, effective) DO NOTHING`, r.key, r.dig, r.eff, r.val, r.qty, r.ver); err != nil {
			t.Fatalf("%s: %v", r.key, err)
		}
	}
	const viewSQL = `SELECT string_agg(concat_ws(' ', id, key, digest, resource_ref, version_id, last_updated, patient_ref,
	    encounter, quantity, origin, detail, specimen, temp_corrected, encode(float8send(value), 'hex'), unit, text,
	    encode(float8send(source_value), 'hex'), source_unit, code_system, code, code_display, status, effective, issued,
	    inbox_key, recorded_at), E'\n' ORDER BY id) FROM fact`
	const reviewSQL = `SELECT (SELECT count(*) FROM review_fact) || ' ' || (SELECT count(*) FROM review_derivation_input)
	    || ' ' || (SELECT count(*) FROM review_refusal_input) || ' ' || (SELECT count(*) FROM review_refusal_nearest)`
	var viewBefore, reviewBefore string
	if err := conn.QueryRow(ctx, viewSQL).Scan(&viewBefore); err != nil {
		t.Fatal(err)
	}
	if err := conn.QueryRow(ctx, reviewSQL).Scan(&reviewBefore); err != nil {
		t.Fatal(err)
	}

	v, err := migrations.ApplyConn(ctx, conn, nil)
	if err != nil {
		t.Fatal(err)
	}
	if v != migrations.Latest() || v < 17 {
		t.Fatalf("migrated to %d, want Latest %d (>= 17)", v, migrations.Latest())
	}

	var viewAfter, reviewAfter string
	if err := conn.QueryRow(ctx, viewSQL).Scan(&viewAfter); err != nil {
		t.Fatal(err)
	}
	if viewAfter != viewBefore || viewAfter == "" {
		t.Errorf("the view fact reads differently after 0017:\n before\n%s\n after\n%s", viewBefore, viewAfter)
	}
	if err := conn.QueryRow(ctx, reviewSQL).Scan(&reviewAfter); err != nil {
		t.Fatal(err)
	}
	if reviewAfter != reviewBefore {
		t.Errorf("review_* views: before %s, after %s", reviewBefore, reviewAfter)
	}

	// The unique index on every partition, the old constraint gone.
	var partitions, unique, constraints int
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM pg_inherits WHERE inhparent = 'fact_row'::regclass`).Scan(&partitions); err != nil {
		t.Fatal(err)
	}
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM pg_index x JOIN pg_inherits h ON h.inhrelid = x.indrelid
	    WHERE h.inhparent = 'fact_row'::regclass AND x.indisunique
	      AND pg_get_indexdef(x.indexrelid) LIKE '%(hashtextextended(key, (0)::bigint), digest, effective)'`).Scan(&unique); err != nil {
		t.Fatal(err)
	}
	if partitions < 2 || unique != partitions {
		t.Errorf("%d of %d partitions have the unique key-hash index", unique, partitions)
	}
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM pg_constraint WHERE conname = 'fact_row_key_digest_effective'`).Scan(&constraints); err != nil {
		t.Fatal(err)
	}
	if constraints != 0 {
		t.Errorf("fact_row_key_digest_effective is still there")
	}

	// Dedup: every stored version again stores nothing; a new version of
	// vt2 stores one row.
	const conflict = ` ON CONFLICT (hashtextextended(key, 0), digest, effective) DO NOTHING`
	for _, r := range rows {
		tag, err := conn.Exec(ctx, insert+conflict, r.key, r.dig, r.eff, r.val, r.qty, r.ver)
		if err != nil {
			t.Fatal(err)
		}
		if tag.RowsAffected() != 0 {
			t.Errorf("re-sending %s version %s stored %d rows, want 0", r.key, r.ver, tag.RowsAffected())
		}
	}
	// Without ON CONFLICT the unique index refuses the same version.
	if _, err := conn.Exec(ctx, insert, rows[1].key, rows[1].dig, rows[1].eff, rows[1].val, rows[1].qty, rows[1].ver); err == nil {
		t.Errorf("a stored version was inserted again without ON CONFLICT")
	}
	tag, err := conn.Exec(ctx, insert+conflict, "Observation/vt2", "6", "2026-03-01T11:41:00Z", 470.0, "tidal-volume", "2")
	if err != nil {
		t.Fatal(err)
	}
	if tag.RowsAffected() != 1 {
		t.Errorf("a new version stored %d rows, want 1", tag.RowsAffected())
	}
	var n int
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM fact_row`).Scan(&n); err != nil {
		t.Fatal(err)
	}
	if n != len(rows)+1 {
		t.Errorf("fact_row has %d rows, want %d", n, len(rows)+1)
	}

	// A lookup by key through the hash: the latest version of each key.
	var latest string
	if err := conn.QueryRow(ctx, `SELECT string_agg(key || '=' || version_id || '/' || value, ' ' ORDER BY key) FROM (
	    SELECT DISTINCT ON (key) key, version_id, value FROM fact
	    WHERE hashtextextended(key, 0) = ANY(ARRAY(SELECT hashtextextended(k, 0) FROM unnest($1::text[]) AS k))
	      AND key = ANY($1::text[])
	    ORDER BY key, id DESC) l`, []string{"Observation/vt1", "Observation/vt2"}).Scan(&latest); err != nil {
		t.Fatal(err)
	}
	if latest != "Observation/vt1=2/430 Observation/vt2=2/470" {
		t.Errorf("latest versions by key hash: %s", latest)
	}

	// The partial index holds the blood gas and the patient attribute only,
	// and a lookup that repeats its list reads it.
	const byQuantity = `SELECT string_agg(quantity, ' ' ORDER BY quantity) FROM fact_row
	    WHERE patient_ref = 'Patient/p1' AND quantity IN ('pco2', 'body-temp', 'sex', 'birth-date', 'body-height', 'body-weight',
	      'target-paco2', 'apparatus-dead-space', 'airway')`
	if _, err := conn.Exec(ctx, `SET enable_seqscan = off`); err != nil {
		t.Fatal(err)
	}
	var indexed, plan string
	if err := conn.QueryRow(ctx, byQuantity).Scan(&indexed); err != nil {
		t.Fatal(err)
	}
	if indexed != "pco2 sex" {
		t.Errorf("facts by patient and the indexed quantities: %q, want pco2 sex", indexed)
	}
	var size int64
	if err := conn.QueryRow(ctx, `SELECT sum(pg_relation_size(x.indexrelid))::bigint FROM pg_index x
	    JOIN pg_inherits h ON h.inhrelid = x.indrelid
	    WHERE h.inhparent = 'fact_row'::regclass AND pg_get_indexdef(x.indexrelid) LIKE '%(patient_ref, quantity, effective) WHERE%'`).Scan(&size); err != nil {
		t.Fatal(err)
	}
	if size == 0 {
		t.Errorf("no partition has the partial quantity index")
	}
	rowsPlan, err := conn.Query(ctx, `EXPLAIN `+byQuantity)
	if err != nil {
		t.Fatal(err)
	}
	lines, err := pgx.CollectRows(rowsPlan, pgx.RowTo[string])
	if err != nil {
		t.Fatal(err)
	}
	for _, l := range lines {
		plan += l + "\n"
	}
	if !strings.Contains(plan, "patient_ref_quantity_effective") {
		t.Errorf("the lookup by patient and quantity does not read the partial index:\n%s", plan)
	}
}
