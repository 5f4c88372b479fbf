package postgres

import (
	"context"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"
)

// MinRetainHorizon is the shortest retention horizon Retain accepts: well
// past the pairing window (minutes to an hour either side of a blood gas),
// so that a blood gas reported late still finds the readings around it.
const MinRetainHorizon = 24 * time.Hour

// RetainOptions says what Retain removes.
type RetainOptions struct {
	// Horizon: ventilator readings whose every version is older than
	// AsOf - Horizon (effective time) may go. At least MinRetainHorizon.
	Horizon time.Duration
	// AsOf is the time the horizon is measured back from (zero: now).
	AsOf time.Time
	// Apply removes; without it Retain only counts (a dry run).
	Apply bool
}

// RetainReport says what Retain removed (or, in a dry run, would remove).
type RetainReport struct {
	Cutoff   time.Time
	Applied  bool
	Patients int   // patients with something to remove
	Facts    int64 // fact rows (every version of each removed reading)
	Keys     int64 // readings (fact keys)
	Messages int64 // inbox rows whose payload is dropped (the inbox key stays, for dedup)
	Bytes    int64 // bytes of those fact rows and payloads (pg_column_size)
}

// retainCandidatesSQL lists, for one patient ($1 hash), the fact keys Retain
// may remove: ventilator readings (fhirmap.IsVentilatorReading) whose every
// version is of this patient, a ventilator quantity and older than $2, and
// that no derivation or refusal cites nor a refusal's detail may name
// (retainNearestSQL) (any version: a cited reading keeps
// all its versions, so that what a recomputation sees as its latest version
// does not change). The cited keys are one hashed set (NOT IN over NOT
// NULL columns): as NOT EXISTS, the planner estimated one candidate and
// scanned derivation_input once per reading (3.1 s a patient on the demo
// store, against tens of milliseconds). The patient is written as the
// expression of fact_row_patient_ref_effective: since migration 0017
// (patient_ref, quantity, effective) holds no ventilator quantity, and the
// patient's old readings are read through that expression index.
const retainCandidatesSQL = `
SELECT DISTINCT f.key FROM fact f
WHERE (f.patient_ref || '') = $1 AND f.effective < $2
  AND f.quantity IN (` + ventilatorQuantitiesSQL + `)
  AND NOT EXISTS (SELECT 1 FROM fact g WHERE hashtextextended(g.key, 0) = hashtextextended(f.key, 0) AND g.key = f.key
      AND (g.patient_ref <> $1 OR g.effective >= $2 OR g.quantity NOT IN (` + ventilatorQuantitiesSQL + `)))
  AND f.key NOT IN (SELECT fact_key FROM derivation_input UNION ALL SELECT fact_key FROM refusal_input)
  AND f.key NOT IN (` + retainNearestSQL + `)`

// retainNearestSQL lists the readings a refusal's detail may name without
// citing them: the ventilator readings nearest before and after each
// refusal's pairing window (its settings snapshot's window; the default 30
// min before, 10 min after for a refusal recorded before snapshots). The
// service loads the eight nearest on each side into a snapshot for the
// detail of "no-ventilator-data-in-window" ("the nearest is 1 h 28 min
// before the blood gas"), and audit verify loads them again to reproduce
// it; sixteen per side are kept so that ties at the edge cannot drop one.
const retainNearestSQL = `
SELECT n.key FROM (
    SELECT DISTINCT
        r.effective - coalesce((s.snapshot::jsonb -> 'site' -> 'Window' ->> 'Before')::bigint / 1000, 1800000000)
            * interval '1 microsecond' AS lo,
        r.effective + coalesce((s.snapshot::jsonb -> 'site' -> 'Window' ->> 'After')::bigint / 1000, 600000000)
            * interval '1 microsecond' AS hi
    FROM refusal r LEFT JOIN site_settings s ON s.digest = r.settings_digest
    WHERE r.patient_ref = $1) w
CROSS JOIN LATERAL (
    (SELECT b.key FROM fact b WHERE (b.patient_ref || '') = $1 AND b.effective < w.lo
       AND b.quantity IN (` + ventilatorQuantitiesSQL + `) ORDER BY b.effective DESC LIMIT 16)
    UNION ALL
    (SELECT a.key FROM fact a WHERE (a.patient_ref || '') = $1 AND a.effective > w.hi
       AND a.quantity IN (` + ventilatorQuantitiesSQL + `) ORDER BY a.effective LIMIT 16)) n`

const (
	// retainSizeSQL counts what removing the keys $1 removes: fact rows
	// and their bytes, and the payloads dropped with their bytes. A fact
	// row names its message by inbox id, or by inbox key when it has no
	// inbox row (migration 0016).
	retainSizeSQL = `
WITH gone AS (
    SELECT coalesce(i.inbox_key, r.inbox_key) AS inbox_key, count(*) AS n, sum(pg_column_size(r.*)) AS bytes
    FROM fact_row r LEFT JOIN inbox i ON i.id = r.inbox_id
    WHERE hashtextextended(r.key, 0) = ANY(ARRAY(SELECT hashtextextended(k, 0) FROM unnest($1::text[]) AS k))
      AND r.key = ANY($1::text[]) AND r.effective < $2 GROUP BY 1)
SELECT coalesce(sum(g.n), 0)::bigint, coalesce(sum(g.bytes), 0)::bigint,
       count(*) FILTER (WHERE g.n = i.facts AND i.raw IS NOT NULL)::bigint,
       coalesce(sum(pg_column_size(i.raw)) FILTER (WHERE g.n = i.facts AND i.raw IS NOT NULL), 0)::bigint
FROM gone g JOIN inbox i ON i.inbox_key = g.inbox_key`

	// retainApplySQL removes the keys $1 and the payloads of the messages
	// all of whose facts went with them. Every version of a candidate is
	// older than the cutoff $2, so the bound changes nothing in what goes;
	// it lets PostgreSQL prune fact_row to the monthly partitions before
	// the cutoff (and the default one), so a patient's batch touches old
	// partitions only and the partitions being written are not scanned.
	retainApplySQL = `
WITH gone AS (
    DELETE FROM fact_row WHERE hashtextextended(key, 0) = ANY(ARRAY(SELECT hashtextextended(k, 0) FROM unnest($1::text[]) AS k))
        AND key = ANY($1::text[]) AND effective < $2
    RETURNING inbox_id, inbox_key),
counted AS (
    SELECT coalesce(i.inbox_key, g.inbox_key) AS inbox_key, count(*) AS n
    FROM gone g LEFT JOIN inbox i ON i.id = g.inbox_id GROUP BY 1)
UPDATE inbox i SET raw = NULL FROM counted c
WHERE i.inbox_key = c.inbox_key AND c.n = i.facts AND i.raw IS NOT NULL`
)

// Retain removes, patient by patient, the ventilator readings no
// derivation or refusal cites and that are older than the horizon, and the
// stored payload of every message all of whose stored facts it removed
// (the inbox row itself stays: it is what makes a redelivered message a
// duplicate). Everything a derivation or refusal cites is kept, with every
// version of it, and so is every blood gas and patient-level fact.
//
// Each patient is one transaction under the same advisory lock as ingest
// (lockPatientSQL), so no blood gas being recorded for that patient can
// cite a reading while it is removed; a transaction touches one patient's
// old readings only, never a long lock on a table. It needs DELETE on fact
// and UPDATE on inbox: the schema owner, not the service's writer role.
func Retain(ctx context.Context, pool *pgxpool.Pool, o RetainOptions) (RetainReport, error) {
	if o.Horizon < MinRetainHorizon {
		return RetainReport{}, fmt.Errorf("retention horizon %v is shorter than %v", o.Horizon, MinRetainHorizon)
	}
	asOf := o.AsOf
	if asOf.IsZero() {
		asOf = time.Now()
	}
	rep := RetainReport{Cutoff: asOf.Add(-o.Horizon).UTC(), Applied: o.Apply}
	if o.Apply {
		if err := EnsurePartitions(ctx, pool, asOf); err != nil {
			return rep, err
		}
	}
	rows, err := pool.Query(ctx, `
SELECT DISTINCT patient_ref FROM fact
WHERE effective < $1 AND quantity IN (`+ventilatorQuantitiesSQL+`) ORDER BY 1`, rep.Cutoff)
	if err != nil {
		return rep, fmt.Errorf("retain: patients: %w", err)
	}
	type patient struct{ ref string }
	ps, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (patient, error) {
		var p patient
		return p, r.Scan(&p.ref)
	})
	if err != nil {
		return rep, fmt.Errorf("retain: patients: %w", err)
	}
	for _, p := range ps {
		var keys, facts, msgs, size int64
		err := pgx.BeginFunc(ctx, pool, func(tx pgx.Tx) error {
			if _, err := tx.Exec(ctx, lockPatientSQL, p.ref); err != nil {
				return err
			}
			var ks []string
			rows, err := tx.Query(ctx, retainCandidatesSQL, p.ref, rep.Cutoff)
			if err != nil {
				return err
			}
			if ks, err = pgx.CollectRows(rows, pgx.RowTo[string]); err != nil {
				return err
			}
			if len(ks) == 0 {
				return nil
			}
			keys = int64(len(ks))
			// The messages all of whose facts go: every fact the message
			// held is stored under its inbox key and is removed (the inbox
			// row counts them; a fact an earlier message had already stored
			// keeps that message's key, and then this payload is kept).
			var rawBytes, factBytes int64
			if err := tx.QueryRow(ctx, retainSizeSQL, ks, rep.Cutoff).Scan(&facts, &factBytes, &msgs, &rawBytes); err != nil {
				return err
			}
			size = factBytes + rawBytes
			if !o.Apply {
				return nil
			}
			_, err = tx.Exec(ctx, retainApplySQL, ks, rep.Cutoff)
			return err
		})
		if err != nil {
			return rep, translate("retain", err, false)
		}
		if keys > 0 {
			rep.Patients++
			rep.Keys += keys
			rep.Facts += facts
			rep.Messages += msgs
			rep.Bytes += size
		}
	}
	return rep, nil
}

// EnsurePartitions creates the monthly partitions of fact_row (migration
// 0014) that are missing from the month before now through three months
// after it. The service calls it at start and retain before it removes
// anything; a fact of a month without a partition still goes to the
// default partition, so a missing one costs speed, never a fact.
func EnsurePartitions(ctx context.Context, pool *pgxpool.Pool, now time.Time) error {
	_, err := pool.Exec(ctx, `SELECT ventderive_fact_partitions($1, $2)`,
		now.AddDate(0, -1, 0).UTC(), now.AddDate(0, 3, 0).UTC())
	if err != nil {
		return fmt.Errorf("fact partitions: %w", err)
	}
	return nil
}
