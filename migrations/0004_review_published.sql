-- What reviewers need beyond 0001's views: the exact bytes that were
-- published for every derivation version, and the nearest ventilator
-- reading of a blood gas refused for want of one. Views only: the reviewer
-- role still reaches no table.

-- review_published: every outbox message of a derivation version, with its
-- exact bytes and their SHA-256 as stored (the relay publishes these bytes
-- unchanged). The outbox message id is "<type>/<observation id>/_history/
-- <version>" (consumer.Planner), which is how a message is tied to its
-- version; the join goes through outbox's unique msg_id index.
CREATE VIEW review_published AS
SELECT d.id AS derivation_id, d.key, d.version, t.resource_type, o.seq, o.subject, o.msg_id,
       o.headers, o.payload, encode(sha256(o.payload), 'hex') AS payload_digest,
       octet_length(o.payload) AS size_bytes, o.created_at, o.published_at
FROM derivation d
CROSS JOIN (VALUES ('Observation'), ('Provenance')) AS t(resource_type)
JOIN outbox o ON o.msg_id = t.resource_type || '/' || d.observation_id::text || '/_history/' || d.version::text;

-- review_refusal_nearest: for a refusal with reason
-- no-ventilator-data-in-window, the usable ventilator reading of the same
-- patient (same encounter when both have one) nearest to the blood gas,
-- among what had been recorded when the refusal was (ties: the earlier
-- reading, then the smaller key), as fhirmap's pairing reports it. Only the
-- latest version of each reading recorded by then counts. The quantities
-- are those fhirmap counts as ventilator readings. The hash itself is not
-- shown.
--
-- Cost: the nearest reading before and the nearest after are looked up
-- through fact_patient_effective; "g.id + 0" keeps the planner from
-- intersecting the version check with the primary key, and
-- "quantity || ''" from preferring the quantity index. Measured on the
-- demo store (36 such refusals, 98,000 facts): 2 s for all of them, about
-- 50 ms a refusal (the first form of this view took 225 s); audit pages
-- are joined after paging, so a page pays only for its own rows.
CREATE VIEW review_refusal_nearest AS
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
         WHERE f.patient_hash = r.patient_hash AND f.effective <= r.effective
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
         WHERE f.patient_hash = r.patient_hash AND f.effective > r.effective
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

-- The grants function of 0001, with the reviewer's views found by name
-- (every view named review_*), so that a view added later is granted
-- without replacing this function again.
CREATE OR REPLACE FUNCTION ventderive_apply_grants() RETURNS void
LANGUAGE plpgsql AS $$
DECLARE
    v text;
BEGIN
    IF EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'ventderive_writer') THEN
        GRANT SELECT, INSERT ON inbox, input_resource, fact, derivation, derivation_input,
            refusal, refusal_input, head, outbox, dead_letter TO ventderive_writer;
        GRANT UPDATE (published_at) ON outbox TO ventderive_writer;
        GRANT UPDATE ON head TO ventderive_writer;
        GRANT SELECT ON schema_version TO ventderive_writer;
    END IF;
    IF EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'ventderive_reviewer') THEN
        FOR v IN SELECT viewname FROM pg_views
                 WHERE schemaname = current_schema() AND viewname LIKE 'review\_%' ORDER BY viewname
        LOOP
            EXECUTE format('GRANT SELECT ON %I TO ventderive_reviewer', v);
        END LOOP;
    END IF;
END;
$$;
REVOKE ALL ON FUNCTION ventderive_apply_grants() FROM PUBLIC;
