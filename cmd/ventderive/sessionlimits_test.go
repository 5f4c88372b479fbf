package main

import (
	"context"
	"log/slog"
	"net/url"
	"os"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
)

// The writer role can lift its own timeouts (PostgreSQL allows any role
// ALTER ROLE self SET for user-settable parameters); the service sees it
// at start and warns, naming the setting. A throwaway cluster: the test
// changes a role's defaults, which are cluster-wide.
func TestServeWarnsWhenSessionLimitsAreLifted(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	cluster, err := pgtest.StartCluster(ctx, t.TempDir())
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
	u, err := url.Parse(cluster.URL()) // the cluster trusts 127.0.0.1
	if err != nil {
		t.Fatal(err)
	}
	u.User = url.User("ventderive_writer")
	check := func() ([]string, string) {
		t.Helper()
		pool, err := pgxpool.New(ctx, u.String())
		if err != nil {
			t.Fatal(err)
		}
		defer pool.Close()
		var out strings.Builder
		lifted, err := checkSessionLimits(ctx, pool, slog.New(slog.NewJSONHandler(&out, nil)))
		if err != nil {
			t.Fatal(err)
		}
		return lifted, out.String()
	}

	if lifted, log := check(); len(lifted) != 0 {
		t.Fatalf("with roles.sql's settings: warned about %v:\n%s", lifted, log)
	}
	// The role lifts two of its own limits; PostgreSQL lets it.
	writer, err := pgx.Connect(ctx, u.String())
	if err != nil {
		t.Fatal(err)
	}
	for _, s := range []string{"ALTER ROLE ventderive_writer SET statement_timeout = 0",
		"ALTER ROLE ventderive_writer SET lock_timeout = '1min'"} {
		if _, err := writer.Exec(ctx, s); err != nil {
			t.Fatalf("%s as the writer: %v (PostgreSQL allows it; if it no longer does, say so in the README)", s, err)
		}
	}
	writer.Close(ctx)
	lifted, log := check()
	if want := []string{"statement_timeout", "lock_timeout"}; !slices.Equal(lifted, want) {
		t.Errorf("lifted %v, want %v", lifted, want)
	}
	for _, want := range []string{`"msg":"database session limit lifted"`, `"setting":"statement_timeout","value":"off"`,
		`"setting":"lock_timeout","value":"1m0s","want_at_most":"2s"`} {
		if !strings.Contains(log, want) {
			t.Errorf("log lacks %s:\n%s", want, log)
		}
	}
	// Running roles.sql again restores them.
	if _, err := admin.Exec(ctx, string(rolesSQL)); err != nil {
		t.Fatalf("roles.sql again: %v", err)
	}
	if lifted, log := check(); len(lifted) != 0 {
		t.Errorf("after roles.sql again: warned about %v:\n%s", lifted, log)
	}
}
