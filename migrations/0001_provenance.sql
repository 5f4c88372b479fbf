-- Provenance schema of ventderive: what came in, what was derived from it,
-- what was refused and why, and what is waiting to be published.
--
-- Conventions: times are timestamptz (UTC in, UTC out); digests are lower-case
-- hex SHA-256; patient identity is kept as the FHIR reference plus a keyed
-- hash (HMAC-SHA256, 32 hex characters) that logs and lookups use. CHECK
-- constraints hold what must always be true whatever the code above does.
-- Tables are append-only for the service role except outbox.published_at
-- and the head table (see ventderive_apply_grants below).

-- One row per input message accepted for processing (idempotency).
CREATE TABLE inbox (
    inbox_key   text PRIMARY KEY CHECK (inbox_key ~ '^[0-9a-f]{64}$'),
    subject     text NOT NULL CHECK (subject <> ''),
    stream_seq  bigint NOT NULL CHECK (stream_seq >= 0),
    received    timestamptz NOT NULL,
    recorded_at timestamptz NOT NULL,
    resources   integer NOT NULL CHECK (resources >= 0),
    facts       integer NOT NULL CHECK (facts >= 0)
);

-- Every FHIR resource accepted from input, exactly as received.
CREATE TABLE input_resource (
    id            bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    reference     text NOT NULL CHECK (reference ~ '^[A-Z][A-Za-z]+/[A-Za-z0-9.-]{1,64}$'),
    resource_type text NOT NULL CHECK (resource_type ~ '^[A-Z][A-Za-z]+$'),
    version_id    text NOT NULL,
    patient_ref   text NOT NULL CHECK (patient_ref ~ '^Patient/[A-Za-z0-9.-]{1,64}$'),
    patient_hash  text NOT NULL CHECK (patient_hash ~ '^[0-9a-f]{32}$'),
    digest        text NOT NULL CHECK (digest ~ '^[0-9a-f]{64}$'),
    raw           bytea NOT NULL,
    inbox_key     text NOT NULL REFERENCES inbox,
    received      timestamptz NOT NULL,
    recorded_at   timestamptz NOT NULL,
    UNIQUE (reference, digest),
    -- The digest is the SHA-256 of the bytes kept: a stored resource can be
    -- checked against what every derivation cites.
    CONSTRAINT input_resource_digest_matches CHECK (digest = encode(sha256(raw), 'hex')),
    CONSTRAINT input_resource_type_matches CHECK (reference LIKE resource_type || '/%')
);

-- Every version of every normalised input value (fhirmap.Fact), all fields.
CREATE TABLE fact (
    id             bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    key            text NOT NULL CHECK (key <> ''),
    digest         text NOT NULL CHECK (digest ~ '^[0-9a-f]{64}$'),
    resource_ref   text NOT NULL CHECK (resource_ref <> ''),
    version_id     text NOT NULL,
    last_updated   timestamptz,
    patient_ref    text NOT NULL CHECK (patient_ref ~ '^Patient/[A-Za-z0-9.-]{1,64}$'),
    patient_hash   text NOT NULL CHECK (patient_hash ~ '^[0-9a-f]{32}$'),
    encounter      text NOT NULL,
    quantity       text NOT NULL CHECK (quantity ~ '^[a-z0-9]+(-[a-z0-9]+)*$'),
    origin         text NOT NULL CHECK (origin IN ('', 'measured', 'setting', 'calculated')),
    detail         text NOT NULL,
    specimen       text NOT NULL CHECK (specimen IN ('', 'arterial', 'venous', 'capillary', 'mixed-venous', 'unknown')),
    temp_corrected boolean NOT NULL,
    value          double precision NOT NULL CHECK (value > '-Infinity' AND value < 'Infinity'),
    unit           text NOT NULL,
    text           text NOT NULL,
    source_value   double precision NOT NULL CHECK (source_value > '-Infinity' AND source_value < 'Infinity'),
    source_unit    text NOT NULL,
    code_system    text NOT NULL,
    code           text NOT NULL,
    code_display   text NOT NULL,
    status         text NOT NULL CHECK (status IN ('registered', 'preliminary', 'final', 'amended', 'corrected', 'cancelled', 'entered-in-error', 'unknown')),
    effective      timestamptz NOT NULL,
    issued         timestamptz,
    inbox_key      text NOT NULL REFERENCES inbox,
    recorded_at    timestamptz NOT NULL,
    UNIQUE (key, digest),
    -- A blood-gas value says which blood it was measured in.
    CONSTRAINT fact_blood_gas_has_specimen CHECK (quantity <> 'pco2' OR specimen <> '')
);
CREATE INDEX fact_patient_effective ON fact (patient_hash, effective);
CREATE INDEX fact_patient_quantity_effective ON fact (patient_hash, quantity, effective);

-- Every version of every derived value, with what it was computed from.
CREATE TABLE derivation (
    id              bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    key             text NOT NULL,
    version         integer NOT NULL CHECK (version >= 1),
    observation_id  uuid NOT NULL,
    kind            text NOT NULL CHECK (kind ~ '^[a-z0-9]+(-[a-z0-9]+)*$'),
    patient_ref     text NOT NULL CHECK (patient_ref ~ '^Patient/[A-Za-z0-9.-]{1,64}$'),
    patient_hash    text NOT NULL CHECK (patient_hash ~ '^[0-9a-f]{32}$'),
    encounter       text NOT NULL,
    blood_gas_key   text NOT NULL CHECK (blood_gas_key <> ''),
    effective       timestamptz NOT NULL,
    value           double precision NOT NULL CHECK (value > '-Infinity' AND value < 'Infinity'),
    unit            text NOT NULL CHECK (unit <> ''),
    method          text NOT NULL CHECK (method <> ''),
    method_version  text NOT NULL,
    constants       jsonb NOT NULL CHECK (jsonb_typeof(constants) = 'array'),
    assumptions     jsonb NOT NULL CHECK (jsonb_typeof(assumptions) = 'array'),
    basis           text NOT NULL,
    interp_code     text NOT NULL CHECK (interp_code IN ('', 'N', 'H', 'L', 'A', 'HH', 'LL')),
    interp_text     text NOT NULL,
    interp_source   text NOT NULL,
    flags           jsonb NOT NULL CHECK (jsonb_typeof(flags) = 'array'),
    status          text NOT NULL CHECK (status IN ('preliminary', 'final', 'amended', 'corrected', 'entered-in-error')),
    retracted       text NOT NULL,
    algorithm       text NOT NULL CHECK (algorithm <> ''),
    digest          text NOT NULL CHECK (digest ~ '^[0-9a-f]{64}$'),
    supersedes_id   bigint REFERENCES derivation,
    inbox_key       text NOT NULL REFERENCES inbox,
    created_at      timestamptz NOT NULL,
    UNIQUE (key, version),
    CONSTRAINT derivation_key_parts CHECK (key = patient_ref || '|' || blood_gas_key || '|' || kind),
    -- Versions are contiguous: every version after the first supersedes the one before.
    CONSTRAINT derivation_supersedes_previous CHECK ((version = 1) = (supersedes_id IS NULL)),
    -- Volumes, flows, rates and weights are positive.
    CONSTRAINT derivation_positive_amounts CHECK (unit NOT IN ('L/min', 'mL', 'mL/min', 'kg', '/min', 'mL/kg') OR value > 0),
    -- Fractions of the service's catalogue lie in 0..1; predicted PaCO2 and
    -- the ventilatory ratio are positive (codes: fhirmap.Kind*).
    CONSTRAINT derivation_fraction_in_range CHECK (kind NOT IN ('deadspace-fraction-enghoff',
        'deadspace-fraction-vco2', 'deadspace-fraction-estimated', 'alveolar-deadspace-fraction')
        OR (value >= 0 AND value <= 1)),
    CONSTRAINT derivation_positive_kinds CHECK (kind NOT IN ('paco2-predicted', 'ventilatory-ratio') OR value > 0),
    -- A retraction reason belongs to a retraction only.
    CONSTRAINT derivation_retraction_reason CHECK (retracted = '' OR status = 'entered-in-error')
);
CREATE INDEX derivation_patient_effective ON derivation (patient_hash, effective);
CREATE INDEX derivation_created ON derivation (created_at);
CREATE INDEX derivation_observation ON derivation (observation_id);
CREATE INDEX derivation_supersedes ON derivation (supersedes_id);

-- The link from each derivation version to each input it used.
CREATE TABLE derivation_input (
    derivation_id bigint NOT NULL REFERENCES derivation,
    ordinal       integer NOT NULL CHECK (ordinal >= 1),
    role          text NOT NULL CHECK (role <> ''),
    fact_key      text NOT NULL,
    fact_digest   text NOT NULL,
    resource_ref  text NOT NULL,
    time_offset   interval NOT NULL,
    fallback      text NOT NULL,
    PRIMARY KEY (derivation_id, ordinal),
    FOREIGN KEY (fact_key, fact_digest) REFERENCES fact (key, digest)
);

-- Every refusal to derive a value, with its reason and the inputs considered.
CREATE TABLE refusal (
    id            bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    key           text NOT NULL,
    kind          text NOT NULL CHECK (kind ~ '^[a-z0-9]+(-[a-z0-9]+)*$'),
    patient_ref   text NOT NULL CHECK (patient_ref ~ '^Patient/[A-Za-z0-9.-]{1,64}$'),
    patient_hash  text NOT NULL CHECK (patient_hash ~ '^[0-9a-f]{32}$'),
    blood_gas_key text NOT NULL CHECK (blood_gas_key <> ''),
    effective     timestamptz NOT NULL,
    reason        text NOT NULL CHECK (reason ~ '^[a-z0-9]+(-[a-z0-9]+)*$'),
    detail        text NOT NULL,
    digest        text NOT NULL CHECK (digest ~ '^[0-9a-f]{64}$'),
    inbox_key     text NOT NULL REFERENCES inbox,
    created_at    timestamptz NOT NULL,
    CONSTRAINT refusal_key_parts CHECK (key = patient_ref || '|' || blood_gas_key || '|' || kind)
);
CREATE INDEX refusal_patient_effective ON refusal (patient_hash, effective);
CREATE INDEX refusal_created ON refusal (created_at);
CREATE INDEX refusal_key ON refusal (key);

CREATE TABLE refusal_input (
    refusal_id   bigint NOT NULL REFERENCES refusal,
    ordinal      integer NOT NULL CHECK (ordinal >= 1),
    role         text NOT NULL CHECK (role <> ''),
    fact_key     text NOT NULL,
    fact_digest  text NOT NULL,
    resource_ref text NOT NULL,
    time_offset  interval NOT NULL,
    fallback     text NOT NULL,
    PRIMARY KEY (refusal_id, ordinal),
    FOREIGN KEY (fact_key, fact_digest) REFERENCES fact (key, digest)
);

-- The latest state of each derivation key: its latest derivation version
-- (version 0 when it was never derived) and whether a refusal came after it.
-- For a refused key, digest is the refusal's; version, status and value
-- describe the latest derivation version, if any.
CREATE TABLE head (
    key           text PRIMARY KEY,
    kind          text NOT NULL,
    patient_ref   text NOT NULL,
    patient_hash  text NOT NULL CHECK (patient_hash ~ '^[0-9a-f]{32}$'),
    blood_gas_key text NOT NULL,
    version       integer NOT NULL CHECK (version >= 0),
    refused       boolean NOT NULL,
    derivation_id bigint REFERENCES derivation,
    refusal_id    bigint REFERENCES refusal,
    digest        text NOT NULL CHECK (digest ~ '^[0-9a-f]{64}$'),
    status        text NOT NULL CHECK (status IN ('', 'preliminary', 'final', 'amended', 'corrected', 'entered-in-error')),
    value         double precision NOT NULL CHECK (value > '-Infinity' AND value < 'Infinity'),
    updated_at    timestamptz NOT NULL,
    CONSTRAINT head_key_parts CHECK (key = patient_ref || '|' || blood_gas_key || '|' || kind),
    CONSTRAINT head_refused_has_refusal CHECK (refused = (refusal_id IS NOT NULL)),
    CONSTRAINT head_version_has_derivation CHECK ((version = 0) = (derivation_id IS NULL)),
    CONSTRAINT head_never_derived_is_refused CHECK (refused OR version > 0)
);
CREATE INDEX head_patient_blood_gas ON head (patient_hash, blood_gas_key);

-- Messages to publish after commit (transactional outbox).
CREATE TABLE outbox (
    seq          bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    subject      text NOT NULL CHECK (subject <> '' AND subject !~ '\s'),
    msg_id       text NOT NULL UNIQUE CHECK (msg_id <> ''),
    headers      jsonb NOT NULL CHECK (jsonb_typeof(headers) = 'object'),
    payload      bytea NOT NULL,
    inbox_key    text NOT NULL REFERENCES inbox,
    created_at   timestamptz NOT NULL,
    published_at timestamptz
);
CREATE INDEX outbox_unpublished ON outbox (seq) WHERE published_at IS NULL;

-- Poison messages, kept as received with the reason they were refused.
CREATE TABLE dead_letter (
    id         bigint GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
    inbox_key  text NOT NULL UNIQUE CHECK (inbox_key ~ '^[0-9a-f]{64}$'),
    subject    text NOT NULL,
    stream_seq bigint NOT NULL CHECK (stream_seq >= 0),
    raw        bytea NOT NULL,
    reason     text NOT NULL CHECK (reason ~ '^[a-z0-9]+(-[a-z0-9]+)*$'),
    detail     text NOT NULL,
    created_at timestamptz NOT NULL
);
CREATE INDEX dead_letter_created ON dead_letter (created_at);

-- Reviewer views: what a clinical reviewer or auditor may read. They leave
-- out raw payloads (kept for reprocessing, not for reading) and the keyed
-- patient hash. They run with the owner's rights, so the reviewer role needs
-- no right on the tables underneath.
CREATE VIEW review_derivation AS
SELECT d.id, d.key, d.version, d.observation_id, d.kind, d.patient_ref, d.encounter,
       d.blood_gas_key, d.effective, d.value, d.unit, d.method, d.method_version,
       d.constants, d.assumptions, d.basis, d.interp_code, d.interp_text, d.interp_source,
       d.flags, d.status, d.retracted, d.algorithm, d.digest,
       p.version AS supersedes_version, p.value AS supersedes_value, p.status AS supersedes_status,
       (SELECT n.version FROM derivation n WHERE n.supersedes_id = d.id) AS superseded_by_version,
       (h.derivation_id = d.id AND NOT h.refused) AS is_current,
       d.inbox_key, d.created_at
FROM derivation d
LEFT JOIN derivation p ON p.id = d.supersedes_id
LEFT JOIN head h ON h.key = d.key;

CREATE VIEW review_derivation_input AS
SELECT i.derivation_id, i.ordinal, i.role, i.fact_key, i.fact_digest, i.resource_ref,
       f.quantity, f.origin, f.detail, f.specimen, f.value, f.unit, f.status,
       f.effective, f.version_id, i.time_offset, i.fallback
FROM derivation_input i
JOIN fact f ON f.key = i.fact_key AND f.digest = i.fact_digest;

CREATE VIEW review_refusal AS
SELECT r.id, r.key, r.kind, r.patient_ref, r.blood_gas_key, r.effective, r.reason, r.detail,
       r.digest, (h.refusal_id = r.id) AS is_current, r.inbox_key, r.created_at
FROM refusal r
LEFT JOIN head h ON h.key = r.key;

CREATE VIEW review_refusal_input AS
SELECT i.refusal_id, i.ordinal, i.role, i.fact_key, i.fact_digest, i.resource_ref,
       f.quantity, f.origin, f.detail, f.specimen, f.value, f.unit, f.status,
       f.effective, f.version_id, i.time_offset, i.fallback
FROM refusal_input i
JOIN fact f ON f.key = i.fact_key AND f.digest = i.fact_digest;

CREATE VIEW review_head AS
SELECT key, kind, patient_ref, blood_gas_key, version, refused, derivation_id, refusal_id,
       status, value, updated_at
FROM head;

CREATE VIEW review_fact AS
SELECT id, key, digest, resource_ref, version_id, last_updated, patient_ref, encounter,
       quantity, origin, detail, specimen, temp_corrected, value, unit, text,
       source_value, source_unit, code_system, code, code_display, status, effective,
       issued, inbox_key, recorded_at
FROM fact;

CREATE VIEW review_dead_letter AS
SELECT id, inbox_key, subject, stream_seq, octet_length(raw) AS size_bytes, reason, detail,
       created_at
FROM dead_letter;

CREATE VIEW review_outbox AS
SELECT seq, subject, msg_id, headers, octet_length(payload) AS size_bytes, inbox_key,
       created_at, published_at
FROM outbox;

-- ventderive_apply_grants gives the service and reviewer roles (created by
-- deploy/postgres/roles.sql) their rights on the migrated objects, for each
-- role that exists. The migration runner calls it after every run, and
-- roles.sql calls it when the schema is already there, so the order in which
-- roles and migrations are applied does not matter. A later migration that
-- adds objects replaces this function.
CREATE FUNCTION ventderive_apply_grants() RETURNS void
LANGUAGE plpgsql AS $$
BEGIN
    IF EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'ventderive_writer') THEN
        GRANT SELECT, INSERT ON inbox, input_resource, fact, derivation, derivation_input,
            refusal, refusal_input, head, outbox, dead_letter TO ventderive_writer;
        -- The only updates the service makes: marking outbox rows published
        -- and moving a key's head.
        GRANT UPDATE (published_at) ON outbox TO ventderive_writer;
        GRANT UPDATE ON head TO ventderive_writer;
        GRANT SELECT ON schema_version TO ventderive_writer;
    END IF;
    IF EXISTS (SELECT 1 FROM pg_roles WHERE rolname = 'ventderive_reviewer') THEN
        GRANT SELECT ON review_derivation, review_derivation_input, review_refusal,
            review_refusal_input, review_head, review_fact, review_dead_letter,
            review_outbox TO ventderive_reviewer;
    END IF;
END;
$$;
REVOKE ALL ON FUNCTION ventderive_apply_grants() FROM PUBLIC;
