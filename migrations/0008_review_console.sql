-- What the reviewer console (ventderive review) needs beyond the audit:
-- a patient's timeline and the patient list are read by the reviewer-visible
-- patient reference, which 0001 does not index (its indexes use the keyed
-- hash, which the reviewer never sees). Indexes only, and one view.
--
-- Cost on the write path: one more index entry per fact, derivation,
-- refusal and head row. The timeline of a 30-day stay with minute ventilator data
-- reads some 200,000 facts of one patient; without the index the query scans
-- every patient's facts.
CREATE INDEX fact_patient_ref_quantity_effective ON fact (patient_ref, quantity, effective);
CREATE INDEX derivation_patient_ref_effective ON derivation (patient_ref, effective);
CREATE INDEX refusal_patient_ref_effective ON refusal (patient_ref, effective);
-- head rows are updated in place; their patient_ref and blood_gas_key never
-- change, so the index keeps those updates heap-only (HOT).
CREATE INDEX head_patient_ref_blood_gas ON head (patient_ref, blood_gas_key);

-- review_patient_gas: one row per blood gas that has any derived value or
-- refusal, with the patient reference (never the hash), the blood-gas time
-- and what the current state of its keys says. The console's patient list
-- counts these per patient. A key whose latest version is a retraction
-- counts as retracted even when a refusal came after it (the blood gas was
-- withdrawn, so nothing can be derived again): it is then refused too.
CREATE VIEW review_patient_gas AS
SELECT h.patient_ref, h.blood_gas_key,
       min(coalesce(d.effective, r.effective)) AS effective,
       count(*) FILTER (WHERE NOT h.refused AND h.status <> 'entered-in-error') AS derived,
       count(*) FILTER (WHERE h.refused) AS refused,
       count(*) FILTER (WHERE h.status = 'entered-in-error') AS retracted,
       count(*) FILTER (WHERE h.status IN ('amended', 'corrected')) AS amended,
       max(abs(d.value)) FILTER (WHERE h.kind = 'paco2-measured-minus-predicted' AND NOT h.refused
                                 AND h.status <> 'entered-in-error') AS discrepancy_mmhg,
       array_agg(DISTINCT h.kind) FILTER (WHERE NOT h.refused AND h.status <> 'entered-in-error') AS kinds
FROM head h
LEFT JOIN derivation d ON d.id = h.derivation_id
LEFT JOIN refusal r ON r.id = h.refusal_id
GROUP BY h.patient_ref, h.blood_gas_key;

-- 0004's ventderive_apply_grants grants every review_* view by name; the
-- migration runner calls it after every run.
SELECT ventderive_apply_grants();
