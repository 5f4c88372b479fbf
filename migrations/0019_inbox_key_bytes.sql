-- 0019: the inbox key as its 32 bytes instead of 64 hex characters, and
-- the inbox row's subject as a number into a lookup table.
--
-- The inbox key is the SHA-256 of the message's payload. Stored as
-- lowercase hex text it took 65 bytes in the inbox row and as many in each
-- entry of inbox_pkey, the primary key that makes a redelivered message a
-- duplicate; as bytea it takes 33. Measured on a copy of the bench's store
-- (README, Performance, "What 1.5 KB per input would need (measured)").
--
-- 1. inbox.inbox_key becomes bytea (every stored key hex-decoded), with a
--    CHECK that it is 32 bytes. The primary key inbox_pkey stays the same
--    constraint on the same column, so the claim's ON CONFLICT (inbox_key)
--    and dedup are unchanged. inbox_raw_matches compares the key with the
--    payload's SHA-256 as bytes.
-- 2. The five tables whose inbox_key is a foreign key to inbox
--    (derivation, refusal, outbox, site_settings, input_resource) convert
--    their inbox_key to bytea too: a foreign key needs the referenced
--    type. Their foreign keys are dropped and added again with the same
--    names, validated over every stored row.
-- 3. dead_letter.inbox_key (unique, no foreign key: a poison message has
--    no inbox row) converts as well, with the same CHECK, so that every
--    table holds the key one way and a key can be compared across tables
--    without a conversion.
-- 4. Views. What people and commands read does not change: every review_*
--    view that shows an inbox key shows it as 64 lowercase hex characters,
--    in the same column position (encode(..., 'hex')); review_derivation,
--    review_refusal, review_outbox and review_dead_letter, and the internal
--    view fact (inbox_key as hex text; the four views over it are left as
--    they are), are never dropped, so that a grant a site gave on one
--    stays: each is first replaced by a definition with the same columns
--    that does not read inbox_key, and after the conversion by the final
--    one.
-- 5. inbox.subject (text, 18 bytes a row on the bench) becomes subject_id,
--    an integer into the new lookup table inbox_subject (one row per
--    subject, unique). Input subjects are any subject under the input
--    stream's filter, recorded and not interpreted, so the codes are not a
--    fixed list: the writer's claim inserts a subject it does not find in
--    the same statement (ON CONFLICT DO UPDATE, a no-op update, returns the
--    row even when a concurrent transaction committed it first), as the
--    fact writer does for fact_encounter; a foreign key keeps every code a
--    known subject. integer rather than smallint: the column follows the
--    33-byte key and precedes an 8-byte-aligned bigint, so both take the
--    same room, and an integer cannot run out.
-- 6. The grants function is restated (inbox.subject_id; inbox_subject).
--    The writer's UPDATE (subject) on inbox_subject serves the claim's
--    no-op ON CONFLICT DO UPDATE; a BEFORE UPDATE trigger refuses an
--    update that changes a subject, so the inbox stays append-only.
-- 7. The rewritten tables that hold rows are analyzed: a column whose
--    type changed has no statistics until then (empty ones are not: see
--    the end of this file).
--
-- Left as they are: dead_letter.subject stays text (a dead letter is rare
-- and people read it); the counts resources and facts stay integer (facts
-- is bounded only by the message size, not provably under 32,767; two
-- smallints would move raw 4 bytes earlier, which saves 8 bytes on about
-- half the rows, as the row ends 8-aligned after id, and none on the rest).
--
-- Every table named here is rewritten under an ACCESS EXCLUSIVE lock: on a
-- large store stop the service while the migration runs.

CREATE OR REPLACE VIEW fact AS
SELECT r.id, r.key, encode(r.digest, 'hex') AS digest, coalesce(r.resource_ref, split_part(r.key, '#', 1)) AS resource_ref,
       r.version_id, r.last_updated, r.patient_ref, e.encounter, r.quantity, t.origin, t.detail, t.specimen,
       t.temp_corrected, r.value, t.unit, t.text, coalesce(r.source_value, r.value) AS source_value, t.source_unit,
       t.code_system, t.code, t.code_display, t.status, r.effective, r.issued,
       encode(r.inbox_key, 'hex') AS inbox_key,
       coalesce(r.recorded_at, i.recorded_at) AS recorded_at
FROM fact_row r
JOIN fact_encounter e ON e.id = r.encounter_id
JOIN fact_term t ON t.id = r.term_id
LEFT JOIN inbox i ON i.id = r.inbox_id;

-- The four reviewer views that read an inbox_key column are replaced, not
-- dropped: a view dropped and created again loses every grant a site gave
-- on it. First a definition with the same columns that does not read
-- inbox_key (NULL of the same type in its place), so the column can change
-- type; after the conversion the final definition, below.
CREATE OR REPLACE VIEW review_derivation AS
SELECT d.id, d.key, d.version, d.observation_id, d.kind, d.patient_ref, d.encounter,
       d.blood_gas_key, d.effective, d.value, d.unit, d.method, d.method_version,
       d.constants, d.assumptions, d.basis, d.interp_code, d.interp_text, d.interp_source,
       d.flags, d.status, d.retracted, d.algorithm, d.digest,
       p.version AS supersedes_version, p.value AS supersedes_value, p.status AS supersedes_status,
       (SELECT n.version FROM derivation n WHERE n.supersedes_id = d.id) AS superseded_by_version,
       (h.derivation_id = d.id AND NOT h.refused) AS is_current,
       NULL::text AS inbox_key, d.created_at,
       d.record, d.settings_digest
FROM derivation d
LEFT JOIN derivation p ON p.id = d.supersedes_id
LEFT JOIN head h ON h.key = d.key;

CREATE OR REPLACE VIEW review_refusal AS
SELECT r.id, r.key, r.kind, r.patient_ref, r.blood_gas_key, r.effective, r.reason, r.detail,
       r.digest, (h.refusal_id = r.id) AS is_current, NULL::text AS inbox_key, r.created_at,
       r.settings_digest
FROM refusal r
LEFT JOIN head h ON h.key = r.key;

CREATE OR REPLACE VIEW review_outbox AS
SELECT seq, subject, msg_id, headers,
       CASE WHEN substr(stored_payload, 1, 4) = '\x28b52ffd'::bytea THEN payload_size
            ELSE octet_length(stored_payload) END AS size_bytes,
       NULL::text AS inbox_key, created_at, published_at
FROM outbox;

CREATE OR REPLACE VIEW review_dead_letter AS
SELECT id, NULL::text AS inbox_key, subject, stream_seq, octet_length(raw) AS size_bytes, reason, detail,
       created_at
FROM dead_letter;

ALTER TABLE derivation DROP CONSTRAINT derivation_inbox_key_fkey;
ALTER TABLE refusal DROP CONSTRAINT refusal_inbox_key_fkey;
ALTER TABLE outbox DROP CONSTRAINT outbox_inbox_key_fkey;
ALTER TABLE site_settings DROP CONSTRAINT site_settings_inbox_key_fkey;
ALTER TABLE input_resource DROP CONSTRAINT input_resource_inbox_key_fkey;

-- The subjects: one row each, numbered in their order.
CREATE TABLE inbox_subject (
    id      integer GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    subject text NOT NULL UNIQUE CHECK (subject <> '')
);
INSERT INTO inbox_subject (subject) SELECT DISTINCT subject FROM inbox ORDER BY subject;
-- A subject is never renamed: a rename would change the recorded subject
-- of every inbox row that names it. The writer holds UPDATE (subject) only
-- for the claim's ON CONFLICT DO UPDATE, which sets a subject to itself;
-- this trigger (the owner's; the writer cannot drop or disable it) refuses
-- any update that changes one.
CREATE FUNCTION inbox_subject_unchanged() RETURNS trigger
LANGUAGE plpgsql AS $$
BEGIN
    IF NEW.subject IS DISTINCT FROM OLD.subject THEN
        RAISE EXCEPTION 'inbox_subject: subject % is never renamed', OLD.subject
            USING ERRCODE = 'insufficient_privilege';
    END IF;
    RETURN NEW;
END;
$$;
REVOKE ALL ON FUNCTION inbox_subject_unchanged() FROM PUBLIC;
CREATE TRIGGER inbox_subject_unchanged BEFORE UPDATE ON inbox_subject
    FOR EACH ROW EXECUTE FUNCTION inbox_subject_unchanged();
CREATE FUNCTION pg_temp.inbox_subject_id(s text) RETURNS integer
LANGUAGE sql STABLE AS $$ SELECT id FROM inbox_subject WHERE subject = s $$;

-- One rewrite of inbox for both columns.
ALTER TABLE inbox DROP CONSTRAINT inbox_raw_matches, DROP CONSTRAINT inbox_subject_check;
ALTER TABLE inbox
    ALTER COLUMN inbox_key TYPE bytea USING decode(inbox_key, 'hex'),
    ALTER COLUMN subject TYPE integer USING pg_temp.inbox_subject_id(subject),
    ADD CONSTRAINT inbox_key_size CHECK (octet_length(inbox_key) = 32),
    ADD CONSTRAINT inbox_raw_matches CHECK (
        raw IS NULL OR substr(raw, 1, 4) = '\x28b52ffd'::bytea OR inbox_key = sha256(raw));
ALTER TABLE inbox RENAME COLUMN subject TO subject_id;
ALTER TABLE inbox ADD CONSTRAINT inbox_subject_id_fkey FOREIGN KEY (subject_id) REFERENCES inbox_subject;

ALTER TABLE derivation ALTER COLUMN inbox_key TYPE bytea USING decode(inbox_key, 'hex');
ALTER TABLE refusal ALTER COLUMN inbox_key TYPE bytea USING decode(inbox_key, 'hex');
ALTER TABLE outbox ALTER COLUMN inbox_key TYPE bytea USING decode(inbox_key, 'hex');
ALTER TABLE site_settings ALTER COLUMN inbox_key TYPE bytea USING decode(inbox_key, 'hex');
ALTER TABLE input_resource ALTER COLUMN inbox_key TYPE bytea USING decode(inbox_key, 'hex');

ALTER TABLE derivation ADD CONSTRAINT derivation_inbox_key_fkey FOREIGN KEY (inbox_key) REFERENCES inbox;
ALTER TABLE refusal ADD CONSTRAINT refusal_inbox_key_fkey FOREIGN KEY (inbox_key) REFERENCES inbox;
ALTER TABLE outbox ADD CONSTRAINT outbox_inbox_key_fkey FOREIGN KEY (inbox_key) REFERENCES inbox;
ALTER TABLE site_settings ADD CONSTRAINT site_settings_inbox_key_fkey FOREIGN KEY (inbox_key) REFERENCES inbox;
ALTER TABLE input_resource ADD CONSTRAINT input_resource_inbox_key_fkey FOREIGN KEY (inbox_key) REFERENCES inbox;

ALTER TABLE dead_letter
    ALTER COLUMN inbox_key TYPE bytea USING decode(inbox_key, 'hex'),
    ADD CONSTRAINT dead_letter_inbox_key_size CHECK (octet_length(inbox_key) = 32);

-- fact: the columns of 0016, the key as hex text.
CREATE OR REPLACE VIEW fact AS
SELECT r.id, r.key, encode(r.digest, 'hex') AS digest, coalesce(r.resource_ref, split_part(r.key, '#', 1)) AS resource_ref,
       r.version_id, r.last_updated, r.patient_ref, e.encounter, r.quantity, t.origin, t.detail, t.specimen,
       t.temp_corrected, r.value, t.unit, t.text, coalesce(r.source_value, r.value) AS source_value, t.source_unit,
       t.code_system, t.code, t.code_display, t.status, r.effective, r.issued,
       encode(coalesce(i.inbox_key, r.inbox_key), 'hex') AS inbox_key,
       coalesce(r.recorded_at, i.recorded_at) AS recorded_at
FROM fact_row r
JOIN fact_encounter e ON e.id = r.encounter_id
JOIN fact_term t ON t.id = r.term_id
LEFT JOIN inbox i ON i.id = r.inbox_id;

-- The views of 0006, 0018 and 0001 with the same columns; the key as hex.
-- Replaced in place: the grants on them stay.
CREATE OR REPLACE VIEW review_derivation AS
SELECT d.id, d.key, d.version, d.observation_id, d.kind, d.patient_ref, d.encounter,
       d.blood_gas_key, d.effective, d.value, d.unit, d.method, d.method_version,
       d.constants, d.assumptions, d.basis, d.interp_code, d.interp_text, d.interp_source,
       d.flags, d.status, d.retracted, d.algorithm, d.digest,
       p.version AS supersedes_version, p.value AS supersedes_value, p.status AS supersedes_status,
       (SELECT n.version FROM derivation n WHERE n.supersedes_id = d.id) AS superseded_by_version,
       (h.derivation_id = d.id AND NOT h.refused) AS is_current,
       encode(d.inbox_key, 'hex') AS inbox_key, d.created_at,
       d.record, d.settings_digest
FROM derivation d
LEFT JOIN derivation p ON p.id = d.supersedes_id
LEFT JOIN head h ON h.key = d.key;

CREATE OR REPLACE VIEW review_refusal AS
SELECT r.id, r.key, r.kind, r.patient_ref, r.blood_gas_key, r.effective, r.reason, r.detail,
       r.digest, (h.refusal_id = r.id) AS is_current, encode(r.inbox_key, 'hex') AS inbox_key, r.created_at,
       r.settings_digest
FROM refusal r
LEFT JOIN head h ON h.key = r.key;

CREATE OR REPLACE VIEW review_outbox AS
SELECT seq, subject, msg_id, headers,
       CASE WHEN substr(stored_payload, 1, 4) = '\x28b52ffd'::bytea THEN payload_size
            ELSE octet_length(stored_payload) END AS size_bytes,
       encode(inbox_key, 'hex') AS inbox_key, created_at, published_at
FROM outbox;

CREATE OR REPLACE VIEW review_dead_letter AS
SELECT id, encode(inbox_key, 'hex') AS inbox_key, subject, stream_seq, octet_length(raw) AS size_bytes, reason, detail,
       created_at
FROM dead_letter;

-- The grants function of 0018 with inbox.subject_id for subject and the
-- lookup table inbox_subject (read, insert, and the no-op update of the
-- writer's ON CONFLICT DO UPDATE, which the trigger inbox_subject_unchanged
-- keeps a no-op). Reviewer views are still found by name.
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
        GRANT SELECT (id, inbox_key, subject_id, stream_seq, received, recorded_at, resources, facts)
            ON inbox TO ventderive_writer;
        GRANT SELECT, INSERT ON inbox_subject TO ventderive_writer;
        GRANT UPDATE (subject) ON inbox_subject TO ventderive_writer;
        GRANT SELECT (id, reference, resource_type, version_id, patient_ref, patient_hash, digest,
            inbox_key, received, recorded_at) ON input_resource TO ventderive_writer;
        GRANT SELECT (id, inbox_key, subject, stream_seq, reason, detail, created_at)
            ON dead_letter TO ventderive_writer;
        GRANT UPDATE (published_at) ON outbox TO ventderive_writer;
        GRANT UPDATE ON head TO ventderive_writer;
        GRANT SELECT ON schema_version TO ventderive_writer;
        GRANT SELECT ON raw_dictionary TO ventderive_writer;
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

-- A column whose type changed has lost its statistics: gather them again
-- for the tables rewritten here that hold rows (ANALYZE runs inside the
-- migration's transaction; it samples, so it stays short on a large
-- store). An empty table is left unanalyzed, as a new store's tables are:
-- statistics that say "empty" made the generic plans a connection makes
-- at warm-up (postgres.WarmPool) read fact and inbox by the wrong plans
-- once the tables filled (measured with ventderive bench on a new store:
-- PostgreSQL CPU 605-719 us an input against 243-260 without them).
DO $$
DECLARE
    t text;
    has_rows boolean;
BEGIN
    FOREACH t IN ARRAY ARRAY['inbox', 'inbox_subject', 'derivation', 'refusal', 'outbox', 'site_settings',
                             'input_resource', 'dead_letter'] LOOP
        EXECUTE format('SELECT EXISTS (SELECT 1 FROM %I)', t) INTO has_rows;
        IF has_rows THEN
            EXECUTE format('ANALYZE %I', t);
        END IF;
    END LOOP;
END
$$;
