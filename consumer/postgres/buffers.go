package postgres

import (
	"context"
	"fmt"
	"regexp"
	"strconv"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"
)

// RandomIndex is a unique index whose inserts land on a random leaf page,
// because its key is a hash: its working set is its whole size (for a
// partitioned index, the partitions that still receive inserts), and once
// that exceeds shared_buffers nearly every insert reads a page back from
// the OS cache, or from disk once it exceeds RAM.
type RandomIndex struct {
	Name  string // the index (the constraint's index), as the migrations name it
	Table string // the table it indexes
	// Partitioned: Name is the partitioned index of a partitioned table;
	// its partitions' indexes are read, for the partitions that can
	// receive today's inserts (LivePartitions).
	Partitioned bool
	// Key is the text pg_get_indexdef shows for its key columns, which a
	// test checks against the migrated schema.
	Key string
}

// RandomIndexes are the random-order unique indexes that every input (or
// every derived value) writes. TestRandomIndexesInStepWithMigrations keeps
// the list in step with migrations/: it fails when a migration renames or
// redefines one, or adds a unique index to these tables that is in neither
// this list nor its list of time-ordered ones.
var RandomIndexes = []RandomIndex{
	// The SHA-256 of each input message, in hex (migration 0001); kept for
	// every input stored (retain drops payloads, never the key).
	{Name: "inbox_pkey", Table: "inbox", Key: "inbox_key"},
	// The 64-bit hash of each fact's key (migration 0017), partitioned
	// by month of effective time (0014).
	{Name: "fact_row_key_hash_digest_effective", Table: "fact_row", Partitioned: true,
		Key: "hashtextextended(key, (0)::bigint), digest, effective"},
	// "Observation/<uuid>/_history/<n>" and "Provenance/...": version 5
	// UUIDs (SHA-1 of the derivation key), two rows per derived version.
	{Name: "outbox_msg_id_key", Table: "outbox", Key: "msg_id"},
}

// IndexSize is the size of one index relation of a RandomIndex: the index
// itself, or one partition's index.
type IndexSize struct {
	Index    string // the RandomIndex's Name
	Relation string // the index relation measured (a partition's index for a partitioned one)
	Table    string // the table (partition) it indexes
	Bytes    int64  // pg_relation_size
}

// BufferReport is what ReadBuffers found.
type BufferReport struct {
	SharedBuffers int64 // bytes
	Indexes       []IndexSize
}

// IndexBytes is the total size of the indexes in r.
func (r BufferReport) IndexBytes() int64 {
	var n int64
	for _, ix := range r.Indexes {
		n += ix.Bytes
	}
	return n
}

// livePartitionsSQL lists the partitions of fact_row that can receive
// inserts at $1: the one whose range holds $1, the next one (the one with
// the lowest lower bound above $1), and the default partition. The bounds
// are read from pg_get_expr(relpartbound): "FOR VALUES FROM ('...') TO
// ('...')" with timestamptz literals in this session's DateStyle and
// TimeZone, which the cast reads back in the same session; MINVALUE and
// MAXVALUE are open ends.
const livePartitionsSQL = `
WITH parts AS (
    SELECT c.oid, c.relname, pg_get_expr(c.relpartbound, c.oid) AS bound
    FROM pg_inherits h JOIN pg_class c ON c.oid = h.inhrelid
    WHERE h.inhparent = to_regclass('fact_row')
), ranged AS (
    SELECT oid, relname, bound = 'DEFAULT' AS is_default,
        (CASE WHEN m[1] IS NULL OR m[1] = 'MINVALUE' THEN '-infinity' ELSE btrim(m[1], '''') END)::timestamptz AS lo,
        (CASE WHEN m[2] IS NULL OR m[2] = 'MAXVALUE' THEN 'infinity' ELSE btrim(m[2], '''') END)::timestamptz AS hi
    FROM parts LEFT JOIN LATERAL regexp_match(bound, '^FOR VALUES FROM \((.*)\) TO \((.*)\)$') AS m ON true
)
SELECT oid FROM ranged WHERE is_default
UNION SELECT oid FROM ranged WHERE NOT is_default AND lo <= $1 AND $1 < hi
UNION (SELECT oid FROM ranged WHERE NOT is_default AND lo > $1 ORDER BY lo LIMIT 1)`

// randomIndexSizesSQL measures the indexes named in $2 (plain) and the
// partitions' indexes of those in $3 (partitioned) on the live partitions
// at $1. An index that does not exist gives a row with a NULL relation.
const randomIndexSizesSQL = `
WITH live AS (` + livePartitionsSQL + `)
SELECT n.name, c.relname, t.relname, pg_relation_size(c.oid)
FROM unnest($2::text[]) AS n(name)
LEFT JOIN pg_class c ON c.oid = to_regclass(n.name) AND c.relkind = 'i'
LEFT JOIN pg_index i ON i.indexrelid = c.oid
LEFT JOIN pg_class t ON t.oid = i.indrelid
UNION ALL
SELECT n.name, c.relname, t.relname, pg_relation_size(c.oid)
FROM unnest($3::text[]) AS n(name)
LEFT JOIN pg_class p ON p.oid = to_regclass(n.name) AND p.relkind = 'I'
LEFT JOIN pg_inherits h ON h.inhparent = p.oid
LEFT JOIN pg_class c ON c.oid = h.inhrelid
LEFT JOIN pg_index i ON i.indexrelid = c.oid
LEFT JOIN pg_class t ON t.oid = i.indrelid
WHERE p.oid IS NULL OR t.oid IN (SELECT oid FROM live)
ORDER BY 1, 2`

// LivePartitions returns the names of the partitions of fact_row that can
// receive inserts at now: the partition holding now, the next one if it
// exists, and the default partition (sorted by name).
func LivePartitions(ctx context.Context, pool *pgxpool.Pool, now time.Time) ([]string, error) {
	rows, err := pool.Query(ctx, `SELECT c.relname FROM pg_class c WHERE c.oid IN (`+livePartitionsSQL+`) ORDER BY 1`, now)
	if err != nil {
		return nil, fmt.Errorf("fact partitions: %w", err)
	}
	var out []string
	for rows.Next() {
		var name string
		if err := rows.Scan(&name); err != nil {
			return nil, err
		}
		out = append(out, name)
	}
	return out, rows.Err()
}

// ReadBuffers reads shared_buffers (bytes) and the sizes of RandomIndexes
// (for fact_row, on the partitions that can receive inserts at now). Every
// catalog it reads is readable by the service's writer role. A missing
// index is an error naming it.
func ReadBuffers(ctx context.Context, pool *pgxpool.Pool, now time.Time) (BufferReport, error) {
	var r BufferReport
	var setting int64
	var unit string
	if err := pool.QueryRow(ctx, `SELECT setting::bigint, coalesce(unit, '') FROM pg_settings WHERE name = 'shared_buffers'`).
		Scan(&setting, &unit); err != nil {
		return r, fmt.Errorf("read shared_buffers: %w", err)
	}
	per, err := UnitBytes(unit)
	if err != nil {
		return r, fmt.Errorf("shared_buffers: %w", err)
	}
	r.SharedBuffers = setting * per

	var plain, parted []string
	for _, ix := range RandomIndexes {
		if ix.Partitioned {
			parted = append(parted, ix.Name)
		} else {
			plain = append(plain, ix.Name)
		}
	}
	rows, err := pool.Query(ctx, randomIndexSizesSQL, now, plain, parted)
	if err != nil {
		return r, fmt.Errorf("read index sizes: %w", err)
	}
	var missing []string
	for rows.Next() {
		var name string
		var rel, table *string
		var bytes *int64
		if err := rows.Scan(&name, &rel, &table, &bytes); err != nil {
			return r, fmt.Errorf("read index sizes: %w", err)
		}
		if rel == nil || table == nil || bytes == nil {
			missing = append(missing, name)
			continue
		}
		r.Indexes = append(r.Indexes, IndexSize{Index: name, Relation: *rel, Table: *table, Bytes: *bytes})
	}
	if err := rows.Err(); err != nil {
		return r, fmt.Errorf("read index sizes: %w", err)
	}
	if len(missing) > 0 {
		return r, fmt.Errorf("read index sizes: no index %v in this database (a migration renamed it?)", missing)
	}
	return r, nil
}

var unitRE = regexp.MustCompile(`^([0-9]*)(B|kB|MB|GB|TB)$`)

// UnitBytes is the number of bytes of one unit of a memory setting as
// pg_settings.unit shows it ("8kB" for shared_buffers: blocks of BLCKSZ,
// "kB" for work_mem, "MB", "B").
func UnitBytes(unit string) (int64, error) {
	m := unitRE.FindStringSubmatch(unit)
	if m == nil {
		return 0, fmt.Errorf("unit %q is not a memory unit", unit)
	}
	n := int64(1)
	if m[1] != "" {
		var err error
		if n, err = strconv.ParseInt(m[1], 10, 64); err != nil || n <= 0 {
			return 0, fmt.Errorf("unit %q is not a memory unit", unit)
		}
	}
	scale := map[string]int64{"B": 1, "kB": 1 << 10, "MB": 1 << 20, "GB": 1 << 30, "TB": 1 << 40}[m[2]]
	return n * scale, nil
}
