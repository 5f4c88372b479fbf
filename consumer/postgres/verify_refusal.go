package postgres

import (
	"context"
	"fmt"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// StatusRefused is Verdict.Status of a verified refusal (a refusal has no
// FHIR status of its own: it was published as an OperationOutcome).
const StatusRefused = "refused"

// refusalFactsSQL loads the facts a refusal was made from, as the store held
// them when it was planned: up to the last fact of the message that made it
// ($11 the refusal's id, $2 its created_at; fact ids grow in the order a
// group's messages are recorded, and every message of a group shares one
// recorded_at, so a time bound would take in later messages of the same
// group, which may have made a later version of the same refusal), or, for
// a message that stored no fact, every fact recorded before its
// transaction. Every version
// recorded by then of the patient's facts in the pairing window ($3, $4),
// of the patient-level (standing) facts ($5), and of the eight ventilator
// readings nearest before and after the window ($6), and of the body
// temperatures in their own window ($8, $9; $10 the quantity), as the service's
// snapshot loads them (store.go, snapshotFactsSQL). fhirmap.Current then
// picks the versions in force, as the planner does. Since migration 0017
// (patient_ref, quantity, effective) holds only indexedQuantitiesSQL: the
// window and the nearest readings are read through
// fact_row_patient_ref_effective, the patient-level facts and body
// temperatures by patient and quantity with the literal list repeated,
// and the facts by key through the unique index's key hash.
const refusalFactsSQL = `
WITH bound AS MATERIALIZED (
    SELECT coalesce(
        (SELECT max(x.id) FROM review_fact x WHERE (x.patient_ref || '') = $1 AND x.inbox_key =
            (SELECT r.inbox_key FROM review_refusal r WHERE r.id = $11)),
        (SELECT max(y.id) FROM review_fact y WHERE (y.patient_ref || '') = $1 AND y.recorded_at < $2)) AS id
), cand AS (
    SELECT f.key FROM review_fact f
    WHERE (f.patient_ref || '') = $1 AND f.effective BETWEEN $3 AND $4 AND f.quantity = ANY($7::text[])
      AND f.id <= (SELECT id FROM bound)
    UNION ALL
    SELECT f.key FROM unnest($5::text[]) AS q(quantity) CROSS JOIN LATERAL (
        SELECT f.key FROM review_fact f
        WHERE f.patient_ref = $1 AND f.quantity = q.quantity AND f.quantity IN (` + indexedQuantitiesSQL + `)
          AND f.id <= (SELECT id FROM bound)
        OFFSET 0) f
    UNION ALL
    (SELECT f.key FROM review_fact f
     WHERE (f.patient_ref || '') = $1 AND f.effective < $3 AND f.quantity = ANY($6::text[])
       AND f.id <= (SELECT id FROM bound)
     ORDER BY f.effective DESC LIMIT 8)
    UNION ALL
    (SELECT f.key FROM review_fact f
     WHERE (f.patient_ref || '') = $1 AND f.effective > $4 AND f.quantity = ANY($6::text[])
       AND f.id <= (SELECT id FROM bound)
     ORDER BY f.effective LIMIT 8)
    UNION ALL
    SELECT f.key FROM review_fact f
    WHERE f.patient_ref = $1 AND f.quantity = $10::text AND f.quantity IN (` + indexedQuantitiesSQL + `)
      AND f.id <= (SELECT id FROM bound) AND f.effective BETWEEN $8 AND $9
)
SELECT ` + factColumns + ` FROM review_fact
WHERE hashtextextended(key, 0) = ANY(ARRAY(SELECT DISTINCT hashtextextended(key, 0) FROM cand))
  AND key = ANY(ARRAY(SELECT DISTINCT key FROM cand)) AND patient_ref = $1 AND id <= (SELECT id FROM bound)
ORDER BY id`

// allQuantities are the quantities a fact can have (fhirmap's Q* codes).
var allQuantities = []string{string(fhirmap.QPCO2), string(fhirmap.QPO2), string(fhirmap.QPH),
	string(fhirmap.QBicarbonate), string(fhirmap.QBaseExcess), string(fhirmap.QPETCO2), string(fhirmap.QVCO2),
	string(fhirmap.QMinuteVol), string(fhirmap.QTidalVol), string(fhirmap.QRespRate), string(fhirmap.QFiO2),
	string(fhirmap.QPEEP), string(fhirmap.QPlateau), string(fhirmap.QMeanAirway), string(fhirmap.QPFRatio),
	string(fhirmap.QWeight), string(fhirmap.QHeight), string(fhirmap.QBodyTemp), string(fhirmap.QSex),
	string(fhirmap.QBirthDate), string(fhirmap.QPECO2), string(fhirmap.QFETCO2), string(fhirmap.QTargetPaCO2),
	string(fhirmap.QApparatusVD), string(fhirmap.QAirway)}

// ventilatorQuantities are the quantities fhirmap counts as ventilator
// readings (fhirmap.IsVentilatorReading; TestRefusalVerifyQuantities keeps
// them equal to the snapshot's ventilatorQuantitiesSQL).
func ventilatorQuantities() []string {
	var out []string
	for _, q := range allQuantities {
		if fhirmap.IsVentilatorReading(fhirmap.Quantity(q)) {
			out = append(out, q)
		}
	}
	return out
}

// VerifyRefusals re-derives every stored refusal the filter selects
// (Refused's order and paging) with this build's code under the refusal's
// settings snapshot, from the facts the store held when the refusal was
// recorded, and reports per refusal whether its reason, detail and digest
// (kind, reason and the inputs considered) reproduce.
func (r *Reviewer) VerifyRefusals(ctx context.Context, f Filter) (Page[Verdict], error) {
	refused, err := r.Refused(ctx, f)
	if err != nil {
		return Page[Verdict]{}, err
	}
	rs := make([]Refusal, len(refused.Rows))
	for i, x := range refused.Rows {
		rs[i] = x.Refusal
	}
	out := Page[Verdict]{Offset: refused.Offset, Limit: refused.Limit, More: refused.More, NextOffset: refused.NextOffset}
	out.Rows, err = r.verifyRefusals(ctx, rs)
	if err != nil {
		return Page[Verdict]{}, fmt.Errorf("verify refusals: %w", err)
	}
	return out, nil
}

func (r *Reviewer) verifyRefusals(ctx context.Context, rs []Refusal) ([]Verdict, error) {
	settings := map[string]*consumer.Settings{}
	type group struct {
		patient, bloodGas, settings, inbox string
		asOf                               time.Time
	}
	// The message that made each refusal: the refusals of one blood gas
	// made by one message come from one derivation.
	ids := make([]int64, len(rs))
	for i, ref := range rs {
		ids[i] = ref.ID
	}
	inboxOf := map[int64]string{}
	rows, err := r.pool.Query(ctx, `SELECT id, inbox_key FROM review_refusal WHERE id = ANY($1)`, ids)
	if err != nil {
		return nil, fmt.Errorf("read the messages of refusals: %w", err)
	}
	for rows.Next() {
		var id int64
		var inbox string
		if err := rows.Scan(&id, &inbox); err != nil {
			rows.Close()
			return nil, err
		}
		inboxOf[id] = inbox
	}
	rows.Close()
	if err := rows.Err(); err != nil {
		return nil, err
	}
	// The refusals of one blood gas recorded together come from one
	// derivation: derive it once.
	derived := map[group][]fhirmap.Refusal{}
	values := map[group][]fhirmap.Derivation{}
	out := make([]Verdict, 0, len(rs))
	for _, ref := range rs {
		x := Verdict{Key: ref.Key, Kind: ref.Kind, Patient: ref.Patient, BloodGas: ref.BloodGas, Effective: ref.Effective,
			Status: StatusRefused, Settings: ref.Settings, Reason: ref.Reason, Detail: ref.Detail,
			Published: "refused: " + ref.Reason, Digest: ref.Digest, Findings: []string{}, Recorded: ref.Recorded}
		if ref.Settings == "" {
			x.Outcome = OutcomeNotVerifiable
			x.Why = "not verifiable with this build: no settings snapshot was recorded with this refusal (recorded before the store kept them)"
			out = append(out, x)
			continue
		}
		s, ok := settings[ref.Settings]
		if !ok {
			rec, err := r.Settings(ctx, ref.Settings)
			if err != nil {
				return nil, fmt.Errorf("settings %s: %w", ref.Settings, err)
			}
			parsed, err := consumer.ParseSettings([]byte(rec.Snapshot))
			if err != nil {
				return nil, err
			}
			s = &parsed
			settings[ref.Settings] = s
		}
		x.Algorithm = s.Algorithm
		if s.Algorithm != fhirmap.Algorithm {
			x.Outcome = OutcomeNotVerifiable
			x.Why = fmt.Sprintf("not verifiable with this build: made under algorithm %s, this build runs %s", s.Algorithm, fhirmap.Algorithm)
			out = append(out, x)
			continue
		}
		g := group{ref.Patient, ref.BloodGas, ref.Settings, inboxOf[ref.ID], ref.Recorded}
		if _, ok := derived[g]; !ok {
			w, tw := s.Site.Window, s.Site.TemperatureWindow
			if tw == (fhirmap.Window{}) {
				tw = w
			}
			facts, err := queryRows(ctx, r.pool, refusalFactsSQL, scanFact, ref.Patient, ref.Recorded,
				ref.Effective.Add(-w.Before), ref.Effective.Add(w.After), patientLevel, ventilatorQuantities(), allQuantities,
				ref.Effective.Add(-tw.Before), ref.Effective.Add(tw.After), string(fhirmap.QBodyTemp), ref.ID)
			if err != nil {
				return nil, fmt.Errorf("read facts of a refusal: %w", err)
			}
			ds, refs := fhirmap.DeriveBloodGas(ref.BloodGas, facts, s.Site)
			derived[g], values[g] = orNone(refs), ds
		}
		rederiveRefusal(&x, ref, derived[g], values[g])
		out = append(out, x)
	}
	return out, nil
}

func orNone[T any](v []T) []T {
	if v == nil {
		return []T{}
	}
	return v
}

// rederiveRefusal fills x from the re-derivation of ref's blood gas.
func rederiveRefusal(x *Verdict, ref Refusal, refs []fhirmap.Refusal, ds []fhirmap.Derivation) {
	find := func(format string, a ...any) { x.Findings = append(x.Findings, fmt.Sprintf(format, a...)) }
	x.Outcome = OutcomeMismatch
	for _, d := range ds {
		if d.Kind == ref.Kind {
			v := d.Result.Value
			x.RederivedValue, x.Rederived = &v, fhirmap.FormatValue(d.Kind, v)
			x.DisplayUnit = DisplayUnit(d.Result.Unit)
			find("refused (%s: %s), re-derived a value: %s", ref.Reason, ref.Detail, withDisplayUnit(x.Rederived, x.DisplayUnit))
			return
		}
	}
	var got *fhirmap.Refusal
	for i := range refs {
		if refs[i].Kind == ref.Kind {
			got = &refs[i]
		}
	}
	if got == nil {
		find("refused (%s: %s), re-derived: nothing (the stored facts hold no current blood gas with that key)", ref.Reason, ref.Detail)
		return
	}
	x.RederivedReason, x.RederivedDetail, x.RederivedDigest = got.Reason, got.Detail, got.Digest
	x.Rederived = "refused: " + got.Reason
	if got.Reason != ref.Reason {
		find("reason: stored %s, re-derived %s", ref.Reason, got.Reason)
	}
	if got.Detail != ref.Detail {
		find("detail: stored %q, re-derived %q", ref.Detail, got.Detail)
	}
	if got.Digest != ref.Digest {
		find("digest (kind, reason and inputs considered): stored %s, re-derived %s", ref.Digest, got.Digest)
	}
	if len(x.Findings) == 0 {
		x.Outcome = OutcomeReproduced
	}
}
