package postgres_test

import (
	"context"
	"errors"
	"log/slog"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/migrations"
)

// poolAs opens a pool whose sessions act as role (SET ROLE): the grants are
// what is tested, whatever authentication the server uses.
func poolAs(t *testing.T, ctx context.Context, u, role string) *pgxpool.Pool {
	t.Helper()
	cfg, err := pgxpool.ParseConfig(u)
	if err != nil {
		t.Fatal(err)
	}
	cfg.AfterConnect = func(ctx context.Context, c *pgx.Conn) error {
		_, err := c.Exec(ctx, "SET ROLE "+role)
		return err
	}
	pool, err := pgxpool.NewWithConfig(ctx, cfg)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(pool.Close)
	return pool
}

func wantDenied(t *testing.T, what string, err error) {
	t.Helper()
	var pgErr *pgconn.PgError
	if !errors.As(err, &pgErr) || pgErr.Code != "42501" {
		t.Errorf("%s: err = %v, want permission denied (42501)", what, err)
	}
}

// TestRoles applies deploy/postgres/roles.sql, migrates as the owner role,
// runs the store as the writer role and reads as the reviewer role.
func TestRoles(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	rolesSQL, err := os.ReadFile("../../deploy/postgres/roles.sql")
	if err != nil {
		t.Fatal(err)
	}
	u := pgtest.NewEmptyDatabase(t)
	pgtest.ApplyRoles(t, u, string(rolesSQL))
	pgtest.ApplyRoles(t, u, string(rolesSQL)) // idempotent

	owner := poolAs(t, ctx, u, "ventderive_owner")
	if v, err := migrations.Apply(ctx, owner, nil); err != nil || v != migrations.Latest() {
		t.Fatalf("migrate as owner = %d, %v", v, err)
	}
	// Grants also hold when roles.sql runs after the schema exists.
	pgtest.ApplyRoles(t, u, string(rolesSQL))

	writer := poolAs(t, ctx, u, "ventderive_writer")
	store := postgres.New(writer, postgres.Options{PatientKey: testKey, Now: clock()})
	msg := message("fhir.input.lab", 1, abg(p1, "abg-1", t0, 45), vent(p1, "ve-1", fhirmap.QMinuteVol, t0, 10, "L/min"))
	if res, err := store.Ingest(ctx, msg, new(testPlan).plan); err != nil || res.Derivations != 1 {
		t.Fatalf("Ingest as writer = %+v, %v", res, err)
	}
	if _, err := store.Ingest(ctx, message("fhir.input.lab", 2, abg(p1, "abg-2", t0.Add(time.Hour), 45)), new(testPlan).plan); err != nil {
		t.Fatalf("Ingest of a refusal as writer: %v", err)
	}
	if n, err := store.RelayOutbox(ctx, 10, func(_ context.Context, ms []consumer.OutboxMessage) ([]int64, error) { return seqs(ms), nil }); err != nil || n != 1 {
		t.Fatalf("RelayOutbox as writer = %d, %v", n, err)
	}
	// A group (IngestBatch: seedSubjectsSQL, then claimInboxesSQL) of two
	// messages with a subject the store has not seen, as the writer. The
	// seed's failure is only logged (the claim inserts the subject too), so
	// its log line is what shows a grant it lacks.
	var logged lockedBuffer
	groupStore := postgres.New(writer, postgres.Options{PatientKey: testKey, Now: clock(),
		Logger: slog.New(slog.NewTextHandler(&logged, nil))})
	group := []consumer.Message{
		message("fhir.input.device.roles", 3, vent(p1, "ve-roles-1", fhirmap.QMinuteVol, t0.Add(2*time.Hour), 10, "L/min")),
		message("fhir.input.device.roles", 4, vent(p1, "ve-roles-2", fhirmap.QMinuteVol, t0.Add(3*time.Hour), 11, "L/min")),
	}
	for i, r := range groupStore.IngestBatch(ctx, group, new(testPlan).plan) {
		if r.Err != nil {
			t.Errorf("IngestBatch message %d as writer: %v", i, r.Err)
		}
	}
	var grouped int
	if err := writer.QueryRow(ctx, `SELECT count(*) FROM inbox i JOIN inbox_subject s ON s.id = i.subject_id
	    WHERE s.subject = 'fhir.input.device.roles'`).Scan(&grouped); err != nil || grouped != 2 {
		t.Errorf("inbox rows of the writer's group with its new subject: %d, %v; want 2", grouped, err)
	}
	if l := logged.String(); strings.Contains(l, "level=WARN") {
		t.Errorf("the writer's group logged a warning:\n%s", l)
	}
	dl := consumer.Message{InboxKey: sha([]byte("bad")), Subject: "fhir.input.lab", Raw: []byte("bad")}
	if err := store.DeadLetter(ctx, dl, "invalid-json", ""); err != nil {
		t.Fatalf("DeadLetter as writer: %v", err)
	}
	for _, stmt := range []string{
		"DELETE FROM fact_row", "DELETE FROM fact_term", "DELETE FROM outbox", "DELETE FROM derivation", "DELETE FROM inbox",
		"UPDATE derivation SET value = 0", "UPDATE outbox SET stored_payload = ''", "UPDATE fact_row SET value = 0", "UPDATE fact_term SET unit = ''",
		"TRUNCATE refusal", "DROP TABLE dead_letter", "SELECT * FROM review_derivation",
		// Migration 0005: raw payloads are written, never read back.
		"SELECT raw FROM input_resource", "SELECT raw FROM dead_letter", "SELECT * FROM input_resource",
		// Migration 0011: the message payload in the inbox likewise.
		"SELECT raw FROM inbox", "SELECT * FROM inbox",
		// Migration 0006: settings snapshots are written once, never changed.
		"UPDATE site_settings SET snapshot = '{}'", "DELETE FROM site_settings",
	} {
		_, err := writer.Exec(ctx, stmt)
		wantDenied(t, "writer "+stmt, err)
	}
	// Migration 0019: the writer's UPDATE (subject) on inbox_subject is
	// for the claim's no-op ON CONFLICT DO UPDATE only; a rename would
	// change the recorded subject of every past inbox row, and the trigger
	// refuses it. The no-op update passes (the control).
	_, err = writer.Exec(ctx, "UPDATE inbox_subject SET subject = 'fhir.input.renamed' WHERE subject = 'fhir.input.lab'")
	wantDenied(t, "writer renames an inbox subject", err)
	if tag, err := writer.Exec(ctx, "UPDATE inbox_subject SET subject = subject WHERE subject = 'fhir.input.lab'"); err != nil || tag.RowsAffected() != 1 {
		t.Errorf("writer's no-op update of an inbox subject: %v, %d rows; want accepted, 1 row", err, tag.RowsAffected())
	}
	// Migration 0018: the relay reads the stored dictionaries (a frame made
	// by a newer replica's dictionary).
	var dicts int
	if err := writer.QueryRow(ctx, "SELECT count(*) FROM raw_dictionary WHERE kind = 'outbox'").Scan(&dicts); err != nil || dicts != 1 {
		t.Errorf("writer reads raw_dictionary: %d outbox dictionaries, %v; want 1", dicts, err)
	}
	// What the writer still reads of those tables: every column but raw.
	var refs int
	if err := writer.QueryRow(ctx, "SELECT count(reference) FROM input_resource").Scan(&refs); err != nil {
		t.Errorf("writer reads input_resource.reference: %d, %v", refs, err)
	}
	var inbox int
	if err := writer.QueryRow(ctx, "SELECT count(inbox_key) FROM inbox JOIN inbox_subject s ON s.id = subject_id WHERE s.subject <> '' AND facts >= 0").Scan(&inbox); err != nil || inbox == 0 {
		t.Errorf("writer reads inbox's columns but raw: %d, %v", inbox, err)
	}
	// Migration 0005: the writer cannot queue an outbox row for a NATS
	// system subject, a wildcard or an empty token; a plain subject passes
	// (the control, rolled back).
	const outboxRow = `INSERT INTO outbox (subject, msg_id, headers, stored_payload, inbox_key, created_at)
		VALUES ($1, 'roles-test/' || $1, '{}', '\x00', (SELECT inbox_key FROM inbox LIMIT 1), now())`
	for _, c := range []struct {
		subject string
		ok      bool
	}{
		{"ventderive.derived.observation", true},
		{"$JS.API.STREAM.DELETE.FHIR_INPUT", false},
		{"$SYS.REQ.SERVER.PING", false},
		{"ventderive.derived.>", false},
		{"ventderive.*.observation", false},
		{"ventderive..observation", false},
		{".ventderive", false},
	} {
		tx, err := writer.Begin(ctx)
		if err != nil {
			t.Fatal(err)
		}
		_, err = tx.Exec(ctx, outboxRow, c.subject)
		_ = tx.Rollback(ctx)
		var pgErr *pgconn.PgError
		switch {
		case c.ok && err != nil:
			t.Errorf("writer outbox row for %q: %v, want accepted", c.subject, err)
		case !c.ok && (!errors.As(err, &pgErr) || pgErr.Code != "23514" || pgErr.ConstraintName != "outbox_subject_plain"):
			t.Errorf("writer outbox row for %q: err = %v, want check violation outbox_subject_plain (23514)", c.subject, err)
		}
	}

	reviewer := poolAs(t, ctx, u, "ventderive_reviewer")
	for _, view := range []string{"review_derivation", "review_derivation_input", "review_refusal", "review_refusal_input",
		"review_head", "review_fact", "review_dead_letter", "review_outbox", "review_settings", "review_dictionary"} {
		var n int
		if err := reviewer.QueryRow(ctx, "SELECT count(*) FROM "+view).Scan(&n); err != nil || n == 0 {
			t.Errorf("reviewer reads %s: %d rows, %v; want rows", view, n, err)
		}
	}
	var linked int
	if err := reviewer.QueryRow(ctx, `SELECT count(*) FROM review_derivation d JOIN review_settings s ON s.digest = d.settings_digest`).Scan(&linked); err != nil || linked == 0 {
		t.Errorf("reviewer reads %d derivations linked to their settings snapshot, %v; want the writer's row", linked, err)
	}
	for _, stmt := range []string{
		"SELECT * FROM fact", "SELECT * FROM fact_row", "SELECT raw FROM input_resource", "SELECT raw FROM dead_letter", "SELECT * FROM derivation",
		"SELECT * FROM outbox", "SELECT * FROM head", "SELECT * FROM site_settings", "INSERT INTO inbox VALUES ('x', 1, 0, now(), now(), 0, 0)",
		// Migration 0019: the subjects' lookup table is the writer's.
		"SELECT * FROM inbox_subject", "INSERT INTO inbox_subject (subject) VALUES ('s')",
		"CREATE TABLE reviewer_notes (x int)",
		// Migration 0018: the reviewer reads the outbox dictionary
		// through review_dictionary, never the inbox one.
		"SELECT * FROM raw_dictionary",
	} {
		_, err := reviewer.Exec(ctx, stmt)
		wantDenied(t, "reviewer "+stmt, err)
	}
}
