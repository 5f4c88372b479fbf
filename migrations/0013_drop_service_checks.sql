-- Drop the pattern CHECKs on values the service computes itself, outside
-- the fact table (whose CHECKs migration 0014 revisits). Each costs a
-- regular-expression match per row written, on the hot path of every
-- input (the inbox key) and of every derivation, refusal and head, and
-- none can fail for a row the service writes:
--
--   inbox.inbox_key, dead_letter.inbox_key: the hex SHA-256 of the payload,
--     computed by the service (consumer.Message.InboxKey);
--   derivation, refusal, head .patient_hash: consumer.PatientHash, a hex
--     HMAC computed by the service;
--   derivation, refusal, head .digest: hex SHA-256 computed by fhirmap
--     (Derivation.Seal, the refusal's digest);
--   derivation.patient_ref, refusal.patient_ref: copied from facts, whose
--     patient reference the decoder (fhirmap) checked and the fact table's
--     own CHECK still guards;
--   derivation.kind, refusal.kind, refusal.reason: codes the planner takes
--     from fhirmap's constants.
--
-- Kept: every CHECK that guards an invariant between columns or rows
-- (*_key_parts, derivation_supersedes_previous, derivation_positive_amounts,
-- derivation_fraction_in_range, derivation_positive_kinds,
-- derivation_retraction_reason, head_refused_has_refusal), the closed
-- status and code lists (IN lists, no pattern), the finite-value and
-- version checks, the JSON shape checks, dead_letter.reason (a dead letter
-- is rare and its reason code is what operators filter on) and
-- outbox.subject (a subject with white space could not be published).
-- Dropping a CHECK takes a brief lock and scans nothing.

ALTER TABLE inbox DROP CONSTRAINT inbox_inbox_key_check;

ALTER TABLE dead_letter DROP CONSTRAINT dead_letter_inbox_key_check;

ALTER TABLE derivation
    DROP CONSTRAINT derivation_patient_ref_check,
    DROP CONSTRAINT derivation_patient_hash_check,
    DROP CONSTRAINT derivation_digest_check,
    DROP CONSTRAINT derivation_kind_check;

ALTER TABLE refusal
    DROP CONSTRAINT refusal_patient_ref_check,
    DROP CONSTRAINT refusal_patient_hash_check,
    DROP CONSTRAINT refusal_digest_check,
    DROP CONSTRAINT refusal_kind_check,
    DROP CONSTRAINT refusal_reason_check;

ALTER TABLE head
    DROP CONSTRAINT head_patient_hash_check,
    DROP CONSTRAINT head_digest_check;
