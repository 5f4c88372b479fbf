package migrations_test

import (
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"strings"
	"testing"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
)

// TestSiteSettingsChecks checks migration 0006's constraints on settings
// snapshots: the key is the SHA-256 of the bytes kept, the algorithm and
// alias-file columns say what the bytes say, and a snapshot is a JSON
// object with a site; a derivation's record is an object with array steps,
// constants, assumptions and flags. The digests are computed here with Go's
// crypto/sha256 (FIPS 180-4), independently of PostgreSQL's sha256().
func TestSiteSettingsChecks(t *testing.T) {
	t.Parallel()
	ctx := ctxFor(t)
	conn, err := pgx.Connect(ctx, pgtest.NewDatabase(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	inbox := strings.Repeat("a", 64)
	if _, err := conn.Exec(ctx, `WITH s AS (INSERT INTO inbox_subject (subject) VALUES ('s') RETURNING id)
	    INSERT INTO inbox VALUES (decode($1, 'hex'), (SELECT id FROM s), 0, now(), now(), 0, 0)`, inbox); err != nil {
		t.Fatal(err)
	}
	sum := func(s string) string { h := sha256.Sum256([]byte(s)); return hex.EncodeToString(h[:]) }
	good := `{"algorithm":"ventderive-derive/2","aliasDigest":"","site":{"RQ":0.8}}`
	tests := []struct {
		name, digest, snapshot, algorithm, alias string
		constraint                               string // "" when accepted
	}{
		{"a snapshot keyed by its SHA-256", sum(good), good, "ventderive-derive/2", "", ""},
		{"a key that is not the bytes' SHA-256", sum(good + " "), good, "ventderive-derive/2", "", "site_settings_digest_matches"},
		{"another algorithm than the bytes'", sum(good), good, "ventderive-derive/1", "", "site_settings_algorithm_matches"},
		{"another alias digest than the bytes'", sum(good), good, "ventderive-derive/2", strings.Repeat("b", 64), "site_settings_alias_matches"},
		{"no site", sum(`{"algorithm":"x","aliasDigest":""}`), `{"algorithm":"x","aliasDigest":""}`, "x", "", "site_settings_is_object"},
	}
	for _, tc := range tests {
		_, err := conn.Exec(ctx, `INSERT INTO site_settings VALUES ($1, $2, $3, $4, decode($5, 'hex'), now())`, tc.digest, tc.snapshot, tc.algorithm, tc.alias, inbox)
		var pgErr *pgconn.PgError
		switch {
		case tc.constraint == "" && err != nil:
			t.Errorf("%s: refused: %v", tc.name, err)
		case tc.constraint != "" && (!errors.As(err, &pgErr) || pgErr.ConstraintName != tc.constraint):
			t.Errorf("%s: err = %v, want a violation of %s", tc.name, err, tc.constraint)
		}
	}
	// The record CHECK, evaluated as the column's constraint holds it.
	var def string
	if err := conn.QueryRow(ctx, `SELECT pg_get_constraintdef(oid) FROM pg_constraint WHERE conname = 'derivation_record_check'`).Scan(&def); err != nil {
		t.Fatal(err)
	}
	expr := strings.TrimSuffix(strings.TrimPrefix(def, "CHECK ("), ")")
	for rec, want := range map[string]bool{
		`{"steps":[],"constants":[],"assumptions":[],"flags":[]}`: true,
		`{"steps":{},"constants":[],"assumptions":[],"flags":[]}`: false,
		`{"constants":[],"assumptions":[],"flags":[]}`:            false,
		`[]`: false,
	} {
		var ok bool
		if err := conn.QueryRow(ctx, `SELECT `+expr+` FROM (SELECT $1::jsonb AS record) r`, rec).Scan(&ok); err != nil {
			t.Fatalf("%s: %v", rec, err)
		}
		if ok != want {
			t.Errorf("record %s: accepted %v, want %v", rec, ok, want)
		}
	}
}
