package postgres

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"strings"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/ventderive/ventderive/fhirmap"
)

// Changes a replay can find for one derivation key (ReplayChange.Change).
const (
	ReplayValueChanged     = "value-changed"       // a value, now another (as published)
	ReplayInterpretation   = "interpretation-flip" // the same published value, another interpretation
	ReplayRefusalToValue   = "refusal-to-value"    // refused, now derived
	ReplayValueToRefusal   = "value-to-refusal"    // derived, now refused
	ReplayReasonChanged    = "reason-changed"      // refused, now for another reason
	ReplayWithdrawnToValue = "withdrawn-to-value"  // retracted, now derived
	ReplayNew              = "new"                 // never recorded, now derived or refused
)

// ReplayChange is one derivation key whose recomputation differs from
// its latest stored state. From and To are values as published (with
// display unit), or "refused: <reason>" / "withdrawn". Delta is To minus
// From at full precision when both are values.
type ReplayChange struct {
	Key        string    `json:"key"`
	Kind       string    `json:"kind"`
	Patient    string    `json:"patient"`
	BloodGas   string    `json:"bloodGas"`
	Effective  time.Time `json:"effective"` // blood-gas time
	Change     string    `json:"change"`
	From       string    `json:"from"`
	To         string    `json:"to"`
	Delta      *float64  `json:"delta,omitempty"`
	FromInterp string    `json:"fromInterpretation,omitempty"`
	ToInterp   string    `json:"toInterpretation,omitempty"`
	// InterpretationFlip is true when both sides have a value and their
	// interpretation codes differ (also for a changed value).
	InterpretationFlip bool `json:"interpretationFlip"`
}

// ReplayKind sums up the replay of one kind. The Delta* fields describe
// the distribution of the changes of value (To minus From, in Unit, full
// precision): minimum, quartiles and maximum; nil when no value changed.
type ReplayKind struct {
	Kind                   string   `json:"kind"`
	Unit                   string   `json:"unit"`
	DisplayUnit            string   `json:"displayUnit,omitempty"`
	Compared               int      `json:"compared"`
	Unchanged              int      `json:"unchanged"`
	ValuesChanged          int      `json:"valuesChanged"`
	InterpretationsFlipped int      `json:"interpretationsFlipped"`
	RefusalsToValues       int      `json:"refusalsToValues"`
	ValuesToRefusals       int      `json:"valuesToRefusals"`
	ReasonsChanged         int      `json:"reasonsChanged"`
	Other                  int      `json:"other"` // withdrawn to value, never recorded
	DeltaMin               *float64 `json:"deltaMin,omitempty"`
	DeltaQ1                *float64 `json:"deltaQ1,omitempty"`
	DeltaMedian            *float64 `json:"deltaMedian,omitempty"`
	DeltaQ3                *float64 `json:"deltaQ3,omitempty"`
	DeltaMax               *float64 `json:"deltaMax,omitempty"`
}

// ReplayReport is what a replay found: per kind, and the changed keys
// (paged by the Filter).
type ReplayReport struct {
	Algorithm  string             `json:"algorithm"` // this build's
	From       time.Time          `json:"from"`
	To         time.Time          `json:"to"`
	BloodGases int                `json:"bloodGases"`
	Kinds      []ReplayKind       `json:"kinds"`
	Changes    Page[ReplayChange] `json:"changes"`
}

const replayGasesSQL = `
SELECT DISTINCT patient_ref, key FROM review_fact
WHERE quantity = 'pco2' AND effective >= $2 AND effective < $3 AND ($1 = '' OR patient_ref = $1)
ORDER BY patient_ref, key`

// replayFactsSQL loads a patient's facts around the period (every
// version: fhirmap.Current picks) and the patient-level ones of any time:
// the period through fact_row_patient_ref_effective, the patient-level
// facts through the partial (patient_ref, quantity, effective) index of
// migration 0017, whose quantities include these four.
const replayFactsSQL = `
SELECT ` + factColumns + ` FROM review_fact
WHERE ((patient_ref || '') = $1 AND effective >= $2 AND effective <= $3)
   OR (patient_ref = $1 AND quantity IN ('sex', 'birth-date', 'body-height', 'body-weight'))
ORDER BY id`

const replayHeadsSQL = `
SELECT h.key, h.kind, h.refused, h.status, h.value, coalesce(d.interp_code, ''), coalesce(r.reason, '')
FROM review_head h
LEFT JOIN review_derivation d ON d.id = h.derivation_id
LEFT JOIN review_refusal r ON r.id = h.refusal_id
WHERE h.patient_ref = $1 AND h.blood_gas_key = ANY($2::text[])`

type storedState struct {
	kind, status, interp, reason string
	refused                      bool
	value                        float64
}

// Replay recomputes, with this build's code and site, every blood gas
// whose time falls in [f.From, f.To) (of f.Patient when set) from the
// facts stored now, and compares each derivation key with its latest
// stored state. It reads only the review_* views and writes nothing.
// f.Kind narrows the report to one kind; f.Limit and f.Offset page the
// changes.
func (r *Reviewer) Replay(ctx context.Context, f Filter, site fhirmap.Site) (ReplayReport, error) {
	if f.From.IsZero() || f.To.IsZero() {
		return ReplayReport{}, errors.New("replay: a period (from and to) is required")
	}
	if err := site.Validate(); err != nil {
		return ReplayReport{}, fmt.Errorf("replay: site settings: %w", err)
	}
	rep := ReplayReport{Algorithm: fhirmap.Algorithm, From: f.From.UTC(), To: f.To.UTC()}
	type gasRow struct{ patient, key string }
	gases, err := queryRows(ctx, r.pool, replayGasesSQL, func(row pgx.CollectableRow) (gasRow, error) {
		var g gasRow
		return g, row.Scan(&g.patient, &g.key)
	}, f.Patient, f.From, f.To)
	if err != nil {
		return rep, fmt.Errorf("replay: blood gases: %w", err)
	}
	byPatient := map[string][]string{}
	var patients []string
	for _, g := range gases {
		if _, ok := byPatient[g.patient]; !ok {
			patients = append(patients, g.patient)
		}
		byPatient[g.patient] = append(byPatient[g.patient], g.key)
	}
	kinds := map[string]*ReplayKind{}
	deltas := map[string][]float64{}
	var changes []ReplayChange
	margin := max(site.Window.Before, site.Window.After) + time.Hour
	for _, p := range patients {
		facts, err := queryRows(ctx, r.pool, replayFactsSQL, scanFact, p, f.From.Add(-margin), f.To.Add(margin))
		if err != nil {
			return rep, fmt.Errorf("replay: facts: %w", err)
		}
		var current []fhirmap.Fact
		for _, x := range fhirmap.Current(facts) {
			if x.Patient == p {
				current = append(current, x)
			}
		}
		heads := map[string]storedState{}
		hs, err := queryRows(ctx, r.pool, replayHeadsSQL, func(row pgx.CollectableRow) (struct {
			key string
			s   storedState
		}, error) {
			var x struct {
				key string
				s   storedState
			}
			err := row.Scan(&x.key, &x.s.kind, &x.s.refused, &x.s.status, &x.s.value, &x.s.interp, &x.s.reason)
			return x, err
		}, p, byPatient[p])
		if err != nil {
			return rep, fmt.Errorf("replay: stored state: %w", err)
		}
		for _, h := range hs {
			heads[h.key] = h.s
		}
		for _, key := range byPatient[p] {
			ds, rs := fhirmap.DeriveBloodGas(key, current, site)
			if len(ds)+len(rs) == 0 {
				continue // its current version is no longer a PCO2 of this patient
			}
			rep.BloodGases++
			for _, d := range ds {
				if f.Kind != "" && d.Kind != f.Kind {
					continue
				}
				c := ReplayChange{Key: d.Key, Kind: d.Kind, Patient: p, BloodGas: key, Effective: d.Effective.UTC(),
					To:       withDisplayUnit(fhirmap.FormatValue(d.Kind, d.Result.Value), DisplayUnit(d.Result.Unit)),
					ToInterp: d.Result.Interpretation.Code}
				k := replayKind(kinds, d.Kind)
				k.Compared++
				s, ok := heads[d.Key]
				switch {
				case !ok:
					c.Change, c.From = ReplayNew, "not recorded"
					k.Other++
				case s.refused:
					c.Change, c.From = ReplayRefusalToValue, "refused: "+s.reason
					k.RefusalsToValues++
				case s.status == string(fhirmap.StatusEnteredInError):
					c.Change, c.From = ReplayWithdrawnToValue, "withdrawn"
					k.Other++
				default:
					c.From, c.FromInterp = withDisplayUnit(fhirmap.FormatValue(d.Kind, s.value), DisplayUnit(d.Result.Unit)), s.interp
					c.InterpretationFlip = s.interp != c.ToInterp
					if c.InterpretationFlip {
						k.InterpretationsFlipped++
					}
					if fhirmap.FormatValue(d.Kind, s.value) != fhirmap.FormatValue(d.Kind, d.Result.Value) {
						delta := d.Result.Value - s.value
						c.Change, c.Delta = ReplayValueChanged, &delta
						k.ValuesChanged++
						deltas[d.Kind] = append(deltas[d.Kind], delta)
					} else if c.InterpretationFlip {
						c.Change = ReplayInterpretation
					} else {
						k.Unchanged++
						continue
					}
				}
				changes = append(changes, c)
			}
			for _, x := range rs {
				if f.Kind != "" && x.Kind != f.Kind {
					continue
				}
				c := ReplayChange{Key: x.Key, Kind: x.Kind, Patient: p, BloodGas: key, Effective: x.Effective.UTC(),
					To: "refused: " + x.Reason}
				k := replayKind(kinds, x.Kind)
				k.Compared++
				s, ok := heads[x.Key]
				switch {
				case !ok:
					c.Change, c.From = ReplayNew, "not recorded"
					k.Other++
				case s.refused && s.reason == x.Reason:
					k.Unchanged++
					continue
				case s.refused:
					c.Change, c.From = ReplayReasonChanged, "refused: "+s.reason
					k.ReasonsChanged++
				case s.status == string(fhirmap.StatusEnteredInError):
					// Withdrawn and still not derivable: the same state.
					k.Unchanged++
					continue
				default:
					c.Change, c.FromInterp = ReplayValueToRefusal, s.interp
					c.From = withDisplayUnit(fhirmap.FormatValue(x.Kind, s.value), DisplayUnit(fhirmap.KindUnit(x.Kind)))
					k.ValuesToRefusals++
				}
				changes = append(changes, c)
			}
		}
	}
	for _, k := range kinds {
		if ds := deltas[k.Kind]; len(ds) > 0 {
			slices.Sort(ds)
			q := func(p float64) *float64 { v := quantile(ds, p); return &v }
			k.DeltaMin, k.DeltaQ1, k.DeltaMedian, k.DeltaQ3, k.DeltaMax = q(0), q(0.25), q(0.5), q(0.75), q(1)
		}
		rep.Kinds = append(rep.Kinds, *k)
	}
	slices.SortFunc(rep.Kinds, func(a, b ReplayKind) int { return strings.Compare(a.Kind, b.Kind) })
	if rep.Kinds == nil {
		rep.Kinds = []ReplayKind{}
	}
	slices.SortFunc(changes, func(a, b ReplayChange) int {
		if c := a.Effective.Compare(b.Effective); c != 0 {
			return c
		}
		return strings.Compare(a.Key, b.Key)
	})
	off := min(max(f.Offset, 0), len(changes))
	rep.Changes = pageOf(changes[off:min(len(changes), off+f.limit()+1)], f)
	return rep, nil
}

func replayKind(m map[string]*ReplayKind, kind string) *ReplayKind {
	k, ok := m[kind]
	if !ok {
		unit := fhirmap.KindUnit(kind)
		k = &ReplayKind{Kind: kind, Unit: unit, DisplayUnit: DisplayUnit(unit)}
		m[kind] = k
	}
	return k
}

// quantile is the p-quantile of sorted xs by linear interpolation between
// closest ranks (the "R-7" definition, the default of R and NumPy [common
// practice]).
func quantile(xs []float64, p float64) float64 {
	if len(xs) == 1 {
		return xs[0]
	}
	h := p * float64(len(xs)-1)
	lo := int(h)
	if lo >= len(xs)-1 {
		return xs[len(xs)-1]
	}
	return xs[lo] + (h-float64(lo))*(xs[lo+1]-xs[lo])
}

const latestSettingsSQL = `
SELECT digest, algorithm, alias_digest, snapshot, site::text, created_at FROM review_settings
ORDER BY created_at DESC, digest LIMIT 1`

// LatestSettings returns the settings snapshot recorded most recently
// (the settings the service runs under now, as far as the store knows),
// or ErrNotFound in a store without any.
func (r *Reviewer) LatestSettings(ctx context.Context) (SettingsRecord, error) {
	rows, err := queryRows(ctx, r.pool, latestSettingsSQL, scanSettings)
	if err != nil {
		return SettingsRecord{}, fmt.Errorf("read settings: %w", err)
	}
	if len(rows) == 0 {
		return SettingsRecord{}, ErrNotFound
	}
	return rows[0], nil
}
