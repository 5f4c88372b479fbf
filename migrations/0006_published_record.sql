-- What was published, as data, and the settings it was made under.
--
-- 1. site_settings: one row per distinct site-settings snapshot
--    (consumer.Settings: the whole fhirmap.Site the service derives under,
--    the code alias file's SHA-256 and the algorithm version), keyed by the
--    SHA-256 of its exact bytes. The snapshot is the settings struct
--    encoded whole, so a setting added later needs no schema change.
-- 2. derivation.record: the formula, worked basis, intermediate steps
--    (e.g. the predicted body weight inside a predicted PaCO2), every
--    constant, assumption and flag exactly as the published Observation's
--    notes write them (fhirmap.Record), as structured data.
-- 3. derivation.settings_digest and refusal.settings_digest: the snapshot
--    each version and refusal was made under.
--
-- Rows recorded before this migration have NULL in the new columns: their
-- record and settings were not kept, and the audit says so rather than
-- guess them (audit verify reports them not verifiable).

CREATE TABLE site_settings (
    digest       text PRIMARY KEY CHECK (digest ~ '^[0-9a-f]+$' AND length(digest) = 64),
    snapshot     text NOT NULL,
    algorithm    text NOT NULL CHECK (algorithm <> ''),
    alias_digest text NOT NULL CHECK (alias_digest = '' OR (alias_digest ~ '^[0-9a-f]+$' AND length(alias_digest) = 64)),
    inbox_key    text NOT NULL REFERENCES inbox,
    created_at   timestamptz NOT NULL,
    -- The key is the SHA-256 of the bytes kept, and the columns beside
    -- them say what the bytes say.
    CONSTRAINT site_settings_digest_matches CHECK (digest = encode(sha256(convert_to(snapshot, 'UTF8')), 'hex')),
    -- (coalesce: a missing member gives NULL, which a CHECK would pass)
    CONSTRAINT site_settings_is_object CHECK (coalesce(jsonb_typeof(snapshot::jsonb) = 'object'
        AND jsonb_typeof(snapshot::jsonb -> 'site') = 'object', false)),
    CONSTRAINT site_settings_algorithm_matches CHECK (coalesce(algorithm = snapshot::jsonb ->> 'algorithm', false)),
    CONSTRAINT site_settings_alias_matches CHECK (coalesce(alias_digest = snapshot::jsonb ->> 'aliasDigest', false))
);

ALTER TABLE derivation
    ADD COLUMN record jsonb CHECK (record IS NULL OR coalesce(jsonb_typeof(record) = 'object'
        AND jsonb_typeof(record -> 'steps') = 'array' AND jsonb_typeof(record -> 'constants') = 'array'
        AND jsonb_typeof(record -> 'assumptions') = 'array' AND jsonb_typeof(record -> 'flags') = 'array', false)),
    ADD COLUMN settings_digest text REFERENCES site_settings;

ALTER TABLE refusal
    ADD COLUMN settings_digest text REFERENCES site_settings;

-- review_derivation and review_refusal gain their new columns at the end
-- (the columns before keep their names, order and meaning).
CREATE OR REPLACE VIEW review_derivation AS
SELECT d.id, d.key, d.version, d.observation_id, d.kind, d.patient_ref, d.encounter,
       d.blood_gas_key, d.effective, d.value, d.unit, d.method, d.method_version,
       d.constants, d.assumptions, d.basis, d.interp_code, d.interp_text, d.interp_source,
       d.flags, d.status, d.retracted, d.algorithm, d.digest,
       p.version AS supersedes_version, p.value AS supersedes_value, p.status AS supersedes_status,
       (SELECT n.version FROM derivation n WHERE n.supersedes_id = d.id) AS superseded_by_version,
       (h.derivation_id = d.id AND NOT h.refused) AS is_current,
       d.inbox_key, d.created_at,
       d.record, d.settings_digest
FROM derivation d
LEFT JOIN derivation p ON p.id = d.supersedes_id
LEFT JOIN head h ON h.key = d.key;

CREATE OR REPLACE VIEW review_refusal AS
SELECT r.id, r.key, r.kind, r.patient_ref, r.blood_gas_key, r.effective, r.reason, r.detail,
       r.digest, (h.refusal_id = r.id) AS is_current, r.inbox_key, r.created_at,
       r.settings_digest
FROM refusal r
LEFT JOIN head h ON h.key = r.key;

-- review_settings: every settings snapshot, its exact bytes and, parsed,
-- the site settings.
CREATE VIEW review_settings AS
SELECT digest, algorithm, alias_digest, snapshot, snapshot::jsonb -> 'site' AS site, created_at
FROM site_settings;

-- review_derivation_step: the intermediate steps of every derivation
-- version that kept its record, one row each, in order.
CREATE VIEW review_derivation_step AS
SELECT d.id AS derivation_id, s.ordinal::integer AS ordinal, s.step ->> 'method' AS method,
       s.step ->> 'methodVersion' AS method_version, (s.step ->> 'value')::double precision AS value,
       s.step ->> 'unit' AS unit, s.step ->> 'basis' AS basis, s.step -> 'constants' AS constants,
       s.step -> 'assumptions' AS assumptions, s.step -> 'flags' AS flags
FROM derivation d
CROSS JOIN LATERAL jsonb_array_elements(d.record -> 'steps') WITH ORDINALITY AS s(step, ordinal)
WHERE d.record IS NOT NULL;

-- The grants function of 0005 with site_settings for the writer (it
-- inserts snapshots and reads them for ON CONFLICT). Reviewer views are
-- still found by name.
CREATE OR REPLACE FUNCTION ventderive_apply_grants() RETURNS void
LANGUAGE plpgsql AS $$
DECLARE
    v text;
BEGIN
    IF EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'ventderive_writer') THEN
        GRANT SELECT, INSERT ON inbox, fact, derivation, derivation_input,
            refusal, refusal_input, head, outbox, site_settings TO ventderive_writer;
        REVOKE SELECT ON input_resource, dead_letter FROM ventderive_writer;
        GRANT INSERT ON input_resource, dead_letter TO ventderive_writer;
        GRANT SELECT (id, reference, resource_type, version_id, patient_ref, patient_hash, digest,
            inbox_key, received, recorded_at) ON input_resource TO ventderive_writer;
        GRANT SELECT (id, inbox_key, subject, stream_seq, reason, detail, created_at)
            ON dead_letter TO ventderive_writer;
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
