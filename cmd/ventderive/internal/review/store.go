package review

import (
	"context"
	"fmt"
	"slices"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/fhirmap"
)

// Store is what the console reads: the audit's reviewer queries plus the
// console's own (patient list, timeline series). Every query reads review_*
// views only.
type Store struct {
	pool *pgxpool.Pool
	*postgres.Reviewer
}

// NewStore returns a Store over pool, which should connect as the reviewer
// role with default_transaction_read_only on (cmd does both).
func NewStore(pool *pgxpool.Pool) *Store {
	return &Store{pool: pool, Reviewer: postgres.NewReviewer(pool)}
}

// PatientFilter chooses the patients of the list.
type PatientFilter struct {
	From, To       time.Time // blood-gas time, From inclusive, To exclusive; zero: open
	Kind           string    // only patients with a current value of this kind
	HasDiscrepancy bool      // a current |measured - predicted PaCO2| >= ThresholdMmHg
	HasRefusal     bool
	HasRetraction  bool
	ThresholdMmHg  float64
	Limit, Offset  int
}

// PatientRow is one patient of the list. Counts are of blood gases in the
// period and of their keys' current state.
type PatientRow struct {
	Patient     string    // reference, "Patient/lg-icu-0001"
	BloodGases  int       // blood gases with any derived value or refusal
	Derived     int       // current derived values (retractions excluded)
	Refusals    int       // keys whose current state is a refusal
	Retractions int       // keys whose latest version is a retraction (a refusal may follow it)
	Amended     int       // keys whose current version is amended or corrected
	MaxDiscMmHg *float64  // largest current |measured - predicted PaCO2|
	First, Last time.Time // blood-gas times
	Latest      []Latest  // current values of the latest blood gas with values
}

// listedKinds are the values the patient list shows for the latest blood
// gas: the readings of the lungs. The values for a target PaCO2 (rate,
// tidal volume) are advisory suggestions that need their basis beside
// them; they are on the patient's pages, not in a list cell.
var listedKinds = []string{fhirmap.KindDeadSpaceEnghoff, fhirmap.KindDeadSpaceVCO2, fhirmap.KindDeadSpaceEstimated,
	fhirmap.KindPaCO2Discrepancy, fhirmap.KindPaCO2PETCO2Gradient, fhirmap.KindAlveolarDeadSpace, fhirmap.KindVentilatoryRatio}

// Latest is one current value of a patient's latest blood gas.
type Latest struct {
	Kind, Published, DisplayUnit, ObservationID string
}

// patientsSQL counts per patient over review_patient_gas (migration 0008).
// $1,$2 period; $3 kind; $4..$6 has-discrepancy/refusal/retraction; $7
// threshold; $8 limit+1; $9 offset.
const patientsSQL = `
SELECT patient_ref, count(*), sum(derived), sum(refused), sum(retracted), sum(amended), max(discrepancy_mmhg),
       min(effective), max(effective)
FROM review_patient_gas
WHERE ($1::timestamptz IS NULL OR effective >= $1) AND ($2::timestamptz IS NULL OR effective < $2)
GROUP BY patient_ref
HAVING ($3 = '' OR bool_or($3 = ANY(kinds)))
   AND (NOT $4 OR coalesce(max(discrepancy_mmhg), 0) >= $7)
   AND (NOT $5 OR sum(refused) > 0)
   AND (NOT $6 OR sum(retracted) > 0)
ORDER BY patient_ref
LIMIT $8 OFFSET $9`

// latestSQL reads the current values of each listed patient's latest blood
// gas with a current value in the period (through the patient-reference
// index of migration 0008: a page of patients, not the whole store).
const latestSQL = `
WITH cur AS (
    SELECT patient_ref, blood_gas_key, effective, kind, value, unit, observation_id
    FROM review_derivation
    WHERE patient_ref = ANY($1) AND is_current AND status <> 'entered-in-error'
      AND ($2::timestamptz IS NULL OR effective >= $2) AND ($3::timestamptz IS NULL OR effective < $3)),
last AS (
    SELECT DISTINCT ON (patient_ref) patient_ref, blood_gas_key FROM cur
    ORDER BY patient_ref, effective DESC, blood_gas_key DESC)
SELECT c.patient_ref, c.kind, c.value, c.unit, c.observation_id::text
FROM cur c JOIN last l ON l.patient_ref = c.patient_ref AND l.blood_gas_key = c.blood_gas_key
ORDER BY c.patient_ref, c.kind`

// Patients lists patients by reference (paged: more is true when rows
// follow) with their counts and latest values.
func (s *Store) Patients(ctx context.Context, f PatientFilter) (rows []PatientRow, more bool, err error) {
	limit := f.Limit
	if limit <= 0 || limit > postgres.MaxLimit {
		limit = 200
	}
	r, err := s.pool.Query(ctx, patientsSQL, optTime(f.From), optTime(f.To), f.Kind, f.HasDiscrepancy, f.HasRefusal,
		f.HasRetraction, f.ThresholdMmHg, limit+1, max(f.Offset, 0))
	if err != nil {
		return nil, false, fmt.Errorf("list patients: %w", err)
	}
	rows, err = pgx.CollectRows(r, func(row pgx.CollectableRow) (PatientRow, error) {
		var p PatientRow
		err := row.Scan(&p.Patient, &p.BloodGases, &p.Derived, &p.Refusals, &p.Retractions, &p.Amended, &p.MaxDiscMmHg,
			&p.First, &p.Last)
		p.First, p.Last = p.First.UTC(), p.Last.UTC()
		return p, err
	})
	if err != nil {
		return nil, false, fmt.Errorf("list patients: %w", err)
	}
	if len(rows) > limit {
		rows, more = rows[:limit], true
	}
	if len(rows) == 0 {
		return rows, more, nil
	}
	refs := make([]string, len(rows))
	at := map[string]int{}
	for i, p := range rows {
		refs[i], at[p.Patient] = p.Patient, i
	}
	lr, err := s.pool.Query(ctx, latestSQL, refs, optTime(f.From), optTime(f.To))
	if err != nil {
		return nil, false, fmt.Errorf("latest values: %w", err)
	}
	var ref, kind, unit, obs string
	var value float64
	_, err = pgx.ForEachRow(lr, []any{&ref, &kind, &value, &unit, &obs}, func() error {
		if !slices.Contains(listedKinds, kind) {
			return nil
		}
		i := at[ref]
		rows[i].Latest = append(rows[i].Latest, Latest{Kind: kind, Published: fhirmap.FormatValue(kind, value),
			DisplayUnit: postgres.DisplayUnit(unit), ObservationID: obs})
		return nil
	})
	if err != nil {
		return nil, false, fmt.Errorf("latest values: %w", err)
	}
	return rows, more, nil
}

// Point is one current derived value on a timeline.
type Point struct {
	Key           string
	ObservationID string
	Kind          string
	Effective     time.Time
	Value         float64 // full precision
	Published     string  // as published
	DisplayUnit   string
	Version       int
	Status        string
}

// Mark is a refusal or retraction on the time axis.
type Mark struct {
	Key       string
	Kind      string
	Effective time.Time
	What      string // "refused" or "retracted"
	Reason    string // refusal reason code, or the retraction reason text
}

// Bucket is the first usable reading of one ventilator quantity in one
// time bucket.
type Bucket struct {
	Quantity  string
	Unit      string // UCUM
	Start     time.Time
	Value     float64
	Effective time.Time // the reading's own time
}

// Timeline is what a patient's plots show.
type Timeline struct {
	Patient  string
	From, To time.Time // period asked, or the data's extent when open
	Points   []Point   // current values, not retracted
	Measured []Point   // measured arterial PCO2 of the blood gases (inputs), Kind "pco2"
	Marks    []Mark
	Vent     []Bucket
	Bucket   time.Duration // width of the ventilator buckets
	Stays    []string      // encounter references of the period's derived values, "" for none sent
}

const timelinePointsSQL = `
SELECT key, observation_id::text, kind, effective, value, unit, version, status, retracted, is_current
FROM review_derivation
WHERE patient_ref = $1 AND ($2::timestamptz IS NULL OR effective >= $2) AND ($3::timestamptz IS NULL OR effective < $3)
  AND (is_current OR (status = 'entered-in-error' AND superseded_by_version IS NULL))
ORDER BY effective, kind`

const timelineRefusalsSQL = `
SELECT key, kind, effective, reason
FROM review_refusal
WHERE patient_ref = $1 AND ($2::timestamptz IS NULL OR effective >= $2) AND ($3::timestamptz IS NULL OR effective < $3)
  AND is_current
ORDER BY effective, kind`

// The measured PaCO2 of every blood gas with a derived value: the input
// of role blood gas (fact_key = blood_gas_key) of its discrepancy (or any)
// derivation; one per blood gas.
const timelineMeasuredSQL = `
SELECT DISTINCT ON (d.blood_gas_key) d.key, d.observation_id::text, d.effective, i.value, i.unit, d.version, d.status
FROM review_derivation d
JOIN review_derivation_input i ON i.derivation_id = d.id AND i.fact_key = d.blood_gas_key
WHERE d.patient_ref = $1 AND ($2::timestamptz IS NULL OR d.effective >= $2) AND ($3::timestamptz IS NULL OR d.effective < $3)
  AND d.is_current AND d.status <> 'entered-in-error'
ORDER BY d.blood_gas_key, (d.kind = 'paco2-measured-minus-predicted') DESC, d.kind`

// timelineVentSQL samples each ventilator quantity: per bucket, the first
// usable reading at or after the bucket's start (the latest version of that
// reading, as fhirmap pairs them). Why a sample and not a mean: a mean reads
// every reading of the period (216,000 for 30 days of minute data, several
// hundred milliseconds of sorting on this machine), a sample costs one index
// probe per bucket. The page says so; the value pages list the exact
// readings each value used. The ventilator quantities are not in the
// partial (patient_ref, quantity, effective) index (migration 0017): a
// bucket's probe reads the patient's readings of every quantity from the
// bucket's start, through fact_row_patient_ref_effective, to the first
// of this quantity.
//
// The statement's estimated cost is above jit_above_cost (one lateral
// lookup per bucket and quantity, each estimated over the window of every
// quantity), and PostgreSQL then compiled it: 1.4-2.6 s with JIT on the
// bench's 30-day stay (BenchmarkTimeline30Days' data), 73-142 ms without
// (2 shared cores; the same statement on the full (patient_ref, quantity,
// effective) index before 0017: 198-310 ms with JIT, 55-111 ms without;
// the page went from 0.44-0.52 s to 1.79-1.89 s with 0017 alone, and is
// 0.21-0.33 s with JIT off, main 0.26-0.29 s). The timeline's batch turns JIT
// off for its implicit transaction (noJITSQL): every statement of it is a
// handful of index lookups.
const timelineVentSQL = `
SELECT q.quantity, r.unit, b.t, r.value, r.effective
FROM unnest($5::text[]) q(quantity)
CROSS JOIN generate_series($2::timestamptz, $3::timestamptz - $4::interval, $4::interval) b(t)
CROSS JOIN LATERAL (
    SELECT f.unit, f.value, f.effective FROM review_fact f
    WHERE (f.patient_ref || '') = $1 AND f.quantity = q.quantity AND f.effective >= b.t AND f.effective < b.t + $4::interval
      AND f.status IN ('final', 'amended', 'corrected', 'preliminary')
      AND NOT EXISTS (SELECT 1 FROM review_fact g WHERE hashtextextended(g.key, 0) = hashtextextended(f.key, 0)
                      AND g.key = f.key AND g.id > f.id)
    ORDER BY f.effective, f.id DESC
    LIMIT 1) r
ORDER BY 1, 3`

// noJITSQL turns JIT compilation off until the end of the transaction
// (the batch's implicit one).
const noJITSQL = `SELECT set_config('jit', 'off', true)`

const timelineStaysSQL = `
SELECT DISTINCT encounter FROM review_derivation
WHERE patient_ref = $1 AND ($2::timestamptz IS NULL OR effective >= $2) AND ($3::timestamptz IS NULL OR effective < $3)
ORDER BY 1`

const extentSQL = `
SELECT min(effective), max(effective) FROM review_patient_gas WHERE patient_ref = $1`

// VentQuantities are the ventilator inputs plotted, in fhirmap's codes.
var VentQuantities = []string{
	string(fhirmap.QTidalVol), string(fhirmap.QRespRate), string(fhirmap.QMinuteVol),
	string(fhirmap.QVCO2), string(fhirmap.QPETCO2),
}

// ventBuckets is how many buckets the ventilator series get over a period
// at most: enough for a plot a few hundred points wide, few enough that a
// 30-day stay of minute data stays far below the page-weight budget.
const ventBuckets = 360

// Timeline reads a patient's plotted series. With an open period the
// extent of the patient's blood gases is used (padded by an hour) for the
// ventilator series; ok is false when the patient has nothing stored.
func (s *Store) Timeline(ctx context.Context, patient string, from, to time.Time) (tl Timeline, ok bool, err error) {
	tl = Timeline{Patient: patient, From: from, To: to}
	if from.IsZero() || to.IsZero() {
		var lo, hi *time.Time
		if err := s.pool.QueryRow(ctx, extentSQL, patient).Scan(&lo, &hi); err != nil {
			return tl, false, fmt.Errorf("patient extent: %w", err)
		}
		if lo == nil {
			return tl, false, nil
		}
		if from.IsZero() {
			tl.From = lo.UTC().Add(-time.Hour).Truncate(time.Hour)
		}
		if to.IsZero() {
			tl.To = hi.UTC().Add(time.Hour).Truncate(time.Hour).Add(time.Hour)
		}
	}
	span := tl.To.Sub(tl.From)
	tl.Bucket = max(time.Minute, (span / ventBuckets).Truncate(time.Minute))
	b := &pgx.Batch{}
	b.Queue(noJITSQL)
	b.Queue(timelinePointsSQL, patient, tl.From, tl.To)
	b.Queue(timelineRefusalsSQL, patient, tl.From, tl.To)
	b.Queue(timelineMeasuredSQL, patient, tl.From, tl.To)
	b.Queue(timelineVentSQL, patient, tl.From, tl.To, tl.Bucket, VentQuantities)
	b.Queue(timelineStaysSQL, patient, tl.From, tl.To)
	br := s.pool.SendBatch(ctx, b)
	defer br.Close()
	if _, err := br.Exec(); err != nil {
		return tl, false, fmt.Errorf("timeline settings: %w", err)
	}
	rows, err := br.Query()
	if err != nil {
		return tl, false, fmt.Errorf("timeline values: %w", err)
	}
	var p Point
	var unit, retracted string
	var current bool
	_, err = pgx.ForEachRow(rows, []any{&p.Key, &p.ObservationID, &p.Kind, &p.Effective, &p.Value, &unit, &p.Version,
		&p.Status, &retracted, &current}, func() error {
		p.Effective = p.Effective.UTC()
		if p.Status == string(fhirmap.StatusEnteredInError) {
			tl.Marks = append(tl.Marks, Mark{Key: p.Key, Kind: p.Kind, Effective: p.Effective, What: "retracted", Reason: retracted})
			return nil
		}
		x := p
		x.Published = fhirmap.FormatValue(p.Kind, p.Value)
		x.DisplayUnit = postgres.DisplayUnit(unit)
		tl.Points = append(tl.Points, x)
		return nil
	})
	if err != nil {
		return tl, false, fmt.Errorf("timeline values: %w", err)
	}
	rows, err = br.Query()
	if err != nil {
		return tl, false, fmt.Errorf("timeline refusals: %w", err)
	}
	var m Mark
	_, err = pgx.ForEachRow(rows, []any{&m.Key, &m.Kind, &m.Effective, &m.Reason}, func() error {
		x := m
		x.Effective, x.What = x.Effective.UTC(), "refused"
		tl.Marks = append(tl.Marks, x)
		return nil
	})
	if err != nil {
		return tl, false, fmt.Errorf("timeline refusals: %w", err)
	}
	rows, err = br.Query()
	if err != nil {
		return tl, false, fmt.Errorf("timeline measured PaCO2: %w", err)
	}
	_, err = pgx.ForEachRow(rows, []any{&p.Key, &p.ObservationID, &p.Effective, &p.Value, &unit, &p.Version, &p.Status}, func() error {
		x := p
		x.Kind, x.Effective = "pco2", x.Effective.UTC()
		x.Published, x.DisplayUnit = shownNumber(x.Value), postgres.DisplayUnit(unit)
		tl.Measured = append(tl.Measured, x)
		return nil
	})
	if err != nil {
		return tl, false, fmt.Errorf("timeline measured PaCO2: %w", err)
	}
	rows, err = br.Query()
	if err != nil {
		return tl, false, fmt.Errorf("timeline ventilator: %w", err)
	}
	var v Bucket
	_, err = pgx.ForEachRow(rows, []any{&v.Quantity, &v.Unit, &v.Start, &v.Value, &v.Effective}, func() error {
		x := v
		x.Start, x.Effective = x.Start.UTC(), x.Effective.UTC()
		tl.Vent = append(tl.Vent, x)
		return nil
	})
	if err != nil {
		return tl, false, fmt.Errorf("timeline ventilator: %w", err)
	}
	rows, err = br.Query()
	if err == nil {
		tl.Stays, err = pgx.CollectRows(rows, pgx.RowTo[string])
	}
	if err != nil {
		return tl, false, fmt.Errorf("timeline stays: %w", err)
	}
	sortMeasured(tl.Measured)
	return tl, len(tl.Points)+len(tl.Marks)+len(tl.Vent) > 0, br.Close()
}

func optTime(t time.Time) *time.Time {
	if t.IsZero() {
		return nil
	}
	return &t
}
