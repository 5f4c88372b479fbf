-- Narrower facts: one set of patient indexes on fact instead of two, and
-- no keyed hash in a fact row.
--
-- Until now fact had three patient indexes: (patient_hash, effective) and
-- (patient_hash, quantity, effective) of 0001, which the ingest's snapshot
-- statements, retain and review_refusal_nearest use, and (patient_ref,
-- quantity, effective) of 0008, which the reviewer console's timeline
-- needs (the reviewer never sees the hash). Both columns name the same
-- patient (the hash is a keyed function of the reference), so the second
-- (quantity, effective) index held the same order twice. Sizes on a 6 h
-- demo store (24,054 facts, 5,608 inputs), per fact row:
-- (patient_hash, quantity, effective) 112 bytes, (patient_ref, quantity,
-- effective) 96 bytes (the reference of the demo, 19 characters, is
-- shorter than the 32-character hash), (patient_hash, effective) 28 bytes
-- (B-tree deduplication: the readings of one Bundle share patient and
-- time).
--
-- 1. The ingest, retain and review_refusal_nearest look facts up by
--    patient_ref; the store's SQL passes the reference where it passed the
--    hash. fact_patient_ref_quantity_effective (0008) serves every lookup
--    by patient and quantity, and the console. fact_patient_ref_effective
--    replaces fact_patient_effective for the lookups over every quantity
--    (a blood gas's window, the nearest readings outside it). It is built
--    on the expression (patient_ref || '') so that only a query that
--    writes that expression can use it: with both indexes on plain
--    patient_ref, generic plans without statistics took the smaller
--    (patient_ref, effective) index for lookups by quantity too and
--    filtered every quantity of the window (a demo run read 2.8 million
--    index entries where the quantity index read 25,000). The two lookups
--    are different questions, and the expression says which index answers
--    which, whatever the estimates.
-- 2. fact.patient_hash goes: nothing reads it any more (33 bytes a row,
--    and an HMAC per fact on the write path). The keyed hash stays in
--    derivation, refusal and head, where it was and where nothing changes.
--    A dropped column's bytes stay in the rows already written until they
--    are rewritten (VACUUM FULL); new rows are narrower.
-- 3. The hash indexes of derivation, refusal and head (0001) go too: with
--    the store's lookups by reference (the heads of a blood gas through
--    0008's head_patient_ref_blood_gas, retain's refusals through
--    refusal_patient_ref_effective) no statement filters on patient_hash.
--    Small tables, but one index entry fewer per derivation, refusal and
--    head row written.
-- 4. review_refusal_nearest is the view of 0004 with the patient matched by
--    reference instead of hash: same name, columns and meaning.
CREATE INDEX fact_patient_ref_effective ON fact ((patient_ref || ''), effective);

CREATE OR REPLACE VIEW review_refusal_nearest AS
SELECT r.id AS refusal_id, n.fact_key, n.resource_ref, n.quantity, n.origin, n.value, n.unit,
       n.status, n.effective, n.effective - r.effective AS time_offset
FROM refusal r
LEFT JOIN LATERAL (
    SELECT f.encounter FROM refusal_input i JOIN fact f ON f.key = i.fact_key AND f.digest = i.fact_digest
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
           AND NOT EXISTS (SELECT 1 FROM fact g WHERE g.key = f.key AND g.id + 0 > f.id AND g.recorded_at <= r.created_at)
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
           AND NOT EXISTS (SELECT 1 FROM fact g WHERE g.key = f.key AND g.id + 0 > f.id AND g.recorded_at <= r.created_at)
         ORDER BY f.effective, f.key LIMIT 1)
    ) c
    ORDER BY abs(extract(epoch FROM c.effective - r.effective)), c.effective, c.fact_key
    LIMIT 1) n ON true
WHERE r.reason = 'no-ventilator-data-in-window';

DROP INDEX fact_patient_effective;
DROP INDEX fact_patient_quantity_effective;
ALTER TABLE fact DROP COLUMN patient_hash;
DROP INDEX derivation_patient_effective;
DROP INDEX refusal_patient_effective;
DROP INDEX head_patient_blood_gas;
