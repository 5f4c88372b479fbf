// Package pgtest gives tests and demos a real PostgreSQL: a fresh migrated
// database per test, dropped when the test ends.
//
// The server is the one DATABASE_URL names (an admin URL: a role that may
// create databases) when that variable is set. Otherwise a throwaway cluster
// is started from the installed server binaries (/usr/lib/postgresql/*/bin,
// Debian package postgresql) with initdb and postgres, as the postgres user
// when running as root (both refuse to run as root), on a free port of
// 127.0.0.1 and a unix socket in a private temporary directory, with fsync
// and synchronous_commit on as in production. A test binary whose TestMain
// calls Main shares one such cluster between its tests and removes it at the
// end; without Main each test gets a cluster of its own (slower, but nothing
// outlives the test). The server process also receives SIGINT if the test
// binary dies, so a crashed run leaves no server behind.
//
// When no server can be had, tests fail with a message naming the missing
// package if the CI environment variable is set, and are skipped with a
// loud message otherwise.
package pgtest
