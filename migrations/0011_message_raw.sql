-- Narrower storage: each input message's bytes are kept once, compressed,
-- in its inbox row, instead of a copy of every resource it held.
--
-- Measured on the bench's default scenario (10,000 inputs, 2,628 bytes a
-- message on average, 4.3 resources a message): input_resource was 4,412
-- bytes per input (heap 3,322, indexes 1,089) of 8,808, half of the store.
-- A resource's JSON is 430-450 bytes, under PostgreSQL's TOAST threshold
-- (about 2 KB a row), so it was never compressed, whatever the column's
-- compression or the table's toast_tuple_target (which only sets the
-- target once a row is past the threshold: a 705-byte value stays
-- uncompressed with toast_tuple_target = 128, tested on PostgreSQL 15).
-- A Bundle of 6-8 Observations (about 55% of the inputs) is past the
-- threshold as one value, and lz4 keeps about a quarter of it (3,180 ->
-- 875 bytes on the demo store's Bundles); a single Observation (the rest)
-- is kept as received.
--
-- 1. inbox.raw: the message payload exactly as received (the inbox key is
--    its SHA-256, which the CHECK holds). Every resource the service
--    accepted is inside it byte for byte (fhirmap keeps each resource's
--    raw JSON as a sub-slice of the payload), and every fact names its
--    inbox row, so a fact can still be traced to the bytes it came from.
--    Rows recorded before this migration have NULL here; their resources
--    stay in input_resource.
-- 2. input_resource is no longer written by the service (it holds the
--    rows recorded before; nothing reads them but an auditor with the
--    owner's rights). Its per-row CHECKs (three regular expressions and a
--    SHA-256 per resource) leave the hot path with it.
-- 3. fact_pkey: no query looks a fact up by id (idx_scan 0 on a demo
--    store after the service's ingest and the audit questions list,
--    refusals, refused, changes, discrepancies, daily and verify; id is
--    compared, never searched:
--    "ORDER BY id", "g.id + 0 > f.id"). The identity column stays and
--    still numbers versions in order; its index (22 bytes a fact, about 95
--    bytes an input) goes.
ALTER TABLE inbox ADD COLUMN raw bytea;
ALTER TABLE inbox ALTER COLUMN raw SET COMPRESSION lz4;
ALTER TABLE inbox ADD CONSTRAINT inbox_raw_matches CHECK (raw IS NULL OR inbox_key = encode(sha256(raw), 'hex'));

ALTER TABLE fact DROP CONSTRAINT fact_pkey;

-- The grants function of 0006 with the inbox's payload, like the other
-- raw payloads (0005), written and never read back by the writer: SELECT
-- on inbox becomes SELECT on every column but raw. Every other grant is
-- unchanged.
CREATE OR REPLACE FUNCTION ventderive_apply_grants() RETURNS void
LANGUAGE plpgsql AS $$
DECLARE
    v text;
BEGIN
    IF EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'ventderive_writer') THEN
        GRANT SELECT, INSERT ON fact, derivation, derivation_input,
            refusal, refusal_input, head, outbox, site_settings TO ventderive_writer;
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
