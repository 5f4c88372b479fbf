package postgres

import (
	"context"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"slices"
	"strings"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgtype"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// Store is the PostgreSQL provenance store. It is safe for concurrent use.
type Store struct {
	pool *pgxpool.Pool
	key  []byte
	log  *slog.Logger
	now  func() time.Time
	// lookups caches committed fact_term and fact_encounter ids (lookup.go).
	lookups *lookupCache
}

var _ consumer.Store = (*Store)(nil)

// Options configures a Store.
type Options struct {
	// PatientKey is the site's secret for consumer.PatientHash. It should
	// be at least 32 random bytes; an empty key still works but the hashes
	// can then be reversed by trying known identifiers (New logs a warning).
	PatientKey []byte
	// Logger receives operational messages; nil discards them.
	Logger *slog.Logger
	// Now is the clock for recorded and created times; nil means time.Now.
	// Tests fix it for golden output.
	Now func() time.Time
}

// New returns a Store over pool. The pool's role needs the rights
// deploy/postgres/roles.sql gives ventderive_writer.
func New(pool *pgxpool.Pool, opts Options) *Store {
	s := &Store{pool: pool, key: opts.PatientKey, log: opts.Logger, now: opts.Now, lookups: newLookupCache()}
	if s.log == nil {
		s.log = slog.New(slog.DiscardHandler)
	}
	if s.now == nil {
		s.now = time.Now
	}
	if len(s.key) == 0 {
		s.log.Warn("patient hash key is empty: patient hashes are not protected")
	}
	return s
}

// hash is the keyed patient hash stored beside the patient reference of
// every derivation, refusal and head (fact rows hold the reference only
// since migration 0012).
func (s *Store) hash(ref string) string { return consumer.PatientHash(s.key, ref) }

// inTx runs fn in a transaction and translates errors, telling a failed
// COMMIT (outcome unknown) from a failure inside fn.
func (s *Store) inTx(ctx context.Context, op string, fn func(pgx.Tx) error) error {
	fnDone := false
	err := pgx.BeginFunc(ctx, s.pool, func(tx pgx.Tx) error {
		if err := fn(tx); err != nil {
			return err
		}
		fnDone = true
		return nil
	})
	return translate(op, err, fnDone)
}

// Patient-level quantities: a new one reopens the patient's recent blood
// gases, and every fact of them is in each snapshot (they are not bound to
// the pairing window). The patient's PaCO2 goal, the apparatus dead space
// of the patient's circuit and the patient's airway are standing facts
// (fhirmap.Select): they hold from their time until replaced, so they are
// patient-level too.
var patientLevel = []string{string(fhirmap.QSex), string(fhirmap.QBirthDate), string(fhirmap.QHeight), string(fhirmap.QWeight),
	string(fhirmap.QTargetPaCO2), string(fhirmap.QApparatusVD), string(fhirmap.QAirway)}

const (
	// pointLookupsSQL starts every ingest transaction. Its statements are
	// point lookups through indexes by design, and pgx prepares them, so
	// PostgreSQL may cache a generic plan per connection. A plan made
	// while a table was small (a new database) picks sequential scans and
	// keeps them for the life of the connection, while the table grows:
	// each message then reads whole tables. Sequential scans are never the
	// right plan here, so the transaction rules them out; other sessions
	// and transactions are not affected.
	//
	// It also keeps the generic plan: by default PostgreSQL may decide,
	// from its estimates, to plan the snapshot statements afresh for every
	// execution (a custom plan, 200-400 us of planning each, three per
	// message), which gives the same index lookups here.
	//
	// And it turns JIT off. A generic plan's estimated cost scales with the
	// rows per patient the statistics show (a long stay, a unit of few
	// beds); past jit_above_cost (100,000 by default) PostgreSQL compiles
	// the snapshot statement at every execution, not once per plan:
	// 830 ms per message measured, against 1.5 ms without, and point
	// lookups gain nothing from compiled expressions. The JIT setting is
	// read at execution, so it also covers plans cached before it was set.
	//
	// And it rules out parallel plans. On the bench's drained store (42,888
	// facts) the generic plan of snapshotFactsSQL gathered its key lookups
	// from parallel workers: 31-78 ms an execution on the loaded two-CPU
	// machine, against 6-17 ms without (EXPLAIN ANALYZE EXECUTE, three runs
	// each), as starting workers costs more than the few index pages a
	// lookup reads. The setting is read when a plan is made (the
	// statements' plans are made in these transactions: WarmConn).
	// All four settings end with the transaction.
	pointLookupsSQL = `SELECT set_config('enable_seqscan', 'off', true), set_config('plan_cache_mode', 'force_generic_plan', true),
    set_config('jit', 'off', true), set_config('max_parallel_workers_per_gather', '0', true)`

	// claimInboxSQL claims the message's inbox key (hex, stored as its 32
	// bytes) and stores its subject as an inbox_subject id, inserting a
	// subject not stored yet as claimInboxesSQL does (migration 0019).
	claimInboxSQL = `
WITH ns AS (
    INSERT INTO inbox_subject (subject)
    SELECT $2::text WHERE NOT EXISTS (SELECT 1 FROM inbox_subject x WHERE x.subject = $2::text)
    ON CONFLICT (subject) DO UPDATE SET subject = EXCLUDED.subject
    RETURNING id
)
INSERT INTO inbox (inbox_key, subject_id, stream_seq, received, recorded_at, resources, facts, raw)
VALUES (decode($1, 'hex'), coalesce((SELECT x.id FROM inbox_subject x WHERE x.subject = $2::text), (SELECT id FROM ns)),
    $3, $4, $5, $6, $7, $8)
ON CONFLICT (inbox_key) DO NOTHING`

	// One lock per patient, taken in sorted order by the caller so that two
	// messages about the same patients cannot deadlock.
	lockPatientSQL = `SELECT pg_advisory_xact_lock(hashtextextended('ventderive/patient/' || $1::text, 0))`

	// insertFactsSQL stores facts into fact_row (migrations 0014 and
	// 0016): each array holds one element per fact; $24 is the fact's inbox
	// key (hex) and $25 the time recorded. The encounter and term are
	// looked up in their lookup tables; one this snapshot does not see is
	// inserted, and ON CONFLICT DO UPDATE (a no-op update) returns its id
	// even when a concurrent transaction committed it first. The message's
	// inbox row, stored earlier in the same transaction, gives the fact's
	// inbox_id; the recording time is stored only when it is not the inbox
	// row's, the inbox key only when there is no inbox row, and the source
	// value only when its bytes differ from the value's (the view fact
	// restores all three). $26 and $27 are the term and encounter ids the
	// Store has cached (lookup.go), 0 where it has none: only those are
	// matched or inserted in SQL. ON CONFLICT names the unique index of
	// migration 0017, (hashtextextended(key, 0), digest, effective); a fact
	// it skipped is checked afterwards (guardSkipped).
	insertFactsSQL = `
WITH u AS MATERIALIZED (
    SELECT * FROM unnest($1::text[], $2::bytea[], $3::text[], $4::text[], $5::timestamptz[], $6::text[], $7::text[],
        $8::text[], $9::text[], $10::text[], $11::text[], $12::boolean[], $13::float8[], $14::text[], $15::text[],
        $16::float8[], $17::text[], $18::text[], $19::text[], $20::text[], $21::text[], $22::timestamptz[],
        $23::timestamptz[], $24::text[], $26::int[], $27::int[])
    AS u(key, digest, resource_ref, version_id, last_updated, patient_ref, encounter,
        quantity, origin, detail, specimen, temp_corrected, value, unit, text, source_value, source_unit,
        code_system, code, code_display, status, effective, issued, inbox_key, term_id, encounter_id)
), ne AS (
    INSERT INTO fact_encounter (encounter)
    SELECT DISTINCT u.encounter FROM u
    WHERE u.encounter_id = 0 AND NOT EXISTS (SELECT 1 FROM fact_encounter e WHERE e.encounter = u.encounter)
    ON CONFLICT (encounter) DO UPDATE SET encounter = EXCLUDED.encounter
    RETURNING id, encounter
), nt AS (
    INSERT INTO fact_term (quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit,
        code_system, code, code_display, status)
    SELECT DISTINCT u.quantity, u.origin, u.detail, u.specimen, u.temp_corrected, u.unit, u.text, u.source_unit,
        u.code_system, u.code, u.code_display, u.status FROM u
    WHERE u.term_id = 0 AND NOT EXISTS (SELECT 1 FROM fact_term t WHERE ` + termMatchSQL + `)
    ON CONFLICT ON CONSTRAINT fact_term_values DO UPDATE SET quantity = EXCLUDED.quantity
    RETURNING id, quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit,
        code_system, code, code_display, status
)
INSERT INTO fact_row (inbox_id, effective, value, source_value, last_updated, issued, recorded_at, encounter_id,
    term_id, key, digest, patient_ref, quantity, version_id, resource_ref, inbox_key)
SELECT i.id, u.effective, u.value,
    CASE WHEN float8send(u.source_value) = float8send(u.value) THEN NULL ELSE u.source_value END,
    u.last_updated, u.issued,
    CASE WHEN i.recorded_at = $25::timestamptz THEN NULL ELSE $25::timestamptz END,
    CASE WHEN u.encounter_id <> 0 THEN u.encounter_id
         ELSE coalesce((SELECT e.id FROM fact_encounter e WHERE e.encounter = u.encounter),
                       (SELECT e.id FROM ne e WHERE e.encounter = u.encounter)) END,
    CASE WHEN u.term_id <> 0 THEN u.term_id
         ELSE coalesce((SELECT t.id FROM fact_term t WHERE ` + termMatchSQL + `),
                       (SELECT t.id FROM nt t WHERE ` + termMatchSQL + `)) END,
    u.key, u.digest, u.patient_ref, u.quantity, u.version_id, nullif(u.resource_ref, split_part(u.key, '#', 1)),
    CASE WHEN i.id IS NULL THEN decode(u.inbox_key, 'hex') END
FROM u LEFT JOIN inbox i ON i.inbox_key = decode(u.inbox_key, 'hex')
ON CONFLICT (hashtextextended(key, 0), digest, effective) DO NOTHING`

	// termMatchSQL matches a fact_term row t to a fact u.
	termMatchSQL = `t.quantity = u.quantity AND t.origin = u.origin AND t.detail = u.detail
        AND t.specimen = u.specimen AND t.temp_corrected = u.temp_corrected AND t.unit = u.unit AND t.text = u.text
        AND t.source_unit = u.source_unit AND t.code_system = u.code_system AND t.code = u.code
        AND t.code_display = u.code_display AND t.status = u.status`

	// affectedCTE works out the affected blood gases of one patient.
	// $1 patient reference, $2 keys of the message's facts, $3 window before and
	// $4 window after (microseconds), $5 horizon (microseconds), $6
	// patient-level quantities, $7 the blood-gas quantity, $8 the inbox key.
	// changed holds the patient's stored versions of each key that this
	// message brought a new version of (new rows carry this message's inbox
	// key), whatever patient the new version names: a fact moved to another
	// patient (a corrected subject) changes its old patient too.
	//
	// Facts are looked up by key (the unique index, by the key's hash since
	// migration 0017, with key = ... as the recheck) and only
	// then filtered by patient, in MATERIALIZED steps the planner cannot
	// reorder: a plan that found them through the patient's index and
	// filtered by key read the patient's whole history for every message,
	// which grows without bound (a ventilated patient adds thousands of
	// facts a day).
	//
	// Every lookup of a patient's facts by time (a window around a fact or
	// a blood gas) or by quantity (the patient-level facts) runs as a
	// LATERAL subquery with OFFSET 0, which PostgreSQL may not flatten: an
	// index scan per window or quantity on both columns, whatever the
	// estimates. As plain joins and filters, generic plans read every fact
	// of the patient and filtered them: without statistics (a connection
	// opened on a grown store: a restart, the pool's hourly renewal) the
	// window join read 10,131 rows to keep 285 at 24 h of one bed (11 ms per
	// message); with statistics, the patient-level lookup read all 23,141
	// facts of a 96 h stay to keep 0 (6.4 ms). Both grow with the stay.
	//
	// A lookup over every quantity of a patient (a blood gas's window, the
	// nearest readings outside it) writes the patient as
	// (f.patient_ref || ''), the expression of fact_patient_ref_effective
	// (migration 0012); a lookup by patient and quantity writes plain
	// f.patient_ref, which only fact_row_patient_ref_quantity_effective
	// serves (since migration 0017 a partial index over
	// indexedQuantitiesSQL, which each such lookup repeats). Without that
	// split a generic plan took the smaller index for lookups by quantity
	// and filtered the window's every quantity.
	//
	// Only the first lookup (cand: it needs each version's inbox key) and
	// the snapshot's last (found: the columns handed to the plan) read the
	// view fact; every other lookup reads fact_row itself, as it needs no
	// column of the lookup tables or of inbox: each reference to the view
	// joined fact_term and fact_encounter again for every row it read (two
	// index lookups a row) and made the generic plan dearer to make. The
	// rows are the same: every fact row names a term and an encounter row
	// (the writer resolves or inserts them), and lookup rows are never
	// deleted. On the bench's drained store (42,888 facts) snapshotFactsSQL
	// went from 6.8-7.4 ms to 4.6 ms (fastest of 31 executions each) and a
	// connection's WarmConn from 60-108 ms to 43-51 ms;
	// BenchmarkIngestGroupReadings gas=stored: PostgreSQL CPU 3,255-3,682
	// -> 2,510-2,531 us a message (paired runs).
	//
	// Body temperatures ($11, the body-temp quantity) are paired in a window
	// of their own ($9 before, $10 after a blood gas): a new one reopens the
	// blood gases of that window, and the snapshot adds them by a lateral
	// lookup on (patient_ref, quantity, effective) per affected blood gas,
	// so the wider window costs no ventilator readings.
	affectedCTE = `
WITH cand AS MATERIALIZED (
    SELECT f.quantity, f.effective, f.key, f.patient_ref, f.inbox_key FROM fact f
    WHERE hashtextextended(f.key, 0) = ANY(ARRAY(SELECT hashtextextended(k, 0) FROM unnest($2::text[]) AS k))
      AND f.key = ANY($2::text[])
), changed AS (
    SELECT c.quantity, c.effective, c.key FROM cand c
    WHERE c.patient_ref = $1
      AND EXISTS (SELECT 1 FROM cand n WHERE n.key = c.key AND n.inbox_key = $8)
), affected AS (
    SELECT key FROM changed WHERE quantity = $7::text
    UNION
    SELECT b.key FROM fact_row b
    WHERE b.patient_ref = $1 AND b.quantity = $7::text AND b.quantity IN (` + indexedQuantitiesSQL + `)
      AND EXISTS (SELECT 1 FROM changed WHERE quantity = ANY($6::text[]))
      AND b.effective >= (SELECT max(effective) FROM fact_row WHERE patient_ref = $1 AND quantity = $7::text
                              AND quantity IN (` + indexedQuantitiesSQL + `))
                         - $5::bigint * interval '1 microsecond'
    UNION
    SELECT b.key FROM changed c CROSS JOIN LATERAL (
        SELECT b.key FROM fact_row b
        WHERE b.patient_ref = $1 AND b.quantity = $7::text AND b.quantity IN (` + indexedQuantitiesSQL + `)
          AND b.effective BETWEEN c.effective - CASE WHEN c.quantity = $11::text THEN $10::bigint ELSE $4::bigint END * interval '1 microsecond'
                              AND c.effective + CASE WHEN c.quantity = $11::text THEN $9::bigint ELSE $3::bigint END * interval '1 microsecond'
        OFFSET 0) b
    WHERE c.quantity <> $7::text AND NOT c.quantity = ANY($6::text[])
)`

	// otherPatientsSQL lists the patients, other than the message's, that
	// hold a version of one of the message's fact keys: a new version that
	// names another patient moves the fact, and its old patient's values
	// must be recomputed (or withdrawn) too.
	otherPatientsSQL = `
SELECT DISTINCT patient_ref FROM fact
WHERE hashtextextended(key, 0) = ANY(ARRAY(SELECT hashtextextended(k, 0) FROM unnest($1::text[]) AS k))
  AND key = ANY($1::text[]) AND patient_ref <> ALL($2::text[])
ORDER BY 1`

	affectedSQL = affectedCTE + `
SELECT DISTINCT key FROM affected ORDER BY key`

	snapshotFactsSQL = affectedCTE + `,
gas AS MATERIALIZED (
    SELECT b.effective, b.patient_ref FROM fact_row b WHERE hashtextextended(b.key, 0) = ANY(ARRAY(SELECT hashtextextended(key, 0) FROM affected))
      AND b.key = ANY(ARRAY(SELECT key FROM affected))
), win AS (
    SELECT g.effective - $3::bigint * interval '1 microsecond' AS lo,
           g.effective + $4::bigint * interval '1 microsecond' AS hi
    FROM gas g WHERE g.patient_ref = $1
), keys AS (
    SELECT key FROM affected
    UNION SELECT l.key FROM unnest($6::text[]) AS q(quantity) CROSS JOIN LATERAL (
        SELECT f.key FROM fact_row f WHERE f.patient_ref = $1 AND f.quantity = q.quantity
          AND f.quantity IN (` + indexedQuantitiesSQL + `)
        OFFSET 0) l
    UNION SELECT w.key FROM win CROSS JOIN LATERAL (
        SELECT f.key FROM fact_row f WHERE (f.patient_ref || '') = $1 AND f.effective BETWEEN win.lo AND win.hi
        OFFSET 0) w
    UNION SELECT n.key FROM win CROSS JOIN LATERAL (
        SELECT f.key FROM fact_row f WHERE (f.patient_ref || '') = $1 AND f.effective < win.lo
          AND f.quantity IN (` + ventilatorQuantitiesSQL + `)
        ORDER BY f.effective DESC LIMIT ` + nearestOutside + `) n
    UNION SELECT n.key FROM win CROSS JOIN LATERAL (
        SELECT f.key FROM fact_row f WHERE (f.patient_ref || '') = $1 AND f.effective > win.hi
          AND f.quantity IN (` + ventilatorQuantitiesSQL + `)
        ORDER BY f.effective LIMIT ` + nearestOutside + `) n
    UNION SELECT t.key FROM gas g CROSS JOIN LATERAL (
        SELECT f.key FROM fact_row f WHERE f.patient_ref = $1 AND f.quantity = $11::text
          AND f.quantity IN (` + indexedQuantitiesSQL + `) AND f.effective BETWEEN g.effective - $9::bigint * interval '1 microsecond'
                              AND g.effective + $10::bigint * interval '1 microsecond'
        OFFSET 0) t
    WHERE g.patient_ref = $1
), found AS MATERIALIZED (
    SELECT id, ` + factColumns + `
    FROM fact WHERE hashtextextended(key, 0) = ANY(ARRAY(SELECT hashtextextended(key, 0) FROM keys))
      AND key = ANY(ARRAY(SELECT key FROM keys)) AND EXISTS (SELECT 1 FROM affected)
)
SELECT ` + factColumns + `
FROM found WHERE patient_ref = $1 OR key = ANY($2::text[])
ORDER BY id`

	// ventilatorQuantitiesSQL lists the quantities fhirmap counts as
	// ventilator readings (fhirmap.IsVentilatorReading; a test keeps the
	// two in step). The snapshot loads, besides each blood gas's window,
	// the nearestOutside readings of these quantities just before and just
	// after the window: a blood gas refused with
	// "no-ventilator-data-in-window" then names the nearest reading in its
	// stored detail, as "ventderive derive" over the same data prints it.
	// Several are loaded because the nearest may be of another encounter
	// or unusable; they are outside the window, so no value uses them.
	ventilatorQuantitiesSQL = `'minute-volume', 'tidal-volume', 'resp-rate', 'petco2', 'vco2', 'peco2',
              'peep', 'plateau', 'mean-airway', 'fetco2'`
	nearestOutside = `8`

	// indexedQuantitiesSQL lists the quantities that
	// fact_row_patient_ref_quantity_effective holds (migration 0017: a
	// partial index): the blood gas, the body temperature and the
	// patient-level quantities (patientLevel), the only ones looked up by
	// patient and quantity. Every such lookup repeats this literal list
	// beside its "quantity = $n", so that a generic plan, which cannot know
	// $n, may still use the partial index; a test keeps the list in step
	// with the Go lists and the index's predicate. Lookups of other
	// quantities go through ((patient_ref || ''), effective).
	indexedQuantitiesSQL = `'pco2', 'body-temp', 'sex', 'birth-date', 'body-height', 'body-weight',
              'target-paco2', 'apparatus-dead-space', 'airway'`

	// factsMissingSQL is the collision guard of the unique index on
	// (hashtextextended(key, 0), digest, effective) (migration 0017). It runs
	// after an insertFactsSQL that stored fewer rows than it was given
	// (later statements see the insert's rows and every committed row) and
	// counts the given facts ($1 keys, $2 digests, $3 effective times) that
	// have no stored row with the same key, digest and effective time. A
	// fact the insert skipped is a stored version of itself, unless its key
	// shares its 64-bit hash, digest and effective time with another key's
	// row: then ON CONFLICT DO NOTHING dropped it, and the writer refuses
	// the message (ErrFactKeyCollision) instead of acknowledging a fact it
	// did not store.
	factsMissingSQL = `
SELECT count(*) FROM unnest($1::text[], $2::bytea[], $3::timestamptz[]) AS u(key, digest, effective)
WHERE NOT EXISTS (
    SELECT 1 FROM fact_row r
    WHERE hashtextextended(r.key, 0) = hashtextextended(u.key, 0) AND r.key = u.key
      AND r.digest = u.digest AND r.effective = u.effective)`

	// The heads of each affected blood gas by both index columns (a
	// lateral lookup per blood gas, as above): filtering the patient's
	// heads instead reads every head of the stay.
	snapshotHeadsSQL = affectedCTE + `
SELECT h.key, h.kind, h.version, h.digest, h.refused, h.status, h.value
FROM affected a CROSS JOIN LATERAL (
    SELECT key, kind, version, digest, refused, status, value FROM head
    WHERE patient_ref = $1 AND blood_gas_key = a.key
    OFFSET 0) h
ORDER BY h.key`

	factColumns = `key, digest, resource_ref, version_id, last_updated, patient_ref, encounter, quantity, origin,
    detail, specimen, temp_corrected, value, unit, text, source_value, source_unit, code_system, code,
    code_display, status, effective, issued`
)

const (
	insertDerivationSQL = `
WITH d AS (
    INSERT INTO derivation (key, version, observation_id, kind, patient_ref, patient_hash, encounter,
        blood_gas_key, effective, value, unit, method, method_version, constants, assumptions, basis,
        interp_code, interp_text, interp_source, flags, status, retracted, algorithm, digest,
        supersedes_id, inbox_key, created_at, record, settings_digest)
    VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10, $11, $12, $13, $14, $15, $16, $17, $18, $19, $20,
        $21, $22, $23, $24, (SELECT id FROM derivation WHERE key = $1 AND version = $2 - 1), decode($25, 'hex'), $26,
        $33::jsonb, nullif($34, ''))
    RETURNING id
), i AS (
    INSERT INTO derivation_input (derivation_id, ordinal, role, fact_key, fact_digest, resource_ref, time_offset, fallback)
    SELECT d.id, u.ord, u.role, u.fact_key, u.fact_digest, u.resource_ref, u.offset_us * interval '1 microsecond', u.fallback
    FROM d, unnest($27::text[], $28::text[], $29::text[], $30::text[], $31::bigint[], $32::text[])
         WITH ORDINALITY AS u(role, fact_key, fact_digest, resource_ref, offset_us, fallback, ord)
)
INSERT INTO head (key, kind, patient_ref, patient_hash, blood_gas_key, version, refused, derivation_id,
    refusal_id, digest, status, value, updated_at)
SELECT $1, $4, $5, $6, $8, $2, false, d.id, NULL, $24, $21, $10, $26 FROM d
ON CONFLICT (key) DO UPDATE SET version = EXCLUDED.version, refused = false,
    derivation_id = EXCLUDED.derivation_id, refusal_id = NULL, digest = EXCLUDED.digest,
    status = EXCLUDED.status, value = EXCLUDED.value, updated_at = EXCLUDED.updated_at`

	// A refusal moves the head to refused; version, status and value keep
	// describing the latest derivation version, if any.
	insertRefusalSQL = `
WITH r AS (
    INSERT INTO refusal (key, kind, patient_ref, patient_hash, blood_gas_key, effective, reason, detail,
        digest, inbox_key, created_at, settings_digest)
    VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, decode($10, 'hex'), $11, nullif($18, ''))
    RETURNING id
), i AS (
    INSERT INTO refusal_input (refusal_id, ordinal, role, fact_key, fact_digest, resource_ref, time_offset, fallback)
    SELECT r.id, u.ord, u.role, u.fact_key, u.fact_digest, u.resource_ref, u.offset_us * interval '1 microsecond', u.fallback
    FROM r, unnest($12::text[], $13::text[], $14::text[], $15::text[], $16::bigint[], $17::text[])
         WITH ORDINALITY AS u(role, fact_key, fact_digest, resource_ref, offset_us, fallback, ord)
)
INSERT INTO head (key, kind, patient_ref, patient_hash, blood_gas_key, version, refused, derivation_id,
    refusal_id, digest, status, value, updated_at)
SELECT $1, $2, $3, $4, $5, 0, true, NULL, r.id, $9, '', 0, $11 FROM r
ON CONFLICT (key) DO UPDATE SET refused = true, refusal_id = EXCLUDED.refusal_id,
    digest = EXCLUDED.digest, updated_at = EXCLUDED.updated_at`

	// A settings snapshot is written once, by the first message made
	// under it.
	insertSettingsSQL = `
INSERT INTO site_settings (digest, snapshot, algorithm, alias_digest, inbox_key, created_at)
SELECT $1, $2, s.snapshot::jsonb ->> 'algorithm', s.snapshot::jsonb ->> 'aliasDigest', decode($3, 'hex'), $4
FROM (SELECT $2::text AS snapshot) s
ON CONFLICT (digest) DO NOTHING`

	// insertOutboxSQL stores each payload compressed ($4, storedOutbox)
	// with the SHA-256 and length of its exact bytes ($7, $8).
	insertOutboxSQL = `
INSERT INTO outbox (subject, msg_id, headers, stored_payload, payload_sha256, payload_size, inbox_key, created_at)
SELECT u.subject, u.msg_id, u.headers::jsonb, u.payload, u.sum, u.size, decode($5, 'hex'), $6
FROM unnest($1::text[], $2::text[], $3::text[], $4::bytea[], $7::bytea[], $8::int[])
     WITH ORDINALITY AS u(subject, msg_id, headers, payload, sum, size, ord)
ORDER BY u.ord
ON CONFLICT (msg_id) DO NOTHING`
)

// knownAffectedCTE stands in for affectedCTE in the snapshot statements
// of loadSnapshots, which run after the patient's affectedSQL in the same
// transaction with no write in between: $8 (the inbox key, which only
// affectedCTE reads) then carries the affected blood gases affectedSQL
// returned, the same set, and the cand/changed/affected lookups of fact
// are not run again. typed is never read; it names the parameters only
// affectedCTE used, so that PostgreSQL still knows their types.
const knownAffectedCTE = `
WITH affected AS (SELECT unnest($8::text[]) AS key),
typed AS (SELECT $1::text, $2::text[], $3::bigint, $4::bigint, $5::bigint, $6::text[], $7::text, $9::bigint,
    $10::bigint, $11::text)`

// The snapshot statements with knownAffectedCTE.
var (
	snapshotFactsKnownSQL        = knownAffectedCTE + strings.TrimPrefix(snapshotFactsSQL, affectedCTE)
	snapshotHeadsKnownSQL        = knownAffectedCTE + strings.TrimPrefix(snapshotHeadsSQL, affectedCTE)
	snapshotHeadsPendingKnownSQL = knownAffectedCTE + strings.TrimPrefix(snapshotHeadsPendingSQL, affectedCTE)
)

// Ingest implements consumer.Store. Serialization failures and deadlocks
// are retried in place (up to three attempts, calling plan again); other
// transient failures are returned wrapped with consumer.ErrTransient.
func (s *Store) Ingest(ctx context.Context, msg consumer.Message, plan consumer.PlanFunc) (consumer.IngestResult, error) {
	var res consumer.IngestResult
	err := s.retry(ctx, "ingest", func() (err error) {
		res, err = s.ingestOnce(ctx, msg, plan)
		return err
	})
	if err == nil {
		s.loadWanted(ctx)
	}
	return res, err
}

// ingestTries bounds the attempts at one transaction that failed with a
// serialization failure or a deadlock.
const ingestTries = 3

// retry runs fn until it succeeds, fails with an error retryInPlace does not
// accept, or has been tried ingestTries times, waiting 20 ms, then 40 ms
// between attempts.
func (s *Store) retry(ctx context.Context, op string, fn func() error) error {
	for attempt := 1; ; attempt++ {
		err := fn()
		if err == nil || attempt == ingestTries || !retryInPlace(err) || ctx.Err() != nil {
			return err
		}
		s.log.Debug(op+" retried", "attempt", attempt, "error", err)
		select {
		case <-time.After(time.Duration(attempt) * 20 * time.Millisecond):
		case <-ctx.Done():
		}
	}
}

// retryInPlace reports serialization failures and deadlocks: the
// transaction was rolled back by the server, so a new one is safe.
func retryInPlace(err error) bool {
	var dbErr *DBError
	return errors.As(err, &dbErr) && (dbErr.Code == "40001" || dbErr.Code == "40P01")
}

// patientPlan is one patient's part of an ingest.
type patientPlan struct {
	ref      string
	affected []string
	facts    []fhirmap.Fact
	current  []consumer.Stored
	changes  consumer.Changes
	// eager: the snapshot facts and heads were queued with the input
	// (queueInput), not by loadSnapshots.
	eager bool
}

func (s *Store) ingestOnce(ctx context.Context, msg consumer.Message, plan consumer.PlanFunc) (consumer.IngestResult, error) {
	var res consumer.IngestResult
	now := s.now().UTC()
	err := s.inTx(ctx, "ingest", func(tx pgx.Tx) error {
		// Round trip 1: claim, lock, store, then load what the new facts
		// affect (later statements of a batch see the earlier ones' rows).
		order := patientPlans(s, msg)
		b := &pgx.Batch{}
		b.Queue(pointLookupsSQL)
		b.Queue(claimInboxSQL, msg.InboxKey, msg.Subject, int64(msg.StreamSeq), msg.Received.UTC(), now,
			len(msg.Resources), len(msg.Facts), storedRaw(msg.Raw))
		for _, p := range order {
			b.Queue(lockPatientSQL, p.ref)
		}
		factArgs := s.queueInput(b, msg, order, now, nil)
		br := tx.SendBatch(ctx, b)
		defer br.Close()
		if _, err := br.Exec(); err != nil {
			return fmt.Errorf("plan settings: %w", err)
		}
		tag, err := br.Exec()
		if err != nil {
			return fmt.Errorf("claim inbox: %w", err)
		}
		if tag.RowsAffected() == 0 {
			return consumer.ErrDuplicate
		}
		for range order {
			if _, err := br.Exec(); err != nil {
				return fmt.Errorf("lock patient: %w", err)
			}
		}
		others, err := readInput(br, msg, order, &res)
		if err != nil {
			return err
		}
		if err := br.Close(); err != nil {
			return fmt.Errorf("store input: %w", err)
		}
		if err := guardSkipped(ctx, tx, res.Facts, factArgs); err != nil {
			return err
		}
		if err := s.loadSnapshots(ctx, tx, msg, order, nil); err != nil {
			return err
		}
		if len(others) > 0 {
			moved, err := s.loadMoved(ctx, tx, msg, others, nil)
			if err != nil {
				return err
			}
			order = append(order, moved...)
		}

		// Plan, outside the database.
		if err := planPatients(order, plan); err != nil {
			return err
		}

		// Round trip 2: write what the plans returned.
		b = &pgx.Batch{}
		w, err := s.queueChanges(b, msg, order, now, &res)
		if err != nil {
			return err
		}
		if b.Len() == 0 {
			return nil
		}
		br2 := tx.SendBatch(ctx, b)
		defer br2.Close()
		if err := s.readChanges(br2, w, &res); err != nil {
			return err
		}
		if err := br2.Close(); err != nil {
			return fmt.Errorf("write changes: %w", err)
		}
		return nil
	})
	if err != nil {
		return consumer.IngestResult{}, err
	}
	return res, nil
}

// patientPlans returns one empty plan per patient of msg, in sorted order.
func patientPlans(s *Store, msg consumer.Message) []*patientPlan {
	refs := messagePatients(msg)
	order := make([]*patientPlan, len(refs))
	for i, ref := range refs {
		order[i] = &patientPlan{ref: ref}
	}
	return order
}

// queueInput queues the statements that store a claimed message's facts
// and load, per patient, what the new facts affect. The resources are kept
// in the message's bytes, which the inbox row holds (migration 0011); no
// row per resource is written. It returns the fact insert's arguments
// (nil without facts), for guardSkipped.
func (s *Store) queueInput(b *pgx.Batch, msg consumer.Message, order []*patientPlan, now time.Time, pend *groupWrites) []any {
	if len(msg.Facts) == 0 {
		return nil
	}
	args := s.factArgs(msg, now)
	b.Queue(insertFactsSQL, args...)
	s.queueLookups(b, msg, order, pend)
	return args
}

// ErrFactKeyCollision refuses a message one of whose facts the insert
// neither stored nor found stored under its own key: its key shares the
// 64-bit hash of fact_row's unique index with another key's row of the
// same digest and effective time (factsMissingSQL). The message is not
// acknowledged as stored; it becomes a dead letter.
var ErrFactKeyCollision = errors.New("fact key hash collision: a fact was not stored and no stored row has its key, digest and effective time")

// guardSkipped checks, after an insertFactsSQL with arguments args that
// stored stored rows, that every fact it skipped is stored under its own
// key (factsMissingSQL). An insert that stored every fact needs no check.
func guardSkipped(ctx context.Context, tx pgx.Tx, stored int, args []any) error {
	if args == nil {
		return nil
	}
	keys := args[factArgKey].([]string)
	if stored >= len(keys) {
		return nil
	}
	var missing int
	if err := tx.QueryRow(ctx, factsMissingSQL, keys, args[factArgDigest], args[factArgEffective]).Scan(&missing); err != nil {
		return fmt.Errorf("check skipped facts: %w", err)
	}
	if missing > 0 {
		return fmt.Errorf("insert facts: %d of %d facts: %w", missing, len(keys), ErrFactKeyCollision)
	}
	return nil
}

// queueLookups queues what queueInput queues after the fact insert: the
// other patients of the message's keys and, per patient, the affected blood
// gases (and the snapshot, when eager).
func (s *Store) queueLookups(b *pgx.Batch, msg consumer.Message, order []*patientPlan, pend *groupWrites) {
	if len(msg.Facts) > 0 {
		b.Queue(otherPatientsSQL, factKeys(msg), messagePatients(msg))
		eager := surelyAffects(msg)
		for _, p := range order {
			p.eager = eager
		}
		if eager {
			s.queueSnapshots(b, msg, order, pend)
		} else {
			s.queueAffected(b, msg, order)
		}
	}
}

// surelyAffects reports a message that affects a blood gas whenever it is
// stored: one with a blood gas (a new version of it is affected) or a
// patient-level fact (which reopens the patient's recent gases, if any).
// Its snapshot statements travel with its inserts, as before the cheap
// path, rather than one round trip later: these are the messages whose
// latency to a derived output counts.
func surelyAffects(msg consumer.Message) bool {
	for _, f := range msg.Facts {
		if f.Quantity == fhirmap.QPCO2 || slices.Contains(patientLevel, string(f.Quantity)) {
			return true
		}
	}
	return false
}

// queueAffected queues, per patient, the blood gases the message's facts
// affect: the only snapshot statement most messages need (a reading that
// arrives before its gas affects none). loadSnapshots then loads facts and
// heads for the patients with affected gases only.
func (s *Store) queueAffected(b *pgx.Batch, msg consumer.Message, order []*patientPlan) {
	for _, p := range order {
		b.Queue(affectedSQL, snapshotArgs(msg, p)...)
	}
}

// snapshotArgs are the arguments of affectedCTE's statements.
func snapshotArgs(msg consumer.Message, p *patientPlan) []any {
	tw := msg.TempWindow
	if tw == (fhirmap.Window{}) {
		tw = msg.Window
	}
	return []any{p.ref, factKeys(msg), msg.Window.Before.Microseconds(), msg.Window.After.Microseconds(),
		msg.Horizon.Microseconds(), patientLevel, string(fhirmap.QPCO2), msg.InboxKey,
		tw.Before.Microseconds(), tw.After.Microseconds(), string(fhirmap.QBodyTemp)}
}

// loadSnapshots loads, in one round trip, the snapshot facts and heads of
// every patient of the message with affected blood gases (readInput read
// which); a message that affects none costs no further statement. The
// statements run in the same transaction after the message's inserts, so
// they see the same rows as when queued with them.
func (s *Store) loadSnapshots(ctx context.Context, tx pgx.Tx, msg consumer.Message, order []*patientPlan, pend *groupWrites) error {
	return s.loadSnapshotsOf(ctx, tx, []consumer.Message{msg}, [][]*patientPlan{order}, pend)
}

// loadSnapshotsOf is loadSnapshots for several messages (a wave of a
// group: hotWaves) in one round trip.
func (s *Store) loadSnapshotsOf(ctx context.Context, tx pgx.Tx, msgs []consumer.Message, orders [][]*patientPlan, pend *groupWrites) error {
	b := &pgx.Batch{}
	var need []*patientPlan
	for i, msg := range msgs {
		for _, p := range orders[i] {
			if len(p.affected) > 0 && !p.eager {
				// The affected blood gases are known (readAffected, in this
				// transaction with no write since): the statements take them
				// instead of working them out again.
				args := snapshotArgs(msg, p)
				args[7] = p.affected
				b.Queue(snapshotFactsKnownSQL, args...)
				pend.queueHeads(b, p.ref, args, true)
				need = append(need, p)
			}
		}
	}
	if len(need) == 0 {
		return nil
	}
	br := tx.SendBatch(ctx, b)
	defer br.Close()
	for _, p := range need {
		if err := readSnapshot(br, p); err != nil {
			return err
		}
	}
	if err := br.Close(); err != nil {
		return fmt.Errorf("load snapshot: %w", err)
	}
	return nil
}

// factKeys lists the fact keys of a message, once each.
func factKeys(msg consumer.Message) []string {
	keys := make([]string, 0, len(msg.Facts))
	for _, f := range msg.Facts {
		keys = append(keys, f.Key)
	}
	slices.Sort(keys)
	return slices.Compact(keys)
}

// loadMoved locks and loads the patients a message moved facts away from
// (rare: a corrected subject). They are locked after the message's own
// patients, out of sorted order; a deadlock this could cause is detected by
// PostgreSQL and the transaction is retried (retryInPlace).
func (s *Store) loadMoved(ctx context.Context, tx pgx.Tx, msg consumer.Message, others []string, pend *groupWrites) ([]*patientPlan, error) {
	plans := make([]*patientPlan, len(others))
	for i, ref := range others {
		plans[i] = &patientPlan{ref: ref}
	}
	b := &pgx.Batch{}
	b.Queue(lockPatientsSQL, others)
	s.queueSnapshots(b, msg, plans, pend)
	br := tx.SendBatch(ctx, b)
	defer br.Close()
	if _, err := br.Exec(); err != nil {
		return nil, fmt.Errorf("lock moved patients: %w", err)
	}
	if err := readSnapshots(br, plans); err != nil {
		return nil, err
	}
	if err := br.Close(); err != nil {
		return nil, fmt.Errorf("load moved patients: %w", err)
	}
	return plans, nil
}

// readInput reads the results of what queueInput queued. others are the
// patients the message moved facts away from (see loadMoved).
func readInput(br pgx.BatchResults, msg consumer.Message, order []*patientPlan, res *consumer.IngestResult) (others []string, err error) {
	if len(msg.Facts) > 0 {
		tag, err := br.Exec()
		if err != nil {
			return nil, fmt.Errorf("insert facts: %w", err)
		}
		res.Facts = int(tag.RowsAffected())
	}
	return readLookups(br, msg, order)
}

// readLookups reads the results of what queueLookups queued.
func readLookups(br pgx.BatchResults, msg consumer.Message, order []*patientPlan) (others []string, err error) {
	if len(msg.Facts) > 0 {
		rows, err := br.Query()
		if err != nil {
			return nil, fmt.Errorf("other patients: %w", err)
		}
		if others, err = pgx.CollectRows(rows, pgx.RowTo[string]); err != nil {
			return nil, fmt.Errorf("other patients: %w", err)
		}
		for _, p := range order {
			if err := readAffected(br, p); err != nil {
				return nil, err
			}
			if p.eager {
				if err := readSnapshot(br, p); err != nil {
					return nil, err
				}
			}
		}
	}
	return others, nil
}

// planPatients calls plan for every patient with affected blood gases and
// checks what it returns.
func planPatients(order []*patientPlan, plan consumer.PlanFunc) error {
	for _, p := range order {
		if len(p.affected) == 0 {
			continue
		}
		ch, err := plan(consumer.Snapshot{Patient: p.ref, Facts: p.facts, Affected: p.affected, Current: p.current})
		if err != nil {
			return &planError{fmt.Errorf("plan: %w", err)}
		}
		if err := checkChanges(p.ref, ch); err != nil {
			return &planError{err}
		}
		p.changes = ch
	}
	return nil
}

// messagePatients lists the patients of a message, sorted, once each.
func messagePatients(msg consumer.Message) []string {
	var ps []string
	for _, f := range msg.Facts {
		ps = append(ps, f.Patient)
	}
	for _, r := range msg.Resources {
		if r.Patient != "" {
			ps = append(ps, r.Patient)
		}
	}
	slices.Sort(ps)
	return slices.Compact(ps)
}

// factArgs are the arguments of insertFactsSQL for one message: one array
// per column, the inbox key included (one element per fact, so that the
// arrays of several messages concatenate into one statement: concatArgs),
// then the recording time, then the cached term and encounter ids.
func (s *Store) factArgs(msg consumer.Message, now time.Time) []any {
	n := len(msg.Facts)
	var (
		key, res, ver, pat, enc, qty, org, det, spc = mk(n), mk(n), mk(n), mk(n), mk(n), mk(n), mk(n), mk(n), mk(n)
		dig, inbox                                  = make([][]byte, n), mk(n)
		unit, text, sunit, csys, code, cdisp, st    = mk(n), mk(n), mk(n), mk(n), mk(n), mk(n), mk(n)
		lastUpd, eff, iss                           = make([]pgtype.Timestamptz, n), make([]pgtype.Timestamptz, n), make([]pgtype.Timestamptz, n)
		tc                                          = make([]bool, n)
		val, sval                                   = make([]float64, n), make([]float64, n)
	)
	for i, f := range msg.Facts {
		key[i], res[i], ver[i], pat[i], enc[i] = f.Key, f.Resource, f.VersionID, f.Patient, f.Encounter
		// The decoder makes every digest a hex SHA-256; one that is not
		// decodes short and fact_row's length CHECK refuses it.
		dig[i], _ = hex.DecodeString(f.Digest)
		inbox[i] = msg.InboxKey
		qty[i], org[i], det[i], spc[i], tc[i] = string(f.Quantity), string(f.Origin), f.Detail, string(f.Specimen), f.TempCorrected
		val[i], unit[i], text[i], sval[i], sunit[i] = f.Value, f.Unit, f.Text, f.SourceValue, f.SourceUnit
		csys[i], code[i], cdisp[i], st[i] = f.Code.System, f.Code.Code, f.Code.Display, string(f.Status)
		lastUpd[i], eff[i], iss[i] = optTime(f.LastUpdated), pgtype.Timestamptz{Time: f.Effective.UTC(), Valid: true}, optTime(f.Issued)
	}
	termIDs, encIDs := s.lookups.ids(msg.Facts)
	return []any{key, dig, res, ver, lastUpd, pat, enc, qty, org, det, spc, tc, val, unit, text, sval, sunit,
		csys, code, cdisp, st, eff, iss, inbox, now, termIDs, encIDs}
}

// Positions in factArgs' arguments that guardSkipped reads back.
const (
	factArgKey       = 0
	factArgDigest    = 1
	factArgEffective = 21
)

func mk(n int) []string { return make([]string, n) }

// optTime stores a zero time as NULL.
func optTime(t time.Time) pgtype.Timestamptz {
	if t.IsZero() {
		return pgtype.Timestamptz{}
	}
	return pgtype.Timestamptz{Time: t.UTC(), Valid: true}
}

// queueSnapshots queues, per patient, the affected blood gases, the
// snapshot facts and the heads (three statements sharing affectedCTE).
func (s *Store) queueSnapshots(b *pgx.Batch, msg consumer.Message, order []*patientPlan, pend *groupWrites) {
	for _, p := range order {
		args := snapshotArgs(msg, p)
		b.Queue(affectedSQL, args...)
		b.Queue(snapshotFactsSQL, args...)
		pend.queueHeads(b, p.ref, args, false)
	}
}

func readSnapshots(br pgx.BatchResults, order []*patientPlan) error {
	for _, p := range order {
		if err := readAffected(br, p); err != nil {
			return err
		}
		if err := readSnapshot(br, p); err != nil {
			return err
		}
	}
	return nil
}

// readAffected reads one patient's affectedSQL.
func readAffected(br pgx.BatchResults, p *patientPlan) error {
	rows, err := br.Query()
	if err != nil {
		return fmt.Errorf("affected blood gases: %w", err)
	}
	p.affected, err = pgx.CollectRows(rows, pgx.RowTo[string])
	if err != nil {
		return fmt.Errorf("affected blood gases: %w", err)
	}
	return nil
}

// readSnapshot reads one patient's snapshotFactsSQL and snapshotHeadsSQL.
func readSnapshot(br pgx.BatchResults, p *patientPlan) error {
	rows, err := br.Query()
	if err != nil {
		return fmt.Errorf("load snapshot: %w", err)
	}
	p.facts, err = pgx.CollectRows(rows, scanFact)
	if err != nil {
		return fmt.Errorf("load snapshot: %w", err)
	}
	rows, err = br.Query()
	if err != nil {
		return fmt.Errorf("load heads: %w", err)
	}
	p.current, err = pgx.CollectRows(rows, func(row pgx.CollectableRow) (consumer.Stored, error) {
		var st consumer.Stored
		var status string
		err := row.Scan(&st.Key, &st.Kind, &st.Version, &st.Digest, &st.Refused, &status, &st.Value)
		st.Status = fhirmap.Status(status)
		return st, err
	})
	if err != nil {
		return fmt.Errorf("load heads: %w", err)
	}
	return nil
}

// scanFact reads the columns of factColumns into a Fact.
func scanFact(row pgx.CollectableRow) (fhirmap.Fact, error) {
	var f fhirmap.Fact
	var lastUpd, issued pgtype.Timestamptz
	var qty, org, spc, st string
	err := row.Scan(&f.Key, &f.Digest, &f.Resource, &f.VersionID, &lastUpd, &f.Patient, &f.Encounter, &qty, &org,
		&f.Detail, &spc, &f.TempCorrected, &f.Value, &f.Unit, &f.Text, &f.SourceValue, &f.SourceUnit,
		&f.Code.System, &f.Code.Code, &f.Code.Display, &st, &f.Effective, &issued)
	if err != nil {
		return fhirmap.Fact{}, err
	}
	f.Quantity, f.Origin, f.Specimen, f.Status = fhirmap.Quantity(qty), fhirmap.Origin(org), fhirmap.Specimen(spc), fhirmap.Status(st)
	f.Effective = f.Effective.UTC()
	if lastUpd.Valid {
		f.LastUpdated = lastUpd.Time.UTC()
	}
	if issued.Valid {
		f.Issued = issued.Time.UTC()
	}
	return f, nil
}

// checkChanges refuses a plan that writes for another patient or numbers
// its versions inconsistently: a bug in the plan must not reach provenance.
func checkChanges(patient string, ch consumer.Changes) error {
	if len(ch.Versions) != len(ch.Derivations) {
		return fmt.Errorf("plan: %d versions for %d derivations", len(ch.Versions), len(ch.Derivations))
	}
	for i, d := range ch.Derivations {
		if d.Patient != patient {
			return errors.New("plan: derivation for another patient than the snapshot's")
		}
		if ch.Versions[i] < 1 {
			return fmt.Errorf("plan: derivation version %d", ch.Versions[i])
		}
	}
	for _, r := range ch.Refusals {
		if r.Patient != patient {
			return errors.New("plan: refusal for another patient than the snapshot's")
		}
	}
	return nil
}

func jsonList[T any](v []T) ([]byte, error) {
	if v == nil {
		v = []T{}
	}
	return json.Marshal(v)
}

type lineage struct {
	role, key, digest, resource, fallback []string
	offsetUS                              []int64
}

func lineageOf(in []fhirmap.Input) lineage {
	n := len(in)
	l := lineage{role: mk(n), key: mk(n), digest: mk(n), resource: mk(n), fallback: mk(n), offsetUS: make([]int64, n)}
	for i, x := range in {
		l.role[i], l.key[i], l.digest[i], l.resource[i] = string(x.Role), x.Fact.Key, x.Fact.Digest, x.Fact.Resource
		l.offsetUS[i], l.fallback[i] = x.Offset.Microseconds(), x.Fallback
	}
	return l
}

func (s *Store) derivationArgs(d fhirmap.Derivation, version int, inbox string, now time.Time, settings string) ([]any, error) {
	r := d.Result
	var consts []Constant
	for _, c := range r.Constants() {
		consts = append(consts, Constant{Name: c.Name, Value: c.Value, Unit: c.Unit, Source: c.Source})
	}
	cj, err := jsonList(consts)
	if err != nil {
		return nil, fmt.Errorf("encode constants: %w", err)
	}
	aj, err := jsonList(r.Assumptions())
	if err != nil {
		return nil, fmt.Errorf("encode assumptions: %w", err)
	}
	fj, err := jsonList(r.Flags())
	if err != nil {
		return nil, fmt.Errorf("encode flags: %w", err)
	}
	var record []byte
	if d.Status != fhirmap.StatusEnteredInError {
		// A retraction publishes no method to redo: no record.
		if record, err = json.Marshal(fhirmap.RecordOf(d)); err != nil {
			return nil, fmt.Errorf("encode record: %w", err)
		}
	}
	l := lineageOf(d.Inputs)
	return []any{d.Key, version, d.ID, d.Kind, d.Patient, s.hash(d.Patient), d.Encounter, d.BloodGas,
		d.Effective.UTC(), r.Value, r.Unit, r.Method, r.MethodVersion, string(cj), string(aj), r.Basis(),
		r.Interpretation.Code, r.Interpretation.Text, r.Interpretation.Source, string(fj), string(d.Status),
		d.Retracted, d.Algorithm, d.Digest, inbox, now,
		l.role, l.key, l.digest, l.resource, l.offsetUS, l.fallback, optJSON(record), settings}, nil
}

// optJSON stores no bytes as NULL.
func optJSON(b []byte) *string {
	if b == nil {
		return nil
	}
	s := string(b)
	return &s
}

// queued counts what queueChanges queued, for readChanges.
type queued struct {
	settings, derivations, refusals, outbox int
}

// queueChanges queues the statements that write what the plans returned:
// derivations with their lineage and heads, refusals likewise, and the
// outbox rows in one statement. It counts them into res.
func (s *Store) queueChanges(b *pgx.Batch, msg consumer.Message, order []*patientPlan, now time.Time, res *consumer.IngestResult) (queued, error) {
	var q queued
	var subj, ids, hdrs []string
	var payloads, sums [][]byte
	var sizes []int32
	seen := map[string]bool{}
	for _, p := range order {
		if st := p.changes.Settings; st.Digest != "" && !seen[st.Digest] {
			seen[st.Digest] = true
			b.Queue(insertSettingsSQL, st.Digest, string(st.JSON), msg.InboxKey, now)
			q.settings++
		}
	}
	for _, p := range order {
		settings := p.changes.Settings.Digest
		for i, d := range p.changes.Derivations {
			args, err := s.derivationArgs(d, p.changes.Versions[i], msg.InboxKey, now, settings)
			if err != nil {
				return q, err
			}
			b.Queue(insertDerivationSQL, args...)
			q.derivations++
			countDerivation(res, d)
		}
		for _, r := range p.changes.Refusals {
			l := lineageOf(r.Considered)
			b.Queue(insertRefusalSQL, r.Key, r.Kind, r.Patient, s.hash(r.Patient), r.BloodGas, r.Effective.UTC(),
				r.Reason, r.Detail, r.Digest, msg.InboxKey, now,
				l.role, l.key, l.digest, l.resource, l.offsetUS, l.fallback, settings)
			q.refusals++
			res.Refusals++
			if res.RefusalReasons == nil {
				res.RefusalReasons = map[string]int{}
			}
			res.RefusalReasons[r.Reason]++
		}
		for _, o := range p.changes.Outbox {
			h, err := json.Marshal(orEmpty(o.Header))
			if err != nil {
				return q, fmt.Errorf("encode outbox headers: %w", err)
			}
			stored, sum, size := storedOutbox(o.Payload)
			subj, ids, hdrs, payloads = append(subj, o.Subject), append(ids, o.MsgID), append(hdrs, string(h)), append(payloads, stored)
			sums, sizes = append(sums, sum), append(sizes, size)
		}
	}
	if len(subj) > 0 {
		b.Queue(insertOutboxSQL, subj, ids, hdrs, payloads, msg.InboxKey, now, sums, sizes)
		q.outbox = len(subj)
	}
	return q, nil
}

// readInserts reads the results of the settings snapshot, derivation and
// refusal inserts queued, in that order: settings, derivations and
// refusals statements of each.
func readInserts(br pgx.BatchResults, settings, derivations, refusals int) error {
	for _, step := range []struct {
		n    int
		what string
	}{{settings, "insert settings snapshot"}, {derivations, "insert derivation"}, {refusals, "insert refusal"}} {
		for range step.n {
			if _, err := br.Exec(); err != nil {
				return fmt.Errorf("%s: %w", step.what, err)
			}
		}
	}
	return nil
}

// readChanges reads the results of what queueChanges queued.
func (s *Store) readChanges(br pgx.BatchResults, q queued, res *consumer.IngestResult) error {
	if err := readInserts(br, q.settings, q.derivations, q.refusals); err != nil {
		return err
	}
	if q.outbox > 0 {
		tag, err := br.Exec()
		if err != nil {
			return fmt.Errorf("insert outbox: %w", err)
		}
		res.Outbox = int(tag.RowsAffected())
		if res.Outbox < q.outbox {
			// A message id already used: the earlier row carries it (and
			// JetStream would drop the repeat as a duplicate anyway).
			s.log.Warn("outbox message ids already present", "skipped", q.outbox-res.Outbox)
		}
	}
	return nil
}

func orEmpty(m map[string]string) map[string]string {
	if m == nil {
		return map[string]string{}
	}
	return m
}

// countDerivation counts a stored derivation version in res: one more
// derivation, of its kind, and a retraction when it withdraws a value.
func countDerivation(res *consumer.IngestResult, d fhirmap.Derivation) {
	res.Derivations++
	if d.Status == fhirmap.StatusEnteredInError {
		res.Retractions++
	}
	if res.DerivedKinds == nil {
		res.DerivedKinds = map[string]int{}
	}
	res.DerivedKinds[d.Kind]++
}
