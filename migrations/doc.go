// Package migrations holds the PostgreSQL schema of ventderive as embedded
// SQL files and applies them.
//
// Files are named NNNN_name.sql; NNNN is the schema version they bring the
// database to. Apply runs the files newer than the database's version in
// lexical order, each in its own transaction, records each one (with a
// SHA-256 of its text) in the schema_version table, and refuses to run when
// an applied file has changed since. A session-level advisory lock makes
// replicas that start together apply each file once: the second waits and
// then finds nothing to do.
//
// After every run Apply calls ventderive_apply_grants(), which grants the
// service role (ventderive_writer) and the reviewer role
// (ventderive_reviewer) their rights on the migrated objects when those roles
// exist (deploy/postgres/roles.sql creates them). Apply must run as the role
// that owns the schema (ventderive_owner in production).
package migrations
