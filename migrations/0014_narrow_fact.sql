-- Narrow facts: a fact row keeps its values and small keys into lookup
-- tables for the strings that repeat, and the facts are partitioned by
-- month of effective time.
--
-- Measured on the bench's default scenario before this migration (9,984
-- inputs, 42,888 facts, 4.3 a message): fact was 3,322 of 5,109 bytes per
-- input (heap 432 bytes a row, indexes 341). Most of a row was text that
-- every reading of a kind repeats (code system, code, display, units,
-- quantity, origin, status: about 120 bytes), the patient and encounter
-- references (about 40), two hex digests (65 bytes each: the resource's
-- and the inbox key) and the resource reference, which for every fact is
-- the part of its key before '#'.
--
-- 1. fact_row holds one row per fact version: key, digest and inbox key
--    as bytea (32 bytes, not 64 hex characters), the resource reference
--    only when it is not the key's part before '#' (never, for what
--    fhirmap decodes today: NULL costs a bit in the row's null bitmap),
--    times and values, the patient reference and quantity, and two int4
--    keys: fact_encounter (the encounter reference) and fact_term
--    (quantity, origin, detail, specimen, temp_corrected, unit, text,
--    source unit, code system, code, display and status together: a
--    demo store has a few dozen such combinations). The patient
--    reference and the quantity stay in the row (the quantity also in its
--    term; the writer sets both from the same fact): the lookups by
--    patient, quantity and time need them in one index, in order. Through
--    a view that took them from lookup tables, a lookup of the first
--    reading of a period joined the patient first, read and sorted every
--    reading of the period and checked each for a later version: the
--    reviewer console's 30-day timeline went from 0.33 s to 4.3 s.
-- 2. The view fact has the old table's columns, names, types and values
--    (digests and inbox keys as lower-case hex again), so every reader
--    (the store's snapshot statements, audit verify, replay, the reviewer
--    console, retain and the review_* views) reads it unchanged. The four
--    review_* views over fact are dropped with the old table and created
--    again with the same text.
-- 3. CHECKs. The guards of the values that repeat now sit on the lookup
--    tables and run once per new encounter or term, not per fact:
--    fact_blood_gas_has_specimen (a blood-gas value says which blood it
--    was measured in), the quantity, origin, specimen and status checks. fact_row keeps the checks
--    without a regular expression: a non-empty key and resource
--    reference, finite values, 32-byte digests and inbox keys. Dropped:
--    the two regular expressions on the hex digest and patient reference
--    of every fact (fhirmap's decoder computes the digest and validates
--    the reference before a fact exists; bytea makes the hex pattern
--    moot), and fact.inbox_key's foreign key (a trigger per fact row; the
--    writer stores a message's inbox row and its facts in one statement
--    batch of one transaction, from the same message).
-- 4. Partitioning: fact_row is partitioned by RANGE (effective), one
--    partition a month (fact_row_YYYY_MM), and fact_row_default takes a
--    fact whose month has no partition (a patient attribute without a
--    time, stored at 0001-01-01, a backlog from long ago). A unique
--    constraint of a partitioned table must hold the partition key, so
--    the unique key is (key, digest, effective) instead of (key, digest):
--    the same uniqueness, because the digest is the SHA-256 of the
--    resource's bytes and the effective time is decoded from those bytes
--    (fhirmap: effective[x], a Goal's startDate, nothing for a Patient),
--    so one (key, digest) has one effective time. For the same reason
--    derivation_input and refusal_input can no longer have a foreign key
--    to (key, digest) (a foreign key needs a unique constraint on exactly
--    its columns); the service cites only facts it loaded from the store,
--    and audit verify, which reads a derivation's inputs from the stored
--    facts, no longer reproduces one whose input is missing.
--    ventderive_fact_partitions(lo, hi) creates the missing monthly
--    partitions in [lo, hi); the service calls it at start and retain
--    before it runs (the last month through three months ahead). It skips
--    a month that already has rows in the default partition (creating the
--    partition would fail; they stay there, and are still found).
-- 5. Indexes, one set per partition: (key, digest, effective) unique (the
--    lookups by key and the writer's ON CONFLICT), (patient_ref, quantity,
--    effective) for lookups by patient and quantity, and ((patient_ref ||
--    ''), effective) for lookups over every quantity (the split of 0012).
-- Existing rows are copied with their ids (ids still number versions in
-- the order they were recorded; new ids continue after them).

CREATE TABLE fact_encounter (
    id        integer GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    encounter text NOT NULL UNIQUE
);

CREATE TABLE fact_term (
    id             integer GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    quantity       text NOT NULL CHECK (quantity ~ '^[a-z0-9]+(-[a-z0-9]+)*$'),
    origin         text NOT NULL CHECK (origin IN ('', 'measured', 'setting', 'calculated')),
    detail         text NOT NULL,
    specimen       text NOT NULL CHECK (specimen IN ('', 'arterial', 'venous', 'capillary', 'mixed-venous', 'unknown')),
    temp_corrected boolean NOT NULL,
    unit           text NOT NULL,
    text           text NOT NULL,
    source_unit    text NOT NULL,
    code_system    text NOT NULL,
    code           text NOT NULL,
    code_display   text NOT NULL,
    status         text NOT NULL CHECK (status IN ('registered', 'preliminary', 'final', 'amended', 'corrected', 'cancelled', 'entered-in-error', 'unknown')),
    CONSTRAINT fact_term_values UNIQUE (quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit,
        code_system, code, code_display, status),
    -- A blood-gas value says which blood it was measured in.
    CONSTRAINT fact_blood_gas_has_specimen CHECK (quantity <> 'pco2' OR specimen <> '')
);

CREATE SEQUENCE fact_row_id_seq AS bigint;

CREATE TABLE fact_row (
    id           bigint NOT NULL DEFAULT nextval('fact_row_id_seq'),
    key          text NOT NULL CHECK (key <> ''),
    digest       bytea NOT NULL CHECK (octet_length(digest) = 32),
    resource_ref text CHECK (resource_ref <> ''),
    version_id   text NOT NULL,
    last_updated timestamptz,
    patient_ref  text NOT NULL,
    encounter_id integer NOT NULL,
    term_id      integer NOT NULL,
    quantity     text NOT NULL,
    value        double precision NOT NULL CHECK (value > '-Infinity' AND value < 'Infinity'),
    source_value double precision NOT NULL CHECK (source_value > '-Infinity' AND source_value < 'Infinity'),
    effective    timestamptz NOT NULL,
    issued       timestamptz,
    inbox_key    bytea NOT NULL CHECK (octet_length(inbox_key) = 32),
    recorded_at  timestamptz NOT NULL,
    CONSTRAINT fact_row_key_digest_effective UNIQUE (key, digest, effective)
) PARTITION BY RANGE (effective);
ALTER SEQUENCE fact_row_id_seq OWNED BY fact_row.id;
CREATE INDEX fact_row_patient_ref_quantity_effective ON fact_row (patient_ref, quantity, effective);
CREATE INDEX fact_row_patient_ref_effective ON fact_row ((patient_ref || ''), effective);
CREATE TABLE fact_row_default PARTITION OF fact_row DEFAULT;

-- ventderive_fact_partitions creates the monthly partitions of fact_row
-- from the month of lo up to hi (UTC months) that do not exist yet and
-- returns how many it created. It runs with the owner's rights, so the
-- service's writer role may call it without the right to create tables.
CREATE FUNCTION ventderive_fact_partitions(lo timestamptz, hi timestamptz) RETURNS integer
LANGUAGE plpgsql SECURITY DEFINER SET search_path FROM CURRENT AS $$
DECLARE
    m timestamp := date_trunc('month', lo AT TIME ZONE 'UTC');
    a timestamptz;
    b timestamptz;
    part text;
    n integer := 0;
BEGIN
    PERFORM pg_advisory_xact_lock(hashtextextended('ventderive/fact-partitions', 0));
    WHILE m AT TIME ZONE 'UTC' < hi LOOP
        a := m AT TIME ZONE 'UTC';
        b := (m + interval '1 month') AT TIME ZONE 'UTC';
        part := 'fact_row_' || to_char(m, 'YYYY_MM');
        IF to_regclass(part) IS NULL
           AND NOT EXISTS (SELECT 1 FROM fact_row_default WHERE effective >= a AND effective < b) THEN
            EXECUTE format('CREATE TABLE %I PARTITION OF fact_row FOR VALUES FROM (%L) TO (%L)', part, a, b);
            n := n + 1;
        END IF;
        m := m + interval '1 month';
    END LOOP;
    RETURN n;
END;
$$;
REVOKE ALL ON FUNCTION ventderive_fact_partitions(timestamptz, timestamptz) FROM PUBLIC;

-- The months of the stored facts (their effective times are real dates;
-- a patient attribute at 0001-01-01 goes to the default partition), and
-- the last month through three ahead.
SELECT ventderive_fact_partitions(m, m + interval '1 month')
FROM (SELECT DISTINCT date_trunc('month', effective AT TIME ZONE 'UTC') AT TIME ZONE 'UTC' AS m
      FROM fact WHERE effective >= '2000-01-01') AS months;
SELECT ventderive_fact_partitions(now() - interval '1 month', now() + interval '3 months');

INSERT INTO fact_encounter (encounter) SELECT DISTINCT encounter FROM fact ORDER BY 1;
INSERT INTO fact_term (quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit,
    code_system, code, code_display, status)
SELECT DISTINCT quantity, origin, detail, specimen, temp_corrected, unit, text, source_unit,
    code_system, code, code_display, status FROM fact ORDER BY 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12;

INSERT INTO fact_row (id, key, digest, resource_ref, version_id, last_updated, patient_ref, encounter_id, term_id,
    quantity, value, source_value, effective, issued, inbox_key, recorded_at)
SELECT f.id, f.key, decode(f.digest, 'hex'), nullif(f.resource_ref, split_part(f.key, '#', 1)), f.version_id,
    f.last_updated, f.patient_ref, e.id, t.id, f.quantity, f.value, f.source_value, f.effective, f.issued, decode(f.inbox_key, 'hex'),
    f.recorded_at
FROM fact f
JOIN fact_encounter e ON e.encounter = f.encounter
JOIN fact_term t ON (t.quantity, t.origin, t.detail, t.specimen, t.temp_corrected, t.unit, t.text, t.source_unit,
    t.code_system, t.code, t.code_display, t.status)
  = (f.quantity, f.origin, f.detail, f.specimen, f.temp_corrected, f.unit, f.text, f.source_unit,
    f.code_system, f.code, f.code_display, f.status)
ORDER BY f.id;
SELECT setval('fact_row_id_seq', greatest((SELECT max(id) FROM fact_row), 1), (SELECT max(id) FROM fact_row) IS NOT NULL);

-- The old table goes with its four views and the two foreign keys to it.
DROP TABLE fact CASCADE;

CREATE VIEW fact AS
SELECT r.id, r.key, encode(r.digest, 'hex') AS digest, coalesce(r.resource_ref, split_part(r.key, '#', 1)) AS resource_ref,
       r.version_id, r.last_updated, r.patient_ref, e.encounter, r.quantity, t.origin, t.detail, t.specimen,
       t.temp_corrected, r.value, t.unit, t.text, r.source_value, t.source_unit, t.code_system, t.code,
       t.code_display, t.status, r.effective, r.issued, encode(r.inbox_key, 'hex') AS inbox_key, r.recorded_at
FROM fact_row r
JOIN fact_encounter e ON e.id = r.encounter_id
JOIN fact_term t ON t.id = r.term_id;

-- The views of 0001 and 0012, unchanged.
CREATE VIEW review_derivation_input AS
SELECT i.derivation_id, i.ordinal, i.role, i.fact_key, i.fact_digest, i.resource_ref,
       f.quantity, f.origin, f.detail, f.specimen, f.value, f.unit, f.status,
       f.effective, f.version_id, i.time_offset, i.fallback
FROM derivation_input i
JOIN fact f ON f.key = i.fact_key AND f.digest = i.fact_digest;

CREATE VIEW review_refusal_input AS
SELECT i.refusal_id, i.ordinal, i.role, i.fact_key, i.fact_digest, i.resource_ref,
       f.quantity, f.origin, f.detail, f.specimen, f.value, f.unit, f.status,
       f.effective, f.version_id, i.time_offset, i.fallback
FROM refusal_input i
JOIN fact f ON f.key = i.fact_key AND f.digest = i.fact_digest;

CREATE VIEW review_fact AS
SELECT id, key, digest, resource_ref, version_id, last_updated, patient_ref, encounter,
       quantity, origin, detail, specimen, temp_corrected, value, unit, text,
       source_value, source_unit, code_system, code, code_display, status, effective,
       issued, inbox_key, recorded_at
FROM fact;

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

-- The grants function of 0011 with the narrow facts: the writer reads
-- facts through the view fact, inserts fact_row and the lookup rows, may
-- update a lookup row's own value to itself (the writer's insert of a new
-- encounter or term ends with ON CONFLICT DO UPDATE, so that a
-- row another transaction committed meanwhile still yields its id), and
-- may create the month partitions through ventderive_fact_partitions.
-- Every other grant is unchanged.
CREATE OR REPLACE FUNCTION ventderive_apply_grants() RETURNS void
LANGUAGE plpgsql AS $$
DECLARE
    v text;
BEGIN
    IF EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'ventderive_writer') THEN
        GRANT SELECT, INSERT ON derivation, derivation_input,
            refusal, refusal_input, head, outbox, site_settings TO ventderive_writer;
        GRANT SELECT ON fact TO ventderive_writer;
        GRANT SELECT, INSERT ON fact_row, fact_encounter, fact_term TO ventderive_writer;
        GRANT UPDATE (encounter) ON fact_encounter TO ventderive_writer;
        GRANT UPDATE (quantity) ON fact_term TO ventderive_writer;
        GRANT USAGE ON SEQUENCE fact_row_id_seq TO ventderive_writer;
        GRANT EXECUTE ON FUNCTION ventderive_fact_partitions(timestamptz, timestamptz) TO ventderive_writer;
        REVOKE SELECT ON inbox, input_resource, dead_letter FROM ventderive_writer;
        GRANT INSERT ON inbox, input_resource, dead_letter TO ventderive_writer;
        GRANT SELECT (inbox_key, subject, stream_seq, received, recorded_at, resources, facts)
            ON inbox TO ventderive_writer;
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
