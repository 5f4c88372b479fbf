-- Least privilege, tightened where PostgreSQL allows it.
--
-- 1. Outbox subjects. The writer role inserts outbox rows; a subject in
--    NATS's reserved "$" namespaces ($JS.API..., $SYS..., $KV...), with a
--    wildcard token (* or >), or with an empty token is never a derived
--    output, whatever the site's prefix. The prefix itself is the NATS
--    account's publish permission (deploy/nats/nats-server.conf): the
--    database cannot know it, and a setting the writer could read here is
--    one the writer could also change in its own session.
ALTER TABLE outbox ADD CONSTRAINT outbox_subject_plain CHECK (
    subject !~ '^\$' AND subject !~ '[*>]' AND subject !~ '(^\.|\.\.|\.$)');

-- 2. Raw payloads. The service writes input_resource.raw and
--    dead_letter.raw and never reads them back (the reviewer reads neither
--    either: its views leave them out). The writer keeps SELECT on every
--    other column: the ON CONFLICT targets and the snapshot queries need
--    them.
CREATE OR REPLACE FUNCTION ventderive_apply_grants() RETURNS void
LANGUAGE plpgsql AS $$
DECLARE
    v text;
BEGIN
    IF EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'ventderive_writer') THEN
        GRANT SELECT, INSERT ON inbox, fact, derivation, derivation_input,
            refusal, refusal_input, head, outbox TO ventderive_writer;
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
