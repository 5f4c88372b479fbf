-- Smaller fact indexes: the unique index of fact_row holds a 64-bit hash
-- of the key in place of the key, and (patient_ref, quantity, effective)
-- holds only the quantities that are looked up by quantity.
--
-- Measured on copies of the bench's store (the default scenario at 0016:
-- 9,984 inputs, 42,888 facts, 4.3 a message; 3,343 bytes per input,
-- fact_row 2,048 of them: heap 772, the unique (key, digest, effective)
-- index 786 at 51% leaf density, (patient_ref, quantity, effective) 377,
-- ((patient_ref || ''), effective) 93), each layout an empty table filled
-- with the stored rows in the order the service recorded them, so that
-- its indexes split pages as in service:
-- * unique (hashtextextended(key, 0), digest, effective): 434 bytes an
--   input in place of 786 (68% leaf density: 8 bytes of hash where a key
--   is about 34 characters).
-- * (patient_ref, quantity, effective) WHERE quantity IN the quantities
--   looked up by quantity (the blood gas, body temperature and the
--   patient-level ones; about 1% of the rows): 6 bytes an input in place
--   of 377. Every other quantity is looked up through ((patient_ref ||
--   ''), effective).
--
-- 1. The unique constraint fact_row_key_digest_effective is replaced by
--    the unique index fact_row_key_hash_digest_effective on
--    (hashtextextended(key, 0), digest, effective). PostgreSQL 15 accepts
--    a unique expression index on the partitioned table (the partition
--    key, effective, is a plain column of it), so no stored hash column is
--    needed. It is exact: the digest is the SHA-256 of the resource's
--    bytes, so only facts of one resource can share a digest, and the
--    effective time is decoded from those bytes; facts of one resource
--    under different keys (an Observation's components, a Patient's
--    facts) share both, and for them the 64-bit hash alone tells the keys
--    apart in the index. Two different
--    keys whose hashes collide would need the same digest and effective
--    time to conflict, and then ON CONFLICT DO NOTHING would drop the
--    second silently: the writer checks, whenever its insert stored fewer
--    rows than it was given, that every given fact has a stored row with
--    its key, digest and effective time, and refuses the message loudly
--    otherwise (consumer/postgres: ErrFactKeyCollision). The writer's ON
--    CONFLICT names the expression; every lookup by key adds
--    hashtextextended(key, 0) = ... (the index column) and keeps key = ...
--    as the recheck.
-- 2. fact_row_patient_ref_quantity_effective is created again as a
--    partial index over the quantities below (consumer/postgres
--    indexedQuantitiesSQL repeats the same literal list in every lookup
--    by patient and quantity, so that a generic plan, whose $n the planner
--    cannot prove to be in the list, may use it; a test keeps the lists
--    in step). A quantity added to them needs this index created again (a
--    migration).
-- 3. The review_* views that join fact by key are created again with the
--    hash beside the key, with the same columns and rows. The inputs'
--    views find each input's fact by a lateral subquery (OFFSET 0: not
--    flattened), one probe of the unique index per input: as a plain join
--    the planner, which has no statistics on the partitioned table's
--    expression (autovacuum does not analyze a partitioned table),
--    sequentially scanned and hashed every fact to find the inputs of
--    one derivation (measured on a bench store, 150-190 ms, and so did
--    the join on key before this migration).
-- Rows are not touched: every fact, id and version stays as it is.
--
-- Lock: dropping the constraint takes an ACCESS EXCLUSIVE lock on
-- fact_row and its partitions, held by this migration's transaction for
-- the whole build of both indexes (not CONCURRENTLY: a migration runs in
-- one transaction). On a large store the service is stopped while it runs
-- (README, Operations, "Upgrades and migrations").

ALTER TABLE fact_row DROP CONSTRAINT fact_row_key_digest_effective;
CREATE UNIQUE INDEX fact_row_key_hash_digest_effective ON fact_row (hashtextextended(key, 0), digest, effective);

DROP INDEX fact_row_patient_ref_quantity_effective;
CREATE INDEX fact_row_patient_ref_quantity_effective ON fact_row (patient_ref, quantity, effective)
    WHERE quantity IN ('pco2', 'body-temp', 'sex', 'birth-date', 'body-height', 'body-weight',
                       'target-paco2', 'apparatus-dead-space', 'airway');

CREATE OR REPLACE VIEW review_derivation_input AS
SELECT i.derivation_id, i.ordinal, i.role, i.fact_key, i.fact_digest, i.resource_ref,
       f.quantity, f.origin, f.detail, f.specimen, f.value, f.unit, f.status,
       f.effective, f.version_id, i.time_offset, i.fallback
FROM derivation_input i
CROSS JOIN LATERAL (
    SELECT f.quantity, f.origin, f.detail, f.specimen, f.value, f.unit, f.status, f.effective, f.version_id
    FROM fact f
    WHERE hashtextextended(f.key, 0) = hashtextextended(i.fact_key, 0)
      AND f.key = i.fact_key AND f.digest = i.fact_digest
    OFFSET 0) f;

CREATE OR REPLACE VIEW review_refusal_input AS
SELECT i.refusal_id, i.ordinal, i.role, i.fact_key, i.fact_digest, i.resource_ref,
       f.quantity, f.origin, f.detail, f.specimen, f.value, f.unit, f.status,
       f.effective, f.version_id, i.time_offset, i.fallback
FROM refusal_input i
CROSS JOIN LATERAL (
    SELECT f.quantity, f.origin, f.detail, f.specimen, f.value, f.unit, f.status, f.effective, f.version_id
    FROM fact f
    WHERE hashtextextended(f.key, 0) = hashtextextended(i.fact_key, 0)
      AND f.key = i.fact_key AND f.digest = i.fact_digest
    OFFSET 0) f;

CREATE OR REPLACE VIEW review_refusal_nearest AS
SELECT r.id AS refusal_id, n.fact_key, n.resource_ref, n.quantity, n.origin, n.value, n.unit,
       n.status, n.effective, n.effective - r.effective AS time_offset
FROM refusal r
LEFT JOIN LATERAL (
    SELECT f.encounter FROM refusal_input i
    JOIN fact f ON hashtextextended(f.key, 0) = hashtextextended(i.fact_key, 0)
               AND f.key = i.fact_key AND f.digest = i.fact_digest
    WHERE i.refusal_id = r.id AND i.fact_key = r.blood_gas_key
    ORDER BY i.ordinal LIMIT 1) bg ON true
JOIN LATERAL (
    SELECT c.* FROM (
        (SELECT f.key AS fact_key, f.resource_ref, f.quantity, f.origin, f.value, f.unit, f.status, f.effective
         FROM fact f
         WHERE (f.patient_ref || '') = r.patient_ref AND f.effective <= r.effective
           AND (f.quantity || '') IN ('minute-volume', 'tidal-volume', 'resp-rate', 'petco2', 'vco2', 'peco2',
                              'peep', 'plateau', 'mean-airway', 'fetco2')
           AND f.recorded_at <= r.created_at
           AND f.status IN ('final', 'amended', 'corrected', 'preliminary')
           AND (coalesce(bg.encounter, '') = '' OR f.encounter = '' OR f.encounter = bg.encounter)
           AND NOT EXISTS (SELECT 1 FROM fact g WHERE hashtextextended(g.key, 0) = hashtextextended(f.key, 0)
                           AND g.key = f.key AND g.id + 0 > f.id AND g.recorded_at <= r.created_at)
         ORDER BY f.effective DESC, f.key LIMIT 1)
        UNION ALL
        (SELECT f.key, f.resource_ref, f.quantity, f.origin, f.value, f.unit, f.status, f.effective
         FROM fact f
         WHERE (f.patient_ref || '') = r.patient_ref AND f.effective > r.effective
           AND (f.quantity || '') IN ('minute-volume', 'tidal-volume', 'resp-rate', 'petco2', 'vco2', 'peco2',
                              'peep', 'plateau', 'mean-airway', 'fetco2')
           AND f.recorded_at <= r.created_at
           AND f.status IN ('final', 'amended', 'corrected', 'preliminary')
           AND (coalesce(bg.encounter, '') = '' OR f.encounter = '' OR f.encounter = bg.encounter)
           AND NOT EXISTS (SELECT 1 FROM fact g WHERE hashtextextended(g.key, 0) = hashtextextended(f.key, 0)
                           AND g.key = f.key AND g.id + 0 > f.id AND g.recorded_at <= r.created_at)
         ORDER BY f.effective, f.key LIMIT 1)
    ) c
    ORDER BY abs(extract(epoch FROM c.effective - r.effective)), c.effective, c.fact_key
    LIMIT 1) n ON true
WHERE r.reason = 'no-ventilator-data-in-window';
