-- 0015: inbox payloads compressed with zstd and a trained dictionary.
--
-- 1. raw_dictionary holds every dictionary a stored payload may name, by
--    its zstd dictionary ID; migrate stores the one the binary embeds
--    (consumer/rawcodec/inbox.dict), so a reader holding only the
--    database can decode every payload. A dictionary is never removed
--    while a payload may name it.
-- 2. inbox.raw is a zstd frame (magic 28 b5 2f fd, the dictionary ID and a
--    content checksum in its header) for rows written from now on; rows
--    written before stay plain and read as they are. The inbox key stays
--    the SHA-256 of the payload as received. PostgreSQL cannot decompress
--    zstd, so inbox_raw_matches now checks plain rows only; `audit verify`
--    decodes every compressed payload and checks its SHA-256 against the
--    key (the frame's own checksum catches a damaged value first).
-- 3. A compressed payload (about 300 bytes) is far below the TOAST
--    threshold: PostgreSQL neither compresses nor moves it, so the column's
--    lz4 setting (0011) applies only to the plain rows.

CREATE TABLE raw_dictionary (
    id         bigint PRIMARY KEY CHECK (id > 0 AND id < 4294967296),
    dictionary bytea NOT NULL CHECK (substr(dictionary, 1, 4) = '\x37a430ec'::bytea),
    created_at timestamptz NOT NULL DEFAULT now()
);

ALTER TABLE inbox DROP CONSTRAINT inbox_raw_matches;
ALTER TABLE inbox ADD CONSTRAINT inbox_raw_matches CHECK (
    raw IS NULL OR substr(raw, 1, 4) = '\x28b52ffd'::bytea OR inbox_key = encode(sha256(raw), 'hex'));
