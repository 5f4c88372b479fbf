package postgres

import (
	"fmt"
	"reflect"
	"slices"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// hotPatientsSQL finds, in one statement per group, the patients whose
// facts in the group could affect a derivation: the group's facts and the
// stored versions of their keys are the points a new version changes
// (affectedCTE's changed), and a patient is hot when one of its points is
// a blood gas or a patient-level fact, when a stored blood gas of the
// patient lies in the pairing window of one (the body-temperature window
// for a temperature, as affectedCTE), or when a key of the group is stored
// under another patient (a moved fact: both patients are hot). Every other
// patient's facts affect no blood gas, now or later in the group, and are
// stored in one insert for the whole group. The second column is true for
// the patients of a moved fact (see hotWaves).
//
// $1..$4 the group's facts (patient, quantity, effective, key), $5 window
// before and $6 after, $7 and $8 the same for body temperatures
// (microseconds), $9 the body-temperature quantity, $10 the blood-gas
// quantity, $11 the patient-level quantities. Each window is a lateral
// index lookup on (patient_ref, quantity, effective) with LIMIT 1 (a
// partial index since migration 0017: the lookup repeats its quantities,
// indexedQuantitiesSQL); the stored versions of the group's keys are
// found by the unique index's key hash.
const hotPatientsSQL = `
WITH n AS MATERIALIZED (
    SELECT * FROM unnest($1::text[], $2::text[], $3::timestamptz[], $4::text[]) AS n(patient_ref, quantity, effective, key)
), s AS MATERIALIZED (
    SELECT f.patient_ref, f.quantity, f.effective, f.key FROM fact_row f
    WHERE hashtextextended(f.key, 0) = ANY(ARRAY(SELECT hashtextextended(k, 0) FROM unnest($4::text[]) AS k))
      AND f.key = ANY($4::text[])
), pts AS (
    SELECT patient_ref, quantity, effective FROM n
    UNION SELECT patient_ref, quantity, effective FROM s
)
SELECT s.patient_ref, true FROM s JOIN n ON n.key = s.key WHERE s.patient_ref <> n.patient_ref
UNION SELECT n.patient_ref, true FROM s JOIN n ON n.key = s.key WHERE s.patient_ref <> n.patient_ref
UNION SELECT patient_ref, false FROM pts WHERE quantity = $10::text OR quantity = ANY($11::text[])
UNION SELECT p.patient_ref, false FROM pts p CROSS JOIN LATERAL (
    SELECT 1 FROM fact_row b
    WHERE b.patient_ref = p.patient_ref AND b.quantity = $10::text AND b.quantity IN (` + indexedQuantitiesSQL + `)
      AND b.effective BETWEEN p.effective - CASE WHEN p.quantity = $9::text THEN $8::bigint ELSE $6::bigint END * interval '1 microsecond'
                          AND p.effective + CASE WHEN p.quantity = $9::text THEN $7::bigint ELSE $5::bigint END * interval '1 microsecond'
    LIMIT 1) b`

// countFactsSQL counts the facts each message of a group stored, when the
// group's insert stored fewer than it was given (a fact already stored).
const countFactsSQL = `
SELECT inbox_key, count(*) FROM fact
WHERE hashtextextended(key, 0) = ANY(ARRAY(SELECT hashtextextended(k, 0) FROM unnest($1::text[]) AS k))
  AND key = ANY($1::text[]) AND inbox_key = ANY($2::text[]) GROUP BY 1`

// sameWindows reports whether every message of the group pairs in the same
// windows; hotPatientsSQL takes one set for the group.
func sameWindows(msgs []consumer.Message) bool {
	for _, m := range msgs[1:] {
		if m.Window != msgs[0].Window || m.Horizon != msgs[0].Horizon || m.TempWindow != msgs[0].TempWindow {
			return false
		}
	}
	return true
}

// hotArgs are the arguments of hotPatientsSQL over every fact of msgs.
func hotArgs(msgs []consumer.Message) []any {
	var pat, qty, key []string
	var eff []time.Time
	for _, m := range msgs {
		for _, f := range m.Facts {
			pat, qty, key, eff = append(pat, f.Patient), append(qty, string(f.Quantity)), append(key, f.Key), append(eff, f.Effective.UTC())
		}
	}
	m := msgs[0]
	tw := m.TempWindow
	if tw == (fhirmap.Window{}) {
		tw = m.Window
	}
	return []any{pat, qty, eff, key, m.Window.Before.Microseconds(), m.Window.After.Microseconds(),
		tw.Before.Microseconds(), tw.After.Microseconds(), string(fhirmap.QBodyTemp), string(fhirmap.QPCO2), patientLevel}
}

// coldMessages marks the messages of a group whose patients are all cold:
// none is in hot (hotPatientsSQL), none has a fact key that the group also
// names under another patient, and none shares a patient with a hot
// message (a message of a hot and a cold patient makes both hot). Recorded
// before the others, such a message changes nothing they see: their
// snapshots are per patient, and it affects no blood gas of its own
// patients, so recording it out of order leaves every row as the
// sequential order would, except fact ids.
func coldMessages(msgs []consumer.Message, hot []string) []bool {
	isHot := make(map[string]bool, len(hot))
	for _, p := range hot {
		isHot[p] = true
	}
	keyPatient := map[string]string{}
	for _, m := range msgs {
		for _, f := range m.Facts {
			if p, ok := keyPatient[f.Key]; ok && p != f.Patient {
				isHot[p], isHot[f.Patient] = true, true
			}
			keyPatient[f.Key] = f.Patient
		}
	}
	pats := make([][]string, len(msgs))
	for i, m := range msgs {
		pats[i] = messagePatients(m)
	}
	cold := make([]bool, len(msgs))
	for changed := true; changed; {
		changed = false
		for i := range msgs {
			h := slices.ContainsFunc(pats[i], func(p string) bool { return isHot[p] })
			if !h {
				continue
			}
			for _, p := range pats[i] {
				if !isHot[p] {
					isHot[p], changed = true, true
				}
			}
		}
	}
	for i := range msgs {
		cold[i] = !slices.ContainsFunc(pats[i], func(p string) bool { return isHot[p] })
	}
	return cold
}

// concatArgs joins the per-message argument lists of one statement (as
// factArgs builds them) into one: slices are concatenated position by
// position; any other value must be the same in every list (the recording
// time) and is kept once.
func concatArgs(lists [][]any) ([]any, error) {
	if len(lists) == 0 {
		return nil, nil
	}
	out := slices.Clone(lists[0])
	for j, v := range out {
		// Fresh slices: the first list's arrays are not appended to.
		if rv := reflect.ValueOf(v); rv.Kind() == reflect.Slice {
			out[j] = reflect.AppendSlice(reflect.MakeSlice(rv.Type(), 0, rv.Len()*len(lists)), rv).Interface()
		}
	}
	for _, l := range lists[1:] {
		if len(l) != len(out) {
			return nil, fmt.Errorf("concat args: %d arguments, want %d", len(l), len(out))
		}
		for j, v := range l {
			rv := reflect.ValueOf(v)
			if rv.Kind() == reflect.Slice {
				acc := reflect.ValueOf(out[j])
				if acc.Type() != rv.Type() {
					return nil, fmt.Errorf("concat args: argument %d is %s and %s", j+1, acc.Type(), rv.Type())
				}
				out[j] = reflect.AppendSlice(acc, rv).Interface()
				continue
			}
			if !reflect.DeepEqual(v, out[j]) {
				return nil, fmt.Errorf("concat args: argument %d differs between messages", j+1)
			}
		}
	}
	return out, nil
}

// hotWaves splits the hot messages of a group (indexes into msgs, in
// order) into waves of consecutive messages with pairwise disjoint
// patients and fact keys: within a wave, each message's facts, affected
// blood gases, snapshot and heads concern only its own patients and keys
// (every lookup of affectedCTE and the snapshot statements is by the
// message's patient or keys), so storing the facts of the whole wave before
// reading any of them changes nothing any message of the wave reads, and
// the wave takes one fact insert and one round trip for all of them. Fact
// ids keep the message order (the insert takes the wave's facts in order).
// A message with a patient of a moved fact (a key stored, or named earlier
// in the group, under another patient: moved) is a wave of its own: it
// reads the other patient's snapshot too (loadMoved).
func hotWaves(msgs []consumer.Message, hot []int, moved map[string]bool) [][]int {
	keyPatient := map[string]string{}
	for _, m := range msgs {
		for _, f := range m.Facts {
			if p, ok := keyPatient[f.Key]; ok && p != f.Patient {
				moved[p], moved[f.Patient] = true, true
			}
			keyPatient[f.Key] = f.Patient
		}
	}
	solo := func(i int) bool {
		return slices.ContainsFunc(messagePatients(msgs[i]), func(p string) bool { return moved[p] })
	}
	var waves [][]int
	for start := 0; start < len(hot); {
		end := start + 1
		if !solo(hot[start]) {
			seen := map[string]bool{}
			add := func(i int) {
				for _, p := range messagePatients(msgs[i]) {
					seen["p "+p] = true
				}
				for _, f := range msgs[i].Facts {
					seen["k "+f.Key] = true
				}
			}
			add(hot[start])
			for end < len(hot) && !solo(hot[end]) {
				i := hot[end]
				clash := slices.ContainsFunc(messagePatients(msgs[i]), func(p string) bool { return seen["p "+p] }) ||
					slices.ContainsFunc(msgs[i].Facts, func(f fhirmap.Fact) bool { return seen["k "+f.Key] })
				if clash {
					break
				}
				add(i)
				end++
			}
		}
		waves = append(waves, hot[start:end])
		start = end
	}
	return waves
}
