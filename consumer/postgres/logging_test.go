package postgres_test

import (
	"context"
	"net/url"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/migrations"
)

// A constraint error of the writer role must not put row values in the
// server log (PostgreSQL's DETAIL "Failing row contains (...)", the
// failing statement, its parameters). A throwaway cluster of the test's
// own: roles.sql changes cluster-wide roles and the test reads the log.
func TestWriterConstraintErrorLogsNoValues(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	dir := t.TempDir()
	cluster, err := pgtest.StartCluster(ctx, dir)
	if err != nil {
		pgtest.NoServer(t, err)
	}
	t.Cleanup(func() { _ = cluster.Close() })
	rolesSQL, err := os.ReadFile("../../deploy/postgres/roles.sql")
	if err != nil {
		t.Fatal(err)
	}
	admin, err := pgx.Connect(ctx, cluster.URL())
	if err != nil {
		t.Fatal(err)
	}
	defer admin.Close(ctx)
	if _, err := admin.Exec(ctx, string(rolesSQL)); err != nil {
		t.Fatalf("roles.sql: %v", err)
	}
	as := func(role string) string { // the cluster trusts local connections
		u, err := url.Parse(cluster.URL())
		if err != nil {
			t.Fatal(err)
		}
		u.User = url.User(role)
		return u.String()
	}
	owner, err := pgxpool.New(ctx, as("ventderive_owner"))
	if err != nil {
		t.Fatal(err)
	}
	defer owner.Close()
	if _, err := migrations.Apply(ctx, owner, nil); err != nil {
		t.Fatalf("migrate as owner: %v", err)
	}
	writer, err := pgx.Connect(ctx, as("ventderive_writer"))
	if err != nil {
		t.Fatal(err)
	}
	defer writer.Close(ctx)
	const canary = "Patient/canary-zz9"
	_, err = writer.Exec(ctx, `INSERT INTO dead_letter (inbox_key, subject, stream_seq, raw, reason, detail, created_at)
		VALUES (decode($1, 'hex'), 'fhir.input.lab', 1, $2, $3, 'x', now())`, strings.Repeat("a", 64), []byte(canary), canary)
	if err == nil || !strings.Contains(err.Error(), "23514") {
		t.Fatalf("insert of a bad reason as the writer: %v, want a check violation", err)
	}
	deadline := time.Now().Add(30 * time.Second)
	var log string
	for !strings.Contains(log, "dead_letter_reason_check") {
		if time.Now().After(deadline) {
			t.Fatal("the constraint error never reached the server log: the test proves nothing")
		}
		time.Sleep(100 * time.Millisecond)
		b, _ := os.ReadFile(filepath.Join(dir, "postgres.log"))
		log = string(b)
	}
	if strings.Contains(log, "canary-zz9") {
		t.Errorf("the server log holds the row's values:\n%s", log[strings.Index(log, "dead_letter_reason_check")-200:])
	}
}
