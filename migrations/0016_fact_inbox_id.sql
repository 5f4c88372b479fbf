-- Narrower fact rows: a fact names its message by a bigint key into inbox
-- instead of the 32-byte inbox key, takes its recording time from that
-- inbox row, stores a source value only when it differs from the value,
-- and holds its fixed-width columns first.
--
-- Measured on the bench's default scenario at 0015 (9,984 inputs, 42,888
-- facts, 4.3 a message: 3,559 bytes per input, fact_row 2,274 of them):
-- a fact row was 225 bytes (pg_column_size), its heap 1,005 bytes an
-- input; the unique (key, digest, effective) index 784 bytes an input
-- (51% leaf density: every patient appends at its own place in key
-- order, and B-tree splits those pages in the middle), (patient_ref,
-- quantity, effective) 371 and ((patient_ref || ''), effective) 93.
--
-- What the facts of one message repeat, on that data: the inbox key and
-- the recording time (every fact of a message, always), the patient,
-- encounter and effective time (every message of the bench names one of
-- each). What they do not: 42,800 of the 42,888 facts are resources of
-- their own (a Bundle of one Observation per reading), so the resource
-- reference, digest, version and last update are per fact, not per
-- message; a table per resource version would hold as many rows as
-- fact_row.
--
-- Options measured on a copy of that store and not taken:
-- * a table per message (patient, encounter, effective, issued, version,
--   times, inbox key) with narrow fact rows: the fact rows must keep the
--   patient, quantity and effective time for their indexes and the key
--   and digest for the unique index, so the per-message row saves the
--   encounter and version on top of what this migration saves, and costs
--   a row and a primary key per message.
-- * toast_tuple_target = 128 and lz4 on outbox and derivation: outbox
--   2,236,416 -> 2,310,144 bytes (pglz) and 2,400,256 (lz4), derivation
--   1,638,400 -> 1,851,392 and 1,933,312: moving a compressed payload of
--   1,800 bytes out of line costs a TOAST chunk slot, and lz4 compresses
--   this JSON less than pglz. Left as they are.
-- * dropping indexes unused by the bench (pg_stat_user_indexes): on
--   fact_row all three are used (the unique one by every key lookup and
--   the writer's ON CONFLICT, the quantity one by the snapshots, the
--   expression one by the windows); the unused ones of derivation and
--   refusal (created, observation, patient_ref/effective, supersedes, key)
--   serve the reviewer console, audit verify and replay, and together hold
--   17 bytes an input.
--
-- 1. inbox gets id, a bigint identity (existing rows numbered in the
--    order they are stored), unique. The writers' inserts name their
--    columns and leave it to its default.
-- 2. fact_row is rebuilt with the same name, partitions, indexes, checks
--    and ids, its columns reordered (the 8-byte ones first: no padding
--    between text and timestamps) and:
--    * inbox_id: the inbox row of the message that stored the fact.
--      inbox_key (bytea, 32 bytes) stays as a column but is NULL whenever
--      inbox_id is set; it holds the key of a fact whose message has no
--      inbox row (none the service writes: it stores a message's inbox row
--      and its facts in one transaction; a row copied here without one
--      keeps its key). Exactly one of the two is set (CHECK).
--    * recorded_at: NULL when it is the inbox row's recorded_at (the
--      writer records both with the same time); set otherwise, and always
--      for a fact without an inbox row (CHECK).
--    * source_value: NULL when its bytes are those of value (float8send:
--      -0 stays -0); the view returns value then.
--    Measured on a copy of the store above: 225 -> 171 bytes a row,
--    heap 10,043,392 -> 7,692,288 bytes; inbox grows by its id and the
--    id's index.
-- 3. The view fact keeps its columns, names, types and values: it joins
--    inbox by id (LEFT JOIN on a unique key: a reader that uses neither
--    inbox_key nor recorded_at, like the snapshot statements, does not
--    read inbox at all). The four review_* views over fact are dropped
--    with it and created again with the same text.
-- 4. The unique key (key, digest, effective), the writer's ON CONFLICT
--    target, and the two patient indexes are unchanged, so lookups and
--    the dedup of a fact version are as before.

ALTER TABLE inbox ADD COLUMN id bigint GENERATED ALWAYS AS IDENTITY;
ALTER TABLE inbox ADD CONSTRAINT inbox_id_key UNIQUE (id);

-- The stored facts with the values they will keep, and the partitions.
CREATE TEMP TABLE fact_0015 ON COMMIT DROP AS
SELECT r.*, i.id AS new_inbox_id, i.recorded_at AS inbox_recorded_at
FROM fact_row r LEFT JOIN inbox i ON i.inbox_key = encode(r.inbox_key, 'hex');
CREATE TEMP TABLE fact_0015_partitions ON COMMIT DROP AS
SELECT (substr(c.relname, 10, 4) || '-' || substr(c.relname, 15, 2) || '-01 00:00:00+00')::timestamptz AS m
FROM pg_inherits h JOIN pg_class c ON c.oid = h.inhrelid
WHERE h.inhparent = 'fact_row'::regclass AND c.relname ~ '^fact_row_[0-9]{4}_[0-9]{2}$';

DROP VIEW fact CASCADE;
ALTER SEQUENCE fact_row_id_seq OWNED BY NONE;
DROP TABLE fact_row;

CREATE TABLE fact_row (
    id           bigint NOT NULL DEFAULT nextval('fact_row_id_seq'),
    inbox_id     bigint,
    effective    timestamptz NOT NULL,
    value        double precision NOT NULL CHECK (value > '-Infinity' AND value < 'Infinity'),
    source_value double precision CHECK (source_value > '-Infinity' AND source_value < 'Infinity'),
    last_updated timestamptz,
    issued       timestamptz,
    recorded_at  timestamptz,
    encounter_id integer NOT NULL,
    term_id      integer NOT NULL,
    key          text NOT NULL CHECK (key <> ''),
    digest       bytea NOT NULL CHECK (octet_length(digest) = 32),
    patient_ref  text NOT NULL,
    quantity     text NOT NULL,
    version_id   text NOT NULL,
    resource_ref text CHECK (resource_ref <> ''),
    inbox_key    bytea CHECK (octet_length(inbox_key) = 32),
    CONSTRAINT fact_row_inbox CHECK ((inbox_id IS NULL) = (inbox_key IS NOT NULL)),
    CONSTRAINT fact_row_recorded CHECK (inbox_id IS NOT NULL OR recorded_at IS NOT NULL),
    CONSTRAINT fact_row_key_digest_effective UNIQUE (key, digest, effective)
) PARTITION BY RANGE (effective);
ALTER SEQUENCE fact_row_id_seq OWNED BY fact_row.id;
CREATE INDEX fact_row_patient_ref_quantity_effective ON fact_row (patient_ref, quantity, effective);
CREATE INDEX fact_row_patient_ref_effective ON fact_row ((patient_ref || ''), effective);
CREATE TABLE fact_row_default PARTITION OF fact_row DEFAULT;

-- The same monthly partitions as before (ventderive_fact_partitions names
-- them fact_row_YYYY_MM, as 0014 did).
SELECT ventderive_fact_partitions(m, m + interval '1 month') FROM fact_0015_partitions ORDER BY m;

INSERT INTO fact_row (id, inbox_id, effective, value, source_value, last_updated, issued, recorded_at, encounter_id,
    term_id, key, digest, patient_ref, quantity, version_id, resource_ref, inbox_key)
SELECT f.id, f.new_inbox_id, f.effective, f.value,
    CASE WHEN float8send(f.source_value) = float8send(f.value) THEN NULL ELSE f.source_value END,
    f.last_updated, f.issued,
    CASE WHEN f.new_inbox_id IS NOT NULL AND f.recorded_at = f.inbox_recorded_at THEN NULL ELSE f.recorded_at END,
    f.encounter_id, f.term_id, f.key, f.digest, f.patient_ref, f.quantity, f.version_id, f.resource_ref,
    CASE WHEN f.new_inbox_id IS NULL THEN f.inbox_key END
FROM fact_0015 f
ORDER BY f.id;

CREATE VIEW fact AS
SELECT r.id, r.key, encode(r.digest, 'hex') AS digest, coalesce(r.resource_ref, split_part(r.key, '#', 1)) AS resource_ref,
       r.version_id, r.last_updated, r.patient_ref, e.encounter, r.quantity, t.origin, t.detail, t.specimen,
       t.temp_corrected, r.value, t.unit, t.text, coalesce(r.source_value, r.value) AS source_value, t.source_unit,
       t.code_system, t.code, t.code_display, t.status, r.effective, r.issued,
       coalesce(i.inbox_key, encode(r.inbox_key, 'hex')) AS inbox_key,
       coalesce(r.recorded_at, i.recorded_at) AS recorded_at
FROM fact_row r
JOIN fact_encounter e ON e.id = r.encounter_id
JOIN fact_term t ON t.id = r.term_id
LEFT JOIN inbox i ON i.id = r.inbox_id;

-- The views of 0014, unchanged.
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

-- The grants function of 0014 with inbox.id: the writer's fact insert
-- looks up the inbox row's id and recording time by inbox key. Every other
-- grant is unchanged; fact_row is a new table, so its grants are given
-- again.
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
        GRANT SELECT (id, inbox_key, subject, stream_seq, received, recorded_at, resources, facts)
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
