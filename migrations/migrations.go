package migrations

import (
	"context"
	"crypto/sha256"
	"embed"
	"encoding/hex"
	"errors"
	"fmt"
	"io/fs"
	"log/slog"
	"slices"
	"strconv"
	"strings"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/rawcodec"
)

//go:embed *.sql
var files embed.FS

// migration is one embedded SQL file.
type migration struct {
	version int
	name    string
	sql     string
	sum     string // hex SHA-256 of sql
}

// load reads and orders the embedded files. A malformed or repeated version
// number is a build mistake: load panics so that the first test finds it.
func load() []migration {
	entries, err := fs.Glob(files, "*.sql")
	if err != nil {
		panic(err)
	}
	slices.Sort(entries) // lexical order is version order: versions are zero-padded
	var ms []migration
	for _, name := range entries {
		num, _, ok := strings.Cut(name, "_")
		v, err := strconv.Atoi(num)
		if !ok || err != nil || v <= 0 || len(num) != 4 {
			panic(fmt.Sprintf("migrations: file %q is not named NNNN_name.sql", name))
		}
		if len(ms) > 0 && ms[len(ms)-1].version >= v {
			panic(fmt.Sprintf("migrations: version %d repeated or out of order", v))
		}
		b, err := files.ReadFile(name)
		if err != nil {
			panic(err)
		}
		sum := sha256.Sum256(b)
		ms = append(ms, migration{version: v, name: name, sql: string(b), sum: hex.EncodeToString(sum[:])})
	}
	return ms
}

var all = load()

// Latest returns the schema version the embedded files bring a database to.
func Latest() int {
	if len(all) == 0 {
		return 0
	}
	return all[len(all)-1].version
}

// ErrChanged reports that a migration file applied to the database differs
// from the embedded one: the schema cannot be trusted to match the code.
var ErrChanged = errors.New("applied migration changed")

// Apply brings the database behind pool to Latest and returns the version
// it is at afterwards. It holds one pooled connection for the duration (the
// advisory lock belongs to a session). A database already newer than this
// binary (a newer replica migrated it) is left alone and its version
// returned without error. log may be nil.
func Apply(ctx context.Context, pool *pgxpool.Pool, log *slog.Logger) (int, error) {
	c, err := pool.Acquire(ctx)
	if err != nil {
		return 0, fmt.Errorf("acquire connection: %w", err)
	}
	defer c.Release()
	return ApplyConn(ctx, c.Conn(), log)
}

const (
	lockSQL   = `SELECT pg_advisory_lock(hashtextextended('ventderive/migrations', 0))`
	unlockSQL = `SELECT pg_advisory_unlock(hashtextextended('ventderive/migrations', 0))`

	createVersionSQL = `
CREATE TABLE IF NOT EXISTS schema_version (
    version    integer PRIMARY KEY CHECK (version > 0),
    name       text NOT NULL,
    sha256     text NOT NULL CHECK (sha256 ~ '^[0-9a-f]{64}$'),
    applied_at timestamptz NOT NULL DEFAULT now()
)`
	appliedSQL = `SELECT version, name, sha256 FROM schema_version ORDER BY version`
	recordSQL  = `INSERT INTO schema_version (version, name, sha256) VALUES ($1, $2, $3)`
	grantsSQL  = `SELECT ventderive_apply_grants()`

	// storeDictionarySQL stores the binary's inbox dictionary (0015) under
	// its ID; a dictionary already stored under that ID is left as it is.
	storeDictionarySQL = `INSERT INTO raw_dictionary (id, dictionary) VALUES ($1, $2) ON CONFLICT (id) DO NOTHING`
	dictionaryVersion  = 15
	// storeDictionariesSQL stores every embedded dictionary (0018: inbox and
	// outbox) with its kind, likewise.
	storeDictionariesSQL = `
INSERT INTO raw_dictionary (id, kind, dictionary)
SELECT * FROM unnest($1::bigint[], $2::text[], $3::bytea[])
ON CONFLICT (id) DO NOTHING`
	dictionariesVersion = 18
)

// ApplyConn is Apply on a single connection, for tools that hold one.
func ApplyConn(ctx context.Context, conn *pgx.Conn, log *slog.Logger) (version int, err error) {
	if log == nil {
		log = slog.New(slog.DiscardHandler)
	}
	if _, err := conn.Exec(ctx, lockSQL); err != nil {
		return 0, fmt.Errorf("take migration lock: %w", err)
	}
	defer func() {
		// A context that ended must not leave the lock held on a pooled
		// connection: unlock with a fresh context.
		if _, uerr := conn.Exec(context.WithoutCancel(ctx), unlockSQL); uerr != nil && err == nil {
			err = fmt.Errorf("release migration lock: %w", uerr)
		}
	}()

	if _, err := conn.Exec(ctx, createVersionSQL); err != nil {
		return 0, fmt.Errorf("create version table: %w", err)
	}
	applied := map[int]string{}
	current := 0
	rows, err := conn.Query(ctx, appliedSQL)
	if err != nil {
		return 0, fmt.Errorf("read versions: %w", err)
	}
	for rows.Next() {
		var v int
		var name, sum string
		if err := rows.Scan(&v, &name, &sum); err != nil {
			rows.Close()
			return 0, fmt.Errorf("read versions: %w", err)
		}
		applied[v] = sum
		current = max(current, v)
	}
	if err := rows.Err(); err != nil {
		return 0, fmt.Errorf("read versions: %w", err)
	}

	for _, m := range all {
		if sum, ok := applied[m.version]; ok {
			if sum != m.sum {
				return current, fmt.Errorf("version %d (%s): %w", m.version, m.name, ErrChanged)
			}
			continue
		}
		if m.version < current {
			return current, fmt.Errorf("version %d (%s) is missing below applied version %d", m.version, m.name, current)
		}
		err := pgx.BeginFunc(ctx, conn, func(tx pgx.Tx) error {
			if _, err := tx.Exec(ctx, m.sql); err != nil {
				return err
			}
			_, err := tx.Exec(ctx, recordSQL, m.version, m.name, m.sum)
			return err
		})
		if err != nil {
			return current, fmt.Errorf("apply %s: %w", m.name, err)
		}
		current = m.version
		log.Info("migration applied", "version", m.version, "name", m.name)
	}
	if current > Latest() {
		log.Warn("database schema is newer than this binary", "database", current, "binary", Latest())
	}
	if current > 0 {
		if _, err := conn.Exec(ctx, grantsSQL); err != nil {
			return current, fmt.Errorf("apply grants: %w", err)
		}
	}
	switch {
	case current >= dictionariesVersion:
		var ids []int64
		var kinds []string
		var data [][]byte
		for _, d := range rawcodec.Embedded() {
			ids, kinds, data = append(ids, int64(d.ID)), append(kinds, d.Kind), append(data, d.Data)
		}
		if _, err := conn.Exec(ctx, storeDictionariesSQL, ids, kinds, data); err != nil {
			return current, fmt.Errorf("store the dictionaries: %w", err)
		}
	case current >= dictionaryVersion:
		if _, err := conn.Exec(ctx, storeDictionarySQL, int64(rawcodec.InboxDictionaryID), rawcodec.InboxDictionary); err != nil {
			return current, fmt.Errorf("store the inbox dictionary: %w", err)
		}
	}
	return current, nil
}
