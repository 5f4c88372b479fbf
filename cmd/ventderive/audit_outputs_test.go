package main

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
)

// audit outputs, as the reviewer role: every stored outbox payload of the
// seeded store verifies (exit 0, the counts); after one frame is damaged
// (as the owner, in this throwaway database) the command names that row
// and exits non-zero. The writer role may not run it (it reads no review
// view).
func TestAuditOutputs(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	u := pgtest.NewDatabase(t)
	rolesSQL, err := os.ReadFile("../../deploy/postgres/roles.sql")
	if err != nil {
		t.Fatal(err)
	}
	pgtest.ApplyRoles(t, u, string(rolesSQL))
	seedAudit(t, ctx, u)
	pool, err := pgxpool.New(ctx, u)
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	var rows int64
	if err := pool.QueryRow(ctx, `SELECT count(*) FROM outbox`).Scan(&rows); err != nil || rows == 0 {
		t.Fatalf("%d outbox rows (%v): the seed must publish", rows, err)
	}
	audit := func(url string, args ...string) (string, error) {
		var out bytes.Buffer
		e := env{getenv: func(string) string { return "" }, stdout: &out, stderr: &out}
		err := run(ctx, append([]string{"audit", "outputs", "--database-url", url}, args...), e)
		return out.String(), err
	}
	ru := reviewerURL(t, u)
	got, err := audit(ru)
	if err != nil {
		t.Fatalf("audit outputs on an intact store: %v\n%s", err, got)
	}
	if want := "stored outputs that are the bytes recorded: " + itoa64(rows) + " (" + itoa64(rows) + " compressed, 0 plain"; !strings.Contains(got, want) || !strings.Contains(got, "refused: 0") {
		t.Errorf("audit outputs printed\n%s\nwant %q and no refusal", got, want)
	}

	var seq int64
	if err := pool.QueryRow(ctx, `UPDATE outbox SET stored_payload = overlay(stored_payload PLACING
		decode(lpad(to_hex(get_byte(stored_payload, length(stored_payload) / 2) # 255), 2, '0'), 'hex')
		FROM length(stored_payload) / 2 + 1 FOR 1)
		WHERE seq = (SELECT min(seq) FROM outbox) RETURNING seq`).Scan(&seq); err != nil {
		t.Fatal(err)
	}
	got, err = audit(ru)
	if err == nil || !strings.Contains(err.Error(), "1 stored output(s) refused") {
		t.Errorf("audit outputs over a damaged frame: err %v, want 1 refused", err)
	}
	if !strings.Contains(got, "refused: 1\n  outbox "+itoa64(seq)+" (") || !strings.Contains(got, "compressed, 0 plain") {
		t.Errorf("audit outputs printed\n%s\nwant row %d named", got, seq)
	}
	got, _ = audit(ru, "--format", "json")
	var j struct {
		Compressed, Plain int64
		Failed            []string
	}
	if err := json.Unmarshal([]byte(got), &j); err != nil || j.Compressed != rows-1 || len(j.Failed) != 1 {
		t.Errorf("--format json: %+v (%v) from\n%s", j, err, got)
	}

	wq := strings.Replace(ru, "ventderive_reviewer", "ventderive_writer", 1)
	// Refused by PostgreSQL's privileges (insufficient_privilege, SQLSTATE
	// 42501: the writer role has no SELECT on the review views), not by any
	// other failure.
	if got, err := audit(wq); err == nil || !strings.Contains(err.Error(), "reviewer role") ||
		!strings.Contains(err.Error(), "permission denied") || !strings.Contains(err.Error(), "SQLSTATE 42501") {
		t.Errorf("audit outputs as the writer role: %v\n%s; want refused for want of privilege (SQLSTATE 42501), naming the reviewer role", err, got)
	}
}

func itoa64(n int64) string {
	b, _ := json.Marshal(n)
	return string(b)
}

// A plain outbox row (before migration 0018) has no stored digest: the
// view computes its digest from the same bytes, so audit outputs says it
// is not independently verifiable rather than only counting it verified.
func TestAuditOutputsLabelsPlainRows(t *testing.T) {
	var b bytes.Buffer
	if err := (auditOutput{w: &b}).outputs(postgres.OutputCheck{Compressed: 2, Plain: 1}); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(b.String(), "1 plain (no stored digest: not independently verifiable)") {
		t.Errorf("audit outputs printed\n%s\nwant the plain row labelled not independently verifiable", b.String())
	}
	b.Reset()
	if err := (auditOutput{w: &b}).outputs(postgres.OutputCheck{Compressed: 2}); err != nil {
		t.Fatal(err)
	}
	if strings.Contains(b.String(), "not independently verifiable") {
		t.Errorf("audit outputs printed\n%s\nwith no plain row, want no such label", b.String())
	}
}
