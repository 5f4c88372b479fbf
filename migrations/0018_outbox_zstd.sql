-- 0018: outbox payloads compressed with zstd and a trained dictionary, as
-- inbox payloads are since 0015.
--
-- 1. raw_dictionary.kind says what a dictionary was trained on: 'inbox'
--    (every row before this migration) or 'outbox' (the published
--    Observations and Provenance). Migrate stores the binary's two embedded
--    dictionaries (consumer/rawcodec/*.dict) under their zstd dictionary
--    IDs. The default keeps an older binary's inbox insert working.
-- 2. outbox.payload is renamed stored_payload: for rows written from now on
--    a zstd frame (magic 28 b5 2f fd, the dictionary ID and a content
--    checksum in its header) of the exact bytes to publish; rows written
--    before stay plain and read as they are. The rename is on purpose: a
--    binary older than this migration would publish the frame itself
--    (and the stream's duplicate window would then drop the right bytes
--    under the same message id); with the column gone it fails instead.
--    payload_sha256 (32 bytes) and payload_size are the SHA-256 and length
--    of the exact bytes, written with the row by the service, which
--    computes them from the bytes it compresses. PostgreSQL cannot
--    decompress zstd, so this is where the views take a compressed row's
--    digest and size from; `audit verify` decodes every message published
--    for a version it checks (Observation and Provenance) and reports one
--    whose decoded bytes are not that digest (the frame's own checksum
--    catches a damaged value first).
-- 3. Views. review_published.payload keeps its meaning, the exact bytes
--    published: it is NULL for a compressed row, whose frame is in the new
--    last column payload_zstd; payload_digest and size_bytes are of the
--    exact bytes for every row (stored for a compressed row, computed for
--    a plain one). review_outbox.size_bytes likewise. review_dictionary
--    shows the reviewer the outbox dictionary (never the inbox one: it is
--    made of input payloads, which the reviewer role does not read), so
--    that a reviewer holding only the database can decode the published
--    bytes.
-- 4. Grants: the writer may read raw_dictionary (the relay decodes a frame
--    whose dictionary this binary does not embed: one a newer replica wrote
--    with) and writes the two new outbox columns with the INSERT it already
--    has.
--
-- derivation.record is left as it is, plain jsonb: the reviewer's view
-- review_derivation_step (0006) expands record -> 'steps' in SQL, which
-- PostgreSQL could not do with a zstd frame (the view would return no
-- steps for every new derivation), and compressing it saved only about 65
-- of 168 bytes per input.
--
-- A compressed payload (about 280 bytes) is below the TOAST threshold:
-- PostgreSQL neither compresses nor moves it.

ALTER TABLE raw_dictionary
    ADD COLUMN kind text NOT NULL DEFAULT 'inbox' CHECK (kind IN ('inbox', 'outbox'));

ALTER TABLE outbox RENAME COLUMN payload TO stored_payload;
ALTER TABLE outbox
    ADD COLUMN payload_sha256 bytea,
    ADD COLUMN payload_size integer,
    ADD CONSTRAINT outbox_compressed_described CHECK (
        substr(stored_payload, 1, 4) <> '\x28b52ffd'::bytea
        OR (payload_sha256 IS NOT NULL AND payload_size IS NOT NULL
            AND octet_length(payload_sha256) = 32 AND payload_size >= 0));

CREATE OR REPLACE VIEW review_published AS
SELECT d.id AS derivation_id, d.key, d.version, t.resource_type, o.seq, o.subject, o.msg_id,
       o.headers,
       CASE WHEN NOT z.compressed THEN o.stored_payload END AS payload,
       CASE WHEN z.compressed THEN encode(o.payload_sha256, 'hex')
            ELSE encode(sha256(o.stored_payload), 'hex') END AS payload_digest,
       CASE WHEN z.compressed THEN o.payload_size ELSE octet_length(o.stored_payload) END AS size_bytes,
       o.created_at, o.published_at,
       CASE WHEN z.compressed THEN o.stored_payload END AS payload_zstd
FROM derivation d
CROSS JOIN (VALUES ('Observation'), ('Provenance')) AS t(resource_type)
JOIN outbox o ON o.msg_id = t.resource_type || '/' || d.observation_id::text || '/_history/' || d.version::text
CROSS JOIN LATERAL (SELECT substr(o.stored_payload, 1, 4) = '\x28b52ffd'::bytea AS compressed) z;

CREATE OR REPLACE VIEW review_outbox AS
SELECT seq, subject, msg_id, headers,
       CASE WHEN substr(stored_payload, 1, 4) = '\x28b52ffd'::bytea THEN payload_size
            ELSE octet_length(stored_payload) END AS size_bytes,
       inbox_key, created_at, published_at
FROM outbox;

CREATE VIEW review_dictionary AS
SELECT id, kind, dictionary, created_at FROM raw_dictionary WHERE kind = 'outbox';

-- The grants function of 0016 with SELECT on raw_dictionary for the
-- writer. Reviewer views are still found by name (review_dictionary too).
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
