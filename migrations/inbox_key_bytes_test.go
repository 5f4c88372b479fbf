package migrations_test

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"strings"
	"testing"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/migrations"
)

// TestInboxKeyBytesMigratesStoredRows builds a store at version 18 with an
// inbox row holding its payload, one without (raw NULL, as after retain), a
// derivation, a refusal, an outbox row, a settings snapshot and an input
// resource naming them, a dead letter, and two facts (one naming its
// inbox row by inbox_id, one whose message has no inbox row and which
// holds its own key, as 0016 allows), then migrates to the latest version. The keys are the
// SHA-256 of invented payloads, computed here with Go's crypto/sha256 (FIPS
// 180-4). After 0019 every stored key is its 32 bytes and hex-encodes to
// the key stored before; the reviewer views that show a key read back row
// for row as before (64 lowercase hex characters); each inbox row names its
// subject as before, through one inbox_subject row a subject; a redelivered message
// is still a duplicate (ON CONFLICT stores nothing, a plain insert breaks
// inbox_pkey); the foreign keys still refuse a row naming no inbox row;
// and inbox_raw_matches still refuses a payload that is not its key's.
func TestInboxKeyBytesMigratesStoredRows(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	conn, err := pgx.Connect(ctx, pgtest.NewEmptyDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	applyBefore(t, ctx, conn, "0019")

	payload := []byte(`{"resourceType":"Bundle","type":"collection","entry":[]}`)
	sum := sha256.Sum256(payload)
	keyA := hex.EncodeToString(sum[:])
	deadRaw := []byte(`{"resourceType":"MedicationAdministration"}`)
	deadSum := sha256.Sum256(deadRaw)
	keyDead := hex.EncodeToString(deadSum[:])
	keyB := strings.Repeat("0f", 32)       // a row whose payload retain removed
	keyNoInbox := strings.Repeat("1e", 32) // a fact's message without an inbox row
	resourceRaw := []byte(`{"resourceType":"Observation","id":"a"}`)
	const hash = "0123456789abcdef0123456789abcdef"
	dig := strings.Repeat("b", 64)
	snapshot := `{"algorithm":"ventderive-derive/2","aliasDigest":"","site":{"RQ":0.8}}`
	snapSum := sha256.Sum256([]byte(snapshot))

	seed := []struct {
		sql  string
		args []any
	}{
		{`INSERT INTO inbox (inbox_key, subject, stream_seq, received, recorded_at, resources, facts, raw)
		  VALUES ($1, 'fhir.input.lab', 1, '2026-03-01 12:00:00Z', '2026-03-01 12:00:01Z', 0, 0, $2)`, []any{keyA, payload}},
		{`INSERT INTO inbox (inbox_key, subject, stream_seq, received, recorded_at, resources, facts, raw)
		  VALUES ($1, 'fhir.input.device', 2, '2026-03-01 12:00:02Z', '2026-03-01 12:00:03Z', 1, 3, NULL)`, []any{keyB}},
		{`INSERT INTO derivation (key, version, observation_id, kind, patient_ref, patient_hash, encounter,
		  blood_gas_key, effective, value, unit, method, method_version, constants, assumptions, basis,
		  interp_code, interp_text, interp_source, flags, status, retracted, algorithm, digest, inbox_key, created_at)
		  VALUES ('Patient/p1|Observation/a|vdvt', 1, '6f1c1e9e-0d1b-4c53-9a43-2f0f7f3c9a01', 'vdvt', 'Patient/p1', $1, '',
		  'Observation/a', '2026-03-01 11:50:00Z', 0.3, '1', 'm', '1', '[]', '[]', '', '', '', '', '[]', 'final', '', 'a/1',
		  $2, $3, '2026-03-01 12:00:01Z')`, []any{hash, dig, keyA}},
		{`INSERT INTO refusal (key, kind, patient_ref, patient_hash, blood_gas_key, effective, reason, detail, digest,
		  inbox_key, created_at)
		  VALUES ('Patient/p1|Observation/a|vdvt', 'vdvt', 'Patient/p1', $1, 'Observation/a', '2026-03-01 11:50:00Z',
		  'venous-specimen', '', $2, $3, '2026-03-01 12:00:03Z')`, []any{hash, dig, keyB}},
		{`INSERT INTO outbox (subject, msg_id, headers, stored_payload, inbox_key, created_at)
		  VALUES ('ventderive.observation', 'Observation/1', '{}', '\x7b7d', $1, '2026-03-01 12:00:01Z')`, []any{keyA}},
		{`INSERT INTO site_settings (digest, snapshot, algorithm, alias_digest, inbox_key, created_at)
		  VALUES ($1, $2, 'ventderive-derive/2', '', $3, '2026-03-01 12:00:01Z')`,
			[]any{hex.EncodeToString(snapSum[:]), snapshot, keyA}},
		{`INSERT INTO dead_letter (inbox_key, subject, stream_seq, raw, reason, detail, created_at)
		  VALUES ($1, 'fhir.input.lab', 3, $2, 'wrong-resource-type', 'resourceType', '2026-03-01 12:00:04Z')`,
			[]any{keyDead, deadRaw}},
		{`INSERT INTO input_resource (reference, resource_type, version_id, patient_ref, patient_hash, digest, raw,
		  inbox_key, received, recorded_at)
		  VALUES ('Observation/a', 'Observation', '1', 'Patient/p1', $1, encode(sha256($2), 'hex'), $2, $3,
		  '2026-03-01 12:00:00Z', '2026-03-01 12:00:01Z')`, []any{hash, resourceRaw, keyA}},
		{`INSERT INTO fact_encounter (encounter) VALUES ('')`, nil},
		{`INSERT INTO fact_term (quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit,
		  code_system, code, code_display, status)
		  VALUES ('minute-volume', 'measured', '', '', false, 'L/min', '', 'L/min', 'http://loinc.org', '20139-2', '', 'final')`, nil},
		// A fact whose message has its inbox row (inbox_id), and one whose
		// message has none (its key in fact_row.inbox_key, 0016).
		{`INSERT INTO fact_row (inbox_id, effective, value, encounter_id, term_id, key, digest, patient_ref, quantity, version_id)
		  SELECT (SELECT id FROM inbox WHERE inbox_key = $1), '2026-03-01 11:40:00Z', 10, e.id, t.id,
		  'Observation/ve-1#minute-volume', decode(repeat('c1', 32), 'hex'), 'Patient/p1', t.quantity, '1'
		  FROM fact_encounter e, fact_term t`, []any{keyB}},
		{`INSERT INTO fact_row (inbox_key, effective, value, recorded_at, encounter_id, term_id, key, digest, patient_ref,
		  quantity, version_id)
		  SELECT decode($1, 'hex'), '2026-03-01 11:45:00Z', 11, '2026-03-01 11:46:00Z', e.id, t.id,
		  'Observation/ve-2#minute-volume', decode(repeat('c2', 32), 'hex'), 'Patient/p1', t.quantity, '1'
		  FROM fact_encounter e, fact_term t`, []any{keyNoInbox}},
	}
	for _, s := range seed {
		if _, err := conn.Exec(ctx, s.sql, s.args...); err != nil {
			t.Fatalf("%s: %v", s.sql, err)
		}
	}

	// What a reviewer reads that shows an inbox key, and the internal view
	// fact's columns, row for row.
	const viewsSQL = `SELECT concat_ws(E'\n',
	    (SELECT string_agg(v::text, ' ' ORDER BY v.id) FROM review_derivation v),
	    (SELECT string_agg(v::text, ' ' ORDER BY v.id) FROM review_refusal v),
	    (SELECT string_agg(v::text, ' ' ORDER BY v.seq) FROM review_outbox v),
	    (SELECT string_agg(v::text, ' ' ORDER BY v.id) FROM review_dead_letter v),
	    (SELECT string_agg(v::text, ' ' ORDER BY v.id) FROM review_fact v),
	    (SELECT string_agg(a.attname || ':' || format_type(a.atttypid, a.atttypmod), ',' ORDER BY c.relname, a.attnum)
	     FROM pg_attribute a JOIN pg_class c ON c.oid = a.attrelid
	     WHERE c.relname IN ('fact', 'review_fact', 'review_derivation', 'review_refusal', 'review_outbox',
	                         'review_dead_letter') AND a.attnum > 0))`
	var before, subjectsBefore string
	if err := conn.QueryRow(ctx, viewsSQL).Scan(&before); err != nil {
		t.Fatal(err)
	}
	if err := conn.QueryRow(ctx, `SELECT string_agg(inbox_key || ' ' || subject, ',' ORDER BY inbox_key) FROM inbox`).Scan(&subjectsBefore); err != nil {
		t.Fatal(err)
	}
	for _, k := range []string{keyA, keyB, keyDead, keyNoInbox} {
		if !strings.Contains(before, k) {
			t.Fatalf("the views before 0019 do not show key %s:\n%s", k, before)
		}
	}

	// A grant a site's DBA gave another role on the views 0019 changes
	// survives the migration (a view dropped and created again would lose
	// it). Roles are cluster-wide: the name is this database's.
	var db string
	if err := conn.QueryRow(ctx, `SELECT current_database()`).Scan(&db); err != nil {
		t.Fatal(err)
	}
	auditor := pgx.Identifier{"site_audit_" + db}.Sanitize()
	changedViews := []string{"review_derivation", "review_refusal", "review_outbox", "review_dead_letter"}
	if _, err := conn.Exec(ctx, `CREATE ROLE `+auditor+` NOLOGIN`); err != nil {
		t.Fatal(err)
	}
	defer func() {
		if _, err := conn.Exec(ctx, `DROP OWNED BY `+auditor+`; DROP ROLE `+auditor); err != nil {
			t.Errorf("drop role %s: %v", auditor, err)
		}
	}()
	if _, err := conn.Exec(ctx, `GRANT SELECT ON `+strings.Join(changedViews, ", ")+` TO `+auditor); err != nil {
		t.Fatal(err)
	}

	// The store has statistics, as a running one has (autovacuum).
	rewritten := []string{"inbox", "derivation", "refusal", "outbox", "site_settings", "dead_letter"}
	if _, err := conn.Exec(ctx, `ANALYZE `+strings.Join(rewritten, ", ")); err != nil {
		t.Fatal(err)
	}

	v, err := migrations.ApplyConn(ctx, conn, nil)
	if err != nil {
		t.Fatal(err)
	}
	var pgErr *pgconn.PgError
	if v != migrations.Latest() || v < 19 {
		t.Fatalf("migrated to %d, want Latest %d (>= 19)", v, migrations.Latest())
	}

	// Every stored key is 32 bytes and is the key stored before.
	for _, c := range []struct {
		table string
		want  []string
	}{
		{"inbox", []string{keyA, keyB}},
		{"derivation", []string{keyA}},
		{"refusal", []string{keyB}},
		{"outbox", []string{keyA}},
		{"site_settings", []string{keyA}},
		{"input_resource", []string{keyA}},
		{"dead_letter", []string{keyDead}},
	} {
		rows, err := conn.Query(ctx, `SELECT inbox_key FROM `+c.table+` ORDER BY inbox_key`)
		if err != nil {
			t.Fatal(err)
		}
		keys, err := pgx.CollectRows(rows, pgx.RowTo[[]byte])
		if err != nil {
			t.Fatal(err)
		}
		var got []string
		for _, k := range keys {
			if len(k) != 32 {
				t.Errorf("%s: a key of %d bytes (%x), want 32", c.table, len(k), k)
			}
			got = append(got, hex.EncodeToString(k))
		}
		if strings.Join(got, ",") != strings.Join(c.want, ",") {
			t.Errorf("%s keys after 0019: %v, want %v", c.table, got, c.want)
		}
	}
	var stored []byte
	if err := conn.QueryRow(ctx, `SELECT raw FROM inbox WHERE inbox_key = $1`, sum[:]).Scan(&stored); err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(stored, payload) {
		t.Errorf("the payload of key A after 0019: %q, want %q", stored, payload)
	}

	for _, view := range changedViews {
		var granted bool
		if err := conn.QueryRow(ctx, `SELECT has_table_privilege($1, $2, 'SELECT')`, "site_audit_"+db, view).Scan(&granted); err != nil {
			t.Fatal(err)
		}
		if !granted {
			t.Errorf("after 0019 the site's role no longer has SELECT on %s", view)
		}
	}

	// The columns whose type changed have statistics again (a type change
	// drops them; 0019 analyzes the tables it rewrote).
	for _, table := range rewritten {
		col := "inbox_key"
		var n int
		if err := conn.QueryRow(ctx, `SELECT count(*) FROM pg_stats WHERE schemaname = current_schema()
		    AND tablename = $1 AND attname = $2`, table, col).Scan(&n); err != nil {
			t.Fatal(err)
		}
		if n != 1 {
			t.Errorf("after 0019 %s.%s has no statistics", table, col)
		}
	}
	var subjectStats int
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM pg_stats WHERE schemaname = current_schema()
	    AND tablename = 'inbox' AND attname = 'subject_id'`).Scan(&subjectStats); err != nil {
		t.Fatal(err)
	}
	if subjectStats != 1 {
		t.Errorf("after 0019 inbox.subject_id has no statistics")
	}

	var after string
	if err := conn.QueryRow(ctx, viewsSQL).Scan(&after); err != nil {
		t.Fatal(err)
	}
	if after != before {
		t.Errorf("the views read differently after 0019:\n before\n%s\n after\n%s", before, after)
	}

	// The facts name their message's key through the view: by the inbox
	// row's key (inbox_id) and by their own (no inbox row).
	var factKeys string
	if err := conn.QueryRow(ctx, `SELECT string_agg(inbox_key, ',' ORDER BY id) FROM review_fact`).Scan(&factKeys); err != nil {
		t.Fatal(err)
	}
	if factKeys != keyB+","+keyNoInbox {
		t.Errorf("review_fact's keys after 0019: %s, want %s,%s", factKeys, keyB, keyNoInbox)
	}

	// Each inbox row names its subject through inbox_subject, one row a
	// subject; a number that names no subject is refused.
	var subjectsAfter string
	var subjectRows int
	if err := conn.QueryRow(ctx, `SELECT string_agg(encode(i.inbox_key, 'hex') || ' ' || s.subject, ',' ORDER BY i.inbox_key),
	    (SELECT count(*) FROM inbox_subject) FROM inbox i JOIN inbox_subject s ON s.id = i.subject_id`).Scan(&subjectsAfter, &subjectRows); err != nil {
		t.Fatal(err)
	}
	if subjectsAfter != subjectsBefore || subjectRows != 2 {
		t.Errorf("subjects after 0019: %s (%d lookup rows), want %s (2)", subjectsAfter, subjectRows, subjectsBefore)
	}
	if _, err := conn.Exec(ctx, `INSERT INTO inbox (inbox_key, subject_id, stream_seq, received, recorded_at, resources, facts)
	    VALUES (decode(repeat('cd', 32), 'hex'), 9999, 5, now(), now(), 0, 0)`); !errors.As(err, &pgErr) ||
		pgErr.Code != "23503" || pgErr.ConstraintName != "inbox_subject_id_fkey" {
		t.Errorf("an inbox row naming no subject: %v, want a foreign key violation of inbox_subject_id_fkey", err)
	}

	// Dedup: the same message again is a duplicate.
	const claim = `INSERT INTO inbox (inbox_key, subject_id, stream_seq, received, recorded_at, resources, facts, raw)
	  VALUES (decode($1, 'hex'), (SELECT id FROM inbox_subject WHERE subject = 'fhir.input.lab'), 9, now(), now(), 0, 0, $2)`
	tag, err := conn.Exec(ctx, claim+` ON CONFLICT (inbox_key) DO NOTHING`, keyA, payload)
	if err != nil {
		t.Fatal(err)
	}
	if tag.RowsAffected() != 0 {
		t.Errorf("a redelivered message claimed %d inbox rows, want 0 (a duplicate)", tag.RowsAffected())
	}
	_, err = conn.Exec(ctx, claim, keyA, payload)
	if !errors.As(err, &pgErr) || pgErr.Code != "23505" || pgErr.ConstraintName != "inbox_pkey" {
		t.Errorf("a second inbox row with key A: %v, want a unique violation of inbox_pkey", err)
	}
	if _, err := conn.Exec(ctx, `INSERT INTO dead_letter (inbox_key, subject, stream_seq, raw, reason, detail, created_at)
	    VALUES (decode($1, 'hex'), 'fhir.input.lab', 4, $2, 'wrong-resource-type', '', now())`, keyDead, deadRaw); !errors.As(err, &pgErr) ||
		pgErr.Code != "23505" || pgErr.ConstraintName != "dead_letter_inbox_key_key" {
		t.Errorf("a second dead letter with the same key: %v, want a unique violation of dead_letter_inbox_key_key", err)
	}
	// A new message is claimed.
	other := []byte(`{"resourceType":"Bundle","type":"collection","entry":[],"id":"x"}`)
	otherSum := sha256.Sum256(other)
	if tag, err := conn.Exec(ctx, claim+` ON CONFLICT (inbox_key) DO NOTHING`, hex.EncodeToString(otherSum[:]), other); err != nil || tag.RowsAffected() != 1 {
		t.Errorf("a new message: %v, %d rows, want 1", err, tag.RowsAffected())
	}

	// The payload CHECK compares bytes: a plain payload that is not its
	// key's is refused.
	if _, err := conn.Exec(ctx, claim, strings.Repeat("00", 32), payload); !containsConstraint(err, "inbox_raw_matches") {
		t.Errorf("a plain payload under another key: %v, want inbox_raw_matches", err)
	}

	// The foreign keys: a row naming a key no inbox row has is refused.
	for _, c := range []struct{ sql, constraint string }{
		{`INSERT INTO outbox (subject, msg_id, headers, stored_payload, inbox_key, created_at)
		  VALUES ('ventderive.observation', 'Observation/2', '{}', '\x7b7d', decode($1, 'hex'), now())`, "outbox_inbox_key_fkey"},
		{`INSERT INTO input_resource (reference, resource_type, version_id, patient_ref, patient_hash, digest, raw,
		  inbox_key, received, recorded_at)
		  VALUES ('Observation/b', 'Observation', '1', 'Patient/p1', '` + hash + `', encode(sha256('\x7b7d'), 'hex'), '\x7b7d',
		  decode($1, 'hex'), now(), now())`, "input_resource_inbox_key_fkey"},
		{`INSERT INTO derivation (key, version, observation_id, kind, patient_ref, patient_hash, encounter,
		  blood_gas_key, effective, value, unit, method, method_version, constants, assumptions, basis,
		  interp_code, interp_text, interp_source, flags, status, retracted, algorithm, digest, inbox_key, created_at)
		  VALUES ('Patient/p1|Observation/b|vdvt', 1, '6f1c1e9e-0d1b-4c53-9a43-2f0f7f3c9a02', 'vdvt', 'Patient/p1', '` + hash + `', '',
		  'Observation/b', now(), 0.3, '1', 'm', '1', '[]', '[]', '', '', '', '', '[]', 'final', '', 'a/1',
		  '` + dig + `', decode($1, 'hex'), now())`, "derivation_inbox_key_fkey"},
		{`INSERT INTO site_settings (digest, snapshot, algorithm, alias_digest, inbox_key, created_at)
		  SELECT encode(sha256(convert_to(s, 'UTF8')), 'hex'), s, 'ventderive-derive/2', '', decode($1, 'hex'), now()
		  FROM (VALUES ('{"algorithm":"ventderive-derive/2","aliasDigest":"","site":{"RQ":0.9}}')) AS v(s)`,
			"site_settings_inbox_key_fkey"},
		{`INSERT INTO refusal (key, kind, patient_ref, patient_hash, blood_gas_key, effective, reason, detail, digest,
		  inbox_key, created_at)
		  VALUES ('Patient/p1|Observation/a|vdvt', 'vdvt', 'Patient/p1', '` + hash + `', 'Observation/a', now(),
		  'venous-specimen', '', '` + dig + `', decode($1, 'hex'), now())`, "refusal_inbox_key_fkey"},
	} {
		_, err := conn.Exec(ctx, c.sql, strings.Repeat("ee", 32))
		if !errors.As(err, &pgErr) || pgErr.Code != "23503" || pgErr.ConstraintName != c.constraint {
			t.Errorf("a row naming no inbox row: %v, want a foreign key violation of %s", err, c.constraint)
		}
	}
}

// TestInboxKeyIs32Bytes: since 0019 an inbox or dead-letter key of any
// length but 32 bytes is refused, in particular a key passed as its 64 hex
// characters instead of decoded (the mistake the CHECK is there to catch).
func TestInboxKeyIs32Bytes(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	if _, err := conn.Exec(ctx, `INSERT INTO inbox_subject (subject) VALUES ('fhir.input.lab')`); err != nil {
		t.Fatal(err)
	}
	const inbox = `INSERT INTO inbox (inbox_key, subject_id, stream_seq, received, recorded_at, resources, facts)
	  VALUES ($1, (SELECT id FROM inbox_subject WHERE subject = 'fhir.input.lab'), 1, now(), now(), 0, 0)`
	const dead = `INSERT INTO dead_letter (inbox_key, subject, stream_seq, raw, reason, detail, created_at)
	  VALUES ($1, 'fhir.input.lab', 1, '\x7b', 'invalid-json', '', now())`
	hexText := []byte(strings.Repeat("ab", 32)) // 64 bytes: the hex characters themselves
	for _, c := range []struct {
		name    string
		key     []byte
		refused bool
	}{
		{"31 bytes", bytes.Repeat([]byte{0xab}, 31), true},
		{"33 bytes", bytes.Repeat([]byte{0xab}, 33), true},
		{"hex text as bytes", hexText, true},
		{"empty", []byte{}, true},
		{"32 bytes", bytes.Repeat([]byte{0xab}, 32), false},
	} {
		for _, tb := range []struct{ table, sql, constraint string }{
			{"inbox", inbox, "inbox_key_size"},
			{"dead_letter", dead, "dead_letter_inbox_key_size"},
		} {
			table := tb.table
			_, err := conn.Exec(ctx, tb.sql, c.key)
			want := ""
			if c.refused {
				want = tb.constraint
			}
			switch {
			case want == "" && err != nil:
				t.Errorf("%s into %s: %v, want accepted", c.name, table, err)
			case want != "" && !containsConstraint(err, want):
				t.Errorf("%s into %s: %v, want a violation of %s", c.name, table, err, want)
			}
		}
	}
}
