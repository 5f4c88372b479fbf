package pgtest

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"net/url"
	"os"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/ventderive/ventderive/migrations"
)

var (
	mainActive bool // Main runs this test binary: share one cluster
	sharedMu   sync.Mutex
	shared     *Cluster
	sharedDir  string
	sharedErr  error
	perTest    sync.Map // testing.TB -> *Cluster, when Main is not used
)

// Main runs the tests of a package and then stops and removes the cluster
// they shared, if one was started. Call it from TestMain:
//
//	func TestMain(m *testing.M) { pgtest.Main(m) }
func Main(m *testing.M) {
	mainActive = true
	code := m.Run()
	sharedMu.Lock()
	if shared != nil {
		shared.Close()
		os.RemoveAll(sharedDir)
	}
	sharedMu.Unlock()
	os.Exit(code)
}

// AdminURL returns the URL of a role that may create databases and roles:
// DATABASE_URL when set, else a throwaway cluster's superuser. Without a
// server it fails the test when CI is set, and skips it otherwise.
func AdminURL(t testing.TB) string {
	t.Helper()
	if u := os.Getenv("DATABASE_URL"); u != "" {
		return u
	}
	if !mainActive {
		// No TestMain to clean up after a shared cluster: one per test.
		if c, ok := perTest.Load(t); ok {
			return c.(*Cluster).URL()
		}
		ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
		defer cancel()
		c, err := StartCluster(ctx, t.TempDir())
		if err != nil {
			NoServer(t, err)
		}
		perTest.Store(t, c)
		t.Cleanup(func() { perTest.Delete(t); c.Close() })
		return c.URL()
	}
	sharedMu.Lock()
	defer sharedMu.Unlock()
	if shared == nil && sharedErr == nil {
		ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
		defer cancel()
		sharedDir, sharedErr = os.MkdirTemp("", "ventderive-pgtest-")
		if sharedErr == nil {
			shared, sharedErr = StartCluster(ctx, sharedDir)
			if sharedErr != nil {
				os.RemoveAll(sharedDir)
			}
		}
	}
	if sharedErr != nil {
		NoServer(t, sharedErr)
	}
	return shared.URL()
}

// NoServer ends a test that needs a PostgreSQL it could not have: a loud
// skip when the server binaries are missing and CI is not set, a failure
// otherwise (CI must never pass by skipping).
func NoServer(t testing.TB, err error) {
	t.Helper()
	if errors.Is(err, ErrNoServer) && os.Getenv("CI") == "" {
		t.Skipf("SKIPPED, NO DATABASE: %v (or set DATABASE_URL to an admin URL)", err)
	}
	t.Fatalf("PostgreSQL needed and not available (set DATABASE_URL to an admin URL, or install the Debian package postgresql): %v", err)
}

// NewDatabase creates a fresh database, migrated to migrations.Latest, and
// returns its URL (same role as AdminURL). The database is dropped when the
// test ends.
func NewDatabase(t testing.TB) string {
	t.Helper()
	u := NewEmptyDatabase(t)
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	conn, err := pgx.Connect(ctx, u)
	if err != nil {
		t.Fatalf("connect to test database: %v", err)
	}
	defer conn.Close(ctx)
	if _, err := migrations.ApplyConn(ctx, conn, nil); err != nil {
		t.Fatalf("migrate test database: %v", err)
	}
	return u
}

// NewEmptyDatabase creates a fresh empty database and returns its URL; it is
// dropped (with any sessions still connected) when the test ends.
func NewEmptyDatabase(t testing.TB) string {
	t.Helper()
	admin := AdminURL(t)
	var b [6]byte
	rand.Read(b[:])
	name := "vdtest_" + hex.EncodeToString(b[:])
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	conn, err := pgx.Connect(ctx, admin)
	if err != nil {
		t.Fatalf("connect to admin database: %v", err)
	}
	defer conn.Close(ctx)
	if _, err := conn.Exec(ctx, "CREATE DATABASE "+name); err != nil {
		t.Fatalf("create test database: %v", err)
	}
	t.Cleanup(func() {
		ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
		defer cancel()
		conn, err := pgx.Connect(ctx, admin)
		if err != nil {
			t.Errorf("drop test database: %v", err)
			return
		}
		defer conn.Close(ctx)
		if _, err := conn.Exec(ctx, "DROP DATABASE IF EXISTS "+name+" WITH (FORCE)"); err != nil {
			t.Errorf("drop test database: %v", err)
		}
	})
	u, err := WithDatabase(admin, name)
	if err != nil {
		t.Fatalf("test database URL: %v", err)
	}
	return u
}

// WithDatabase returns connection string u (URL or keyword/value form)
// naming database name instead.
func WithDatabase(u, name string) (string, error) {
	if strings.HasPrefix(u, "postgres://") || strings.HasPrefix(u, "postgresql://") {
		p, err := url.Parse(u)
		if err != nil {
			return "", fmt.Errorf("parse database URL: %w", err)
		}
		p.Path = "/" + name
		p.RawPath = ""
		return p.String(), nil
	}
	return u + " dbname=" + name, nil
}

// rolesLock serializes role changes across test binaries sharing a server:
// roles are cluster-wide, advisory locks are per database, so every caller
// locks in the admin URL's database.
const rolesLockSQL = `SELECT pg_advisory_lock(hashtextextended('ventderive/pgtest/roles', 0))`

// ApplyRoles runs rolesSQL (deploy/postgres/roles.sql) in the database at
// dbURL under a server-wide test lock, so that tests in parallel binaries do
// not race on CREATE ROLE.
func ApplyRoles(t testing.TB, dbURL, rolesSQL string) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	lock, err := pgx.Connect(ctx, AdminURL(t))
	if err != nil {
		t.Fatalf("connect to admin database: %v", err)
	}
	defer lock.Close(ctx) // ends the session: releases the lock
	if _, err := lock.Exec(ctx, rolesLockSQL); err != nil {
		t.Fatalf("take roles lock: %v", err)
	}
	conn, err := pgx.Connect(ctx, dbURL)
	if err != nil {
		t.Fatalf("connect to test database: %v", err)
	}
	defer conn.Close(ctx)
	if _, err := conn.Exec(ctx, rolesSQL); err != nil {
		t.Fatalf("apply roles: %v", err)
	}
}
