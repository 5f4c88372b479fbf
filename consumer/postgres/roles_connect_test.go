package postgres_test

import (
	"context"
	"errors"
	"fmt"
	"net/url"
	"os"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgconn"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
)

// The service's roles connect to the service's database and to no other.
// PostgreSQL grants CONNECT on every database to PUBLIC and no role can
// leave PUBLIC, so this is closed by deploy/postgres/pg_hba.conf (tested
// here as written, in a throwaway cluster whose pg_hba.conf the test owns)
// together with roles.sql's REVOKE ... FROM PUBLIC on the service database.
func TestRolesConnectOnlyToServiceDatabase(t *testing.T) {
	t.Parallel()
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
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
	hba, err := os.ReadFile("../../deploy/postgres/pg_hba.conf")
	if err != nil {
		t.Fatal(err)
	}
	urlOf := func(user, password, db string) string {
		u, err := url.Parse(cluster.URL())
		if err != nil {
			t.Fatal(err)
		}
		if password == "" {
			u.User = url.User(user)
		} else {
			u.User = url.UserPassword(user, password)
		}
		u.Path = "/" + db
		return u.String()
	}
	exec := func(u string, stmts ...string) {
		t.Helper()
		conn, err := pgx.Connect(ctx, u)
		if err != nil {
			t.Fatal(err)
		}
		defer conn.Close(ctx)
		for _, s := range stmts {
			if _, err := conn.Exec(ctx, s); err != nil {
				t.Fatalf("%.60s: %v", s, err)
			}
		}
	}
	// The site's layout as README "Roles" describes it: the service's
	// database, roles.sql run in it, owned by the owner role; and another
	// database of the site's.
	exec(cluster.URL(), "CREATE DATABASE ventderive", "CREATE DATABASE site_other")
	exec(urlOf("postgres", "", "ventderive"), string(rolesSQL))
	roles := []string{"ventderive_owner", "ventderive_writer", "ventderive_reviewer"}
	exec(cluster.URL(), "ALTER DATABASE ventderive OWNER TO ventderive_owner",
		"CREATE ROLE site_someone LOGIN",
		fmt.Sprintf("ALTER ROLE %s PASSWORD 'pw-owner'", roles[0]),
		fmt.Sprintf("ALTER ROLE %s PASSWORD 'pw-writer'", roles[1]),
		fmt.Sprintf("ALTER ROLE %s PASSWORD 'pw-reviewer'", roles[2]))
	passwords := map[string]string{roles[0]: "pw-owner", roles[1]: "pw-writer", roles[2]: "pw-reviewer"}

	connect := func(user, password, db string) error {
		cctx, cancel := context.WithTimeout(ctx, 10*time.Second)
		defer cancel()
		conn, err := pgx.Connect(cctx, urlOf(user, password, db))
		if err != nil {
			return err
		}
		defer conn.Close(ctx)
		var who string
		if err := conn.QueryRow(cctx, "SELECT current_user").Scan(&who); err != nil {
			return err
		}
		if who != user {
			return fmt.Errorf("connected as %q, want %q", who, user)
		}
		return nil
	}
	code := func(err error) string {
		var pgErr *pgconn.PgError
		if errors.As(err, &pgErr) {
			return pgErr.Code
		}
		return ""
	}

	// Without the pg_hba.conf rules (the cluster trusts 127.0.0.1) the
	// roles reach every database: the gap this closes. PostgreSQL's
	// default CONNECT for PUBLIC on postgres, template1 and any database
	// a site creates.
	for _, role := range roles {
		for _, db := range []string{"postgres", "template1", "site_other"} {
			if err := connect(role, "", db); err != nil {
				t.Fatalf("control: %s to %s without the rules: %v, want connected (PUBLIC has CONNECT)", role, db, err)
			}
		}
	}
	// roles.sql: CONNECT on the service's database is the three roles'
	// only; another login role of the site is refused by the privilege.
	if err := connect("site_someone", "", "ventderive"); code(err) != "42501" {
		t.Errorf("site_someone to ventderive: %v, want permission denied (42501: CONNECT revoked from PUBLIC)", err)
	}

	if err := cluster.PrependHBA(ctx, string(hba)); err != nil {
		t.Fatal(err)
	}
	for _, role := range roles {
		if err := connect(role, passwords[role], "ventderive"); err != nil {
			t.Errorf("%s to the service database: %v, want connected", role, err)
		}
		if err := connect(role, "wrong-password", "ventderive"); code(err) != "28P01" {
			t.Errorf("%s with a wrong password: %v, want 28P01 (the rule asks for scram-sha-256)", role, err)
		}
		for _, db := range []string{"postgres", "template1", "site_other"} {
			if err := connect(role, passwords[role], db); code(err) != "28000" {
				t.Errorf("%s to %s: %v, want refused by pg_hba.conf (28000)", role, db, err)
			}
		}
	}
	// The rules name only the service's roles.
	if err := connect("postgres", "", "postgres"); err != nil {
		t.Errorf("superuser after the rules: %v", err)
	}
	if err := connect("site_someone", "", "site_other"); err != nil {
		t.Errorf("another role to another database after the rules: %v", err)
	}
}
