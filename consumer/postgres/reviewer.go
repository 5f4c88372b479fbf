package postgres

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"time"

	"github.com/google/uuid"
	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgtype"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/fhirmap"
)

// Reviewer answers audit questions for clinical reviewers. It reads only the
// review_* views, so it works with the ventderive_reviewer role, which may
// read nothing else. Times are returned in UTC.
type Reviewer struct {
	pool *pgxpool.Pool
}

// NewReviewer returns a Reviewer over pool.
func NewReviewer(pool *pgxpool.Pool) *Reviewer { return &Reviewer{pool: pool} }

// ErrNotFound reports that no derivation has the id or key asked for.
var ErrNotFound = errors.New("not found")

// Filter narrows a reviewer query. Zero fields do not filter.
type Filter struct {
	Patient   string    // FHIR reference, e.g. "Patient/lg-icu-0001"
	From      time.Time // inclusive; blood-gas effective time (List, Refusals, Discrepancies, Changes) or recorded time (Daily, DeadLetters)
	To        time.Time // exclusive
	Kind      string    // derivation kind code
	Algorithm string    // algorithm version, e.g. "ventderive-derive/1"
	Limit     int       // maximum rows; 0 means 1000
}

func (f Filter) args() []any {
	limit := f.Limit
	if limit <= 0 {
		limit = 1000
	}
	return []any{f.Patient, optTime(f.From), optTime(f.To), f.Kind, f.Algorithm, limit}
}

// filterSQL is the WHERE clause of Filter over a view with patient_ref,
// effective, kind and algorithm columns ($1..$5; $6 is the limit).
const filterSQL = `($1 = '' OR patient_ref = $1)
  AND ($2::timestamptz IS NULL OR effective >= $2)
  AND ($3::timestamptz IS NULL OR effective < $3)
  AND ($4 = '' OR kind = $4)
  AND ($5 = '' OR algorithm = $5)`

// Constant is a constant as recorded with a derivation.
type Constant struct {
	Name   string  `json:"name"`
	Value  float64 `json:"value"`
	Unit   string  `json:"unit"`
	Source string  `json:"source"`
}

// Interpretation is the reading of a value against a published threshold.
type Interpretation struct {
	Code   string `json:"code,omitempty"`
	Text   string `json:"text,omitempty"`
	Source string `json:"source,omitempty"`
}

// Version is one stored version of a derived value.
type Version struct {
	ID             int64          `json:"id"`
	Key            string         `json:"key"`
	Version        int            `json:"version"`
	ObservationID  string         `json:"observationId"`
	Kind           string         `json:"kind"`
	Patient        string         `json:"patient"`
	Encounter      string         `json:"encounter,omitempty"`
	BloodGas       string         `json:"bloodGas"`
	Effective      time.Time      `json:"effective"`
	Value          float64        `json:"value"`
	Unit           string         `json:"unit"`
	Method         string         `json:"method"`
	MethodVersion  string         `json:"methodVersion"`
	Constants      []Constant     `json:"constants"`
	Assumptions    []string       `json:"assumptions"`
	Basis          string         `json:"basis"`
	Interpretation Interpretation `json:"interpretation"`
	Flags          []string       `json:"flags"`
	Status         string         `json:"status"`
	Retracted      string         `json:"retracted,omitempty"`
	Algorithm      string         `json:"algorithm"`
	Digest         string         `json:"digest"`
	Supersedes     int            `json:"supersedes,omitempty"`   // version it replaced, 0 for the first
	SupersededBy   int            `json:"supersededBy,omitempty"` // version that replaced it, 0 if none
	Current        bool           `json:"current"`                // the key's latest state is this version
	Recorded       time.Time      `json:"recorded"`
	Inputs         []Input        `json:"inputs,omitempty"`
}

// Input is one fact a derivation used or a refusal considered.
type Input struct {
	Ordinal    int           `json:"ordinal"`
	Role       string        `json:"role"`
	FactKey    string        `json:"factKey"`
	FactDigest string        `json:"factDigest"`
	Resource   string        `json:"resource"`
	VersionID  string        `json:"versionId,omitempty"`
	Quantity   string        `json:"quantity"`
	Origin     string        `json:"origin,omitempty"`
	Detail     string        `json:"detail,omitempty"`
	Specimen   string        `json:"specimen,omitempty"`
	Value      float64       `json:"value"`
	Unit       string        `json:"unit"`
	Status     string        `json:"status"`
	Effective  time.Time     `json:"effective"`
	Offset     time.Duration `json:"offsetNs"`
	Fallback   string        `json:"fallback,omitempty"`
}

// Refusal is one stored refusal.
type Refusal struct {
	ID         int64     `json:"id"`
	Key        string    `json:"key"`
	Kind       string    `json:"kind"`
	Patient    string    `json:"patient"`
	BloodGas   string    `json:"bloodGas"`
	Effective  time.Time `json:"effective"`
	Reason     string    `json:"reason"`
	Detail     string    `json:"detail"`
	Digest     string    `json:"digest"`
	Current    bool      `json:"current"`
	Recorded   time.Time `json:"recorded"`
	Considered []Input   `json:"considered,omitempty"`
}

// History is everything recorded under one derivation key, oldest first.
type History struct {
	Key      string    `json:"key"`
	Versions []Version `json:"versions"`
	Refusals []Refusal `json:"refusals"`
}

const (
	versionColumns = `id, key, version, observation_id::text, kind, patient_ref, encounter, blood_gas_key,
    effective, value, unit, method, method_version, constants::text, assumptions::text, basis,
    interp_code, interp_text, interp_source, flags::text, status, retracted, algorithm, digest,
    coalesce(supersedes_version, 0), coalesce(superseded_by_version, 0), coalesce(is_current, false), created_at`

	showKeySQL = `
SELECT key FROM review_derivation WHERE key = $1 OR observation_id::text = $2
UNION SELECT key FROM review_refusal WHERE key = $1
LIMIT 2`

	showVersionsSQL = `SELECT ` + versionColumns + `
FROM review_derivation WHERE key = $1 ORDER BY version`

	showInputsSQL = `
SELECT derivation_id, ordinal, role, fact_key, fact_digest, resource_ref, version_id, quantity, origin,
       detail, specimen, value, unit, status, effective, time_offset, fallback
FROM review_derivation_input
WHERE derivation_id IN (SELECT id FROM review_derivation WHERE key = $1)
ORDER BY derivation_id, ordinal`

	showRefusalsSQL = `
SELECT id, key, kind, patient_ref, blood_gas_key, effective, reason, detail, digest,
       coalesce(is_current, false), created_at
FROM review_refusal WHERE key = $1 ORDER BY id`

	showConsideredSQL = `
SELECT refusal_id, ordinal, role, fact_key, fact_digest, resource_ref, version_id, quantity, origin,
       detail, specimen, value, unit, status, effective, time_offset, fallback
FROM review_refusal_input
WHERE refusal_id IN (SELECT id FROM review_refusal WHERE key = $1)
ORDER BY refusal_id, ordinal`
)

// Show returns the full history of one derived value, found by its
// Observation id (a UUID) or its key ("<patient>|<blood-gas key>|<kind>"):
// every version with its inputs, constants, assumptions and basis, what
// superseded what, and every refusal with the inputs it considered. It
// returns ErrNotFound when nothing matches.
func (r *Reviewer) Show(ctx context.Context, idOrKey string) (History, error) {
	id := ""
	if u, err := uuid.Parse(idOrKey); err == nil {
		id = u.String()
	}
	keys, err := queryRows(ctx, r.pool, showKeySQL, pgx.RowTo[string], idOrKey, id)
	if err != nil {
		return History{}, fmt.Errorf("find derivation: %w", err)
	}
	if len(keys) == 0 {
		return History{}, ErrNotFound
	}
	h := History{Key: keys[0]}
	b := &pgx.Batch{}
	b.Queue(showVersionsSQL, h.Key)
	b.Queue(showInputsSQL, h.Key)
	b.Queue(showRefusalsSQL, h.Key)
	b.Queue(showConsideredSQL, h.Key)
	br := r.pool.SendBatch(ctx, b)
	defer br.Close()
	rows, err := br.Query()
	if err == nil {
		h.Versions, err = pgx.CollectRows(rows, scanVersion)
	}
	if err != nil {
		return History{}, fmt.Errorf("read versions: %w", err)
	}
	inputs, err := collectInputs(br)
	if err != nil {
		return History{}, fmt.Errorf("read inputs: %w", err)
	}
	for i := range h.Versions {
		h.Versions[i].Inputs = inputs[h.Versions[i].ID]
	}
	rows, err = br.Query()
	if err == nil {
		h.Refusals, err = pgx.CollectRows(rows, func(row pgx.CollectableRow) (Refusal, error) {
			var x Refusal
			err := row.Scan(&x.ID, &x.Key, &x.Kind, &x.Patient, &x.BloodGas, &x.Effective, &x.Reason, &x.Detail,
				&x.Digest, &x.Current, &x.Recorded)
			x.Effective, x.Recorded = x.Effective.UTC(), x.Recorded.UTC()
			return x, err
		})
	}
	if err != nil {
		return History{}, fmt.Errorf("read refusals: %w", err)
	}
	considered, err := collectInputs(br)
	if err != nil {
		return History{}, fmt.Errorf("read considered inputs: %w", err)
	}
	for i := range h.Refusals {
		h.Refusals[i].Considered = considered[h.Refusals[i].ID]
	}
	if h.Versions == nil {
		h.Versions = []Version{}
	}
	if h.Refusals == nil {
		h.Refusals = []Refusal{}
	}
	return h, br.Close()
}

func collectInputs(br pgx.BatchResults) (map[int64][]Input, error) {
	rows, err := br.Query()
	if err != nil {
		return nil, err
	}
	out := map[int64][]Input{}
	var owner int64
	var in Input
	var offset pgtype.Interval
	_, err = pgx.ForEachRow(rows, []any{&owner, &in.Ordinal, &in.Role, &in.FactKey, &in.FactDigest, &in.Resource,
		&in.VersionID, &in.Quantity, &in.Origin, &in.Detail, &in.Specimen, &in.Value, &in.Unit, &in.Status,
		&in.Effective, &offset, &in.Fallback}, func() error {
		x := in
		x.Effective = x.Effective.UTC()
		x.Offset = time.Duration(offset.Microseconds)*time.Microsecond +
			time.Duration(offset.Days)*24*time.Hour + time.Duration(offset.Months)*30*24*time.Hour
		out[owner] = append(out[owner], x)
		return nil
	})
	return out, err
}

func scanVersion(row pgx.CollectableRow) (Version, error) {
	var v Version
	var consts, assumptions, flags string
	err := row.Scan(&v.ID, &v.Key, &v.Version, &v.ObservationID, &v.Kind, &v.Patient, &v.Encounter, &v.BloodGas,
		&v.Effective, &v.Value, &v.Unit, &v.Method, &v.MethodVersion, &consts, &assumptions, &v.Basis,
		&v.Interpretation.Code, &v.Interpretation.Text, &v.Interpretation.Source, &flags, &v.Status, &v.Retracted,
		&v.Algorithm, &v.Digest, &v.Supersedes, &v.SupersededBy, &v.Current, &v.Recorded)
	if err != nil {
		return v, err
	}
	v.Effective, v.Recorded = v.Effective.UTC(), v.Recorded.UTC()
	for _, j := range []struct {
		text string
		into any
	}{{consts, &v.Constants}, {assumptions, &v.Assumptions}, {flags, &v.Flags}} {
		if err := json.Unmarshal([]byte(j.text), j.into); err != nil {
			return v, fmt.Errorf("derivation %d: %w", v.ID, err)
		}
	}
	return v, nil
}

func queryRows[T any](ctx context.Context, pool *pgxpool.Pool, sql string, fn pgx.RowToFunc[T], args ...any) ([]T, error) {
	rows, err := pool.Query(ctx, sql, args...)
	if err != nil {
		return nil, err
	}
	out, err := pgx.CollectRows(rows, fn)
	if out == nil && err == nil {
		out = []T{}
	}
	return out, err
}

const listSQL = `SELECT ` + versionColumns + `
FROM review_derivation
WHERE ` + filterSQL + `
ORDER BY effective, key, version
LIMIT $6`

// List returns derivation versions (all versions, not only current ones)
// matching f by blood-gas effective time, oldest blood gas first, without
// their inputs.
func (r *Reviewer) List(ctx context.Context, f Filter) ([]Version, error) {
	out, err := queryRows(ctx, r.pool, listSQL, scanVersion, f.args()...)
	if err != nil {
		return nil, fmt.Errorf("list derivations: %w", err)
	}
	return out, nil
}

// ReasonCount summarises refusals of one reason code and kind.
type ReasonCount struct {
	Reason   string    `json:"reason"`
	Kind     string    `json:"kind"`
	Count    int       `json:"count"`
	Current  int       `json:"current"` // of which still the key's latest state
	Patients int       `json:"patients"`
	First    time.Time `json:"first"` // earliest blood-gas effective time
	Last     time.Time `json:"last"`
}

const refusalsSQL = `
SELECT reason, kind, count(*), count(*) FILTER (WHERE is_current), count(DISTINCT patient_ref),
       min(effective), max(effective)
FROM review_refusal
WHERE ($1 = '' OR patient_ref = $1)
  AND ($2::timestamptz IS NULL OR effective >= $2)
  AND ($3::timestamptz IS NULL OR effective < $3)
  AND ($4 = '' OR kind = $4)
  AND $5 = $5
GROUP BY reason, kind
ORDER BY count(*) DESC, reason, kind
LIMIT $6`

// Refusals summarises refusals by reason code and kind, most frequent
// first. Filter.Algorithm does not apply (refusals carry no algorithm).
func (r *Reviewer) Refusals(ctx context.Context, f Filter) ([]ReasonCount, error) {
	out, err := queryRows(ctx, r.pool, refusalsSQL, func(row pgx.CollectableRow) (ReasonCount, error) {
		var c ReasonCount
		err := row.Scan(&c.Reason, &c.Kind, &c.Count, &c.Current, &c.Patients, &c.First, &c.Last)
		c.First, c.Last = c.First.UTC(), c.Last.UTC()
		return c, err
	}, f.args()...)
	if err != nil {
		return nil, fmt.Errorf("summarise refusals: %w", err)
	}
	return out, nil
}

// Discrepancy is a current measured-minus-predicted PaCO2 at or beyond a
// threshold, with the predicted and measured values when recorded.
type Discrepancy struct {
	Key            string    `json:"key"`
	ObservationID  string    `json:"observationId"`
	Patient        string    `json:"patient"`
	BloodGas       string    `json:"bloodGas"`
	Effective      time.Time `json:"effective"`
	Version        int       `json:"version"`
	Status         string    `json:"status"`
	DifferenceMmHg float64   `json:"differenceMmHg"`
	PredictedMmHg  *float64  `json:"predictedMmHg"`
	MeasuredMmHg   *float64  `json:"measuredMmHg"`
	Interpretation string    `json:"interpretation"`
	Basis          string    `json:"basis"`
}

const discrepanciesSQL = `
SELECT d.key, d.observation_id::text, d.patient_ref, d.blood_gas_key, d.effective, d.version, d.status,
       d.value, p.value, m.value, d.interp_text, d.basis
FROM review_derivation d
LEFT JOIN review_derivation p
       ON p.patient_ref = d.patient_ref AND p.blood_gas_key = d.blood_gas_key
      AND p.kind = $8 AND p.is_current
LEFT JOIN LATERAL (
    SELECT i.value FROM review_derivation_input i
    WHERE i.derivation_id = d.id AND i.fact_key = d.blood_gas_key
    ORDER BY i.ordinal LIMIT 1) m ON true
WHERE d.is_current AND d.status <> 'entered-in-error'
  AND ($4 = '' OR d.kind = $4) AND d.kind = $7
  AND abs(d.value) >= $9
  AND ($1 = '' OR d.patient_ref = $1)
  AND ($2::timestamptz IS NULL OR d.effective >= $2)
  AND ($3::timestamptz IS NULL OR d.effective < $3)
  AND ($5 = '' OR d.algorithm = $5)
ORDER BY abs(d.value) DESC, d.effective, d.key
LIMIT $6`

// Discrepancies returns current measured-minus-predicted PaCO2 values whose
// size is at least thresholdMmHg (mm[Hg]), largest first.
func (r *Reviewer) Discrepancies(ctx context.Context, thresholdMmHg float64, f Filter) ([]Discrepancy, error) {
	args := append(f.args(), fhirmap.KindPaCO2Discrepancy, fhirmap.KindPredictedPaCO2, thresholdMmHg)
	out, err := queryRows(ctx, r.pool, discrepanciesSQL, func(row pgx.CollectableRow) (Discrepancy, error) {
		var d Discrepancy
		err := row.Scan(&d.Key, &d.ObservationID, &d.Patient, &d.BloodGas, &d.Effective, &d.Version, &d.Status,
			&d.DifferenceMmHg, &d.PredictedMmHg, &d.MeasuredMmHg, &d.Interpretation, &d.Basis)
		d.Effective = d.Effective.UTC()
		return d, err
	}, args...)
	if err != nil {
		return nil, fmt.Errorf("find discrepancies: %w", err)
	}
	return out, nil
}

// Change is a derived value changed by a later version: amended,
// corrected, retracted, or recomputed to another value.
type Change struct {
	Key         string    `json:"key"`
	Kind        string    `json:"kind"`
	Patient     string    `json:"patient"`
	BloodGas    string    `json:"bloodGas"`
	Effective   time.Time `json:"effective"`
	FromVersion int       `json:"fromVersion"`
	ToVersion   int       `json:"toVersion"`
	FromValue   float64   `json:"fromValue"`
	ToValue     float64   `json:"toValue"`
	Unit        string    `json:"unit"`
	FromStatus  string    `json:"fromStatus"`
	ToStatus    string    `json:"toStatus"`
	Retracted   string    `json:"retracted,omitempty"`
	Recorded    time.Time `json:"recorded"`
}

const changesSQL = `
SELECT key, kind, patient_ref, blood_gas_key, effective, supersedes_version, version,
       supersedes_value, value, unit, supersedes_status, status, retracted, created_at
FROM review_derivation
WHERE supersedes_version IS NOT NULL
  AND (status IN ('amended', 'corrected', 'entered-in-error') OR value <> supersedes_value
       OR status <> supersedes_status)
  AND ` + filterSQL + `
ORDER BY created_at, key, version
LIMIT $6`

// Changes returns every version that changed a previously recorded value
// (by amendment, correction, retraction or recomputation), in recording
// order.
func (r *Reviewer) Changes(ctx context.Context, f Filter) ([]Change, error) {
	out, err := queryRows(ctx, r.pool, changesSQL, func(row pgx.CollectableRow) (Change, error) {
		var c Change
		err := row.Scan(&c.Key, &c.Kind, &c.Patient, &c.BloodGas, &c.Effective, &c.FromVersion, &c.ToVersion,
			&c.FromValue, &c.ToValue, &c.Unit, &c.FromStatus, &c.ToStatus, &c.Retracted, &c.Recorded)
		c.Effective, c.Recorded = c.Effective.UTC(), c.Recorded.UTC()
		return c, err
	}, f.args()...)
	if err != nil {
		return nil, fmt.Errorf("list changes: %w", err)
	}
	return out, nil
}

// DayCount is what was recorded on one UTC day.
type DayCount struct {
	Day         string `json:"day"` // YYYY-MM-DD, UTC
	Derivations int    `json:"derivations"`
	Retractions int    `json:"retractions"`
	Refusals    int    `json:"refusals"`
	DeadLetters int    `json:"deadLetters"`
}

const dailySQL = `
WITH ev AS (
    SELECT created_at, 1 AS derivation, (status = 'entered-in-error')::int AS retraction, 0 AS refusal, 0 AS dead
    FROM review_derivation
    WHERE ($1 = '' OR patient_ref = $1) AND ($4 = '' OR kind = $4) AND ($5 = '' OR algorithm = $5)
    UNION ALL
    SELECT created_at, 0, 0, 1, 0 FROM review_refusal
    WHERE ($1 = '' OR patient_ref = $1) AND ($4 = '' OR kind = $4) AND $5 = ''
    UNION ALL
    SELECT created_at, 0, 0, 0, 1 FROM review_dead_letter
    WHERE $1 = '' AND $4 = '' AND $5 = ''
)
SELECT to_char(created_at AT TIME ZONE 'UTC', 'YYYY-MM-DD') AS day,
       sum(derivation), sum(retraction), sum(refusal), sum(dead)
FROM ev
WHERE ($2::timestamptz IS NULL OR created_at >= $2) AND ($3::timestamptz IS NULL OR created_at < $3)
GROUP BY day
ORDER BY day
LIMIT $6`

// Daily counts, per UTC day of recording, the derivation versions (and
// among them retractions), refusals and dead letters. Filter.From and To
// apply to the recorded time; a patient, kind or algorithm filter leaves out
// what does not carry one (dead letters; refusals for an algorithm).
func (r *Reviewer) Daily(ctx context.Context, f Filter) ([]DayCount, error) {
	out, err := queryRows(ctx, r.pool, dailySQL, func(row pgx.CollectableRow) (DayCount, error) {
		var d DayCount
		err := row.Scan(&d.Day, &d.Derivations, &d.Retractions, &d.Refusals, &d.DeadLetters)
		return d, err
	}, f.args()...)
	if err != nil {
		return nil, fmt.Errorf("count per day: %w", err)
	}
	return out, nil
}

// DeadLetterRecord is one poison message, without its bytes.
type DeadLetterRecord struct {
	ID        int64     `json:"id"`
	InboxKey  string    `json:"inboxKey"`
	Subject   string    `json:"subject"`
	StreamSeq int64     `json:"streamSeq"`
	SizeBytes int       `json:"sizeBytes"`
	Reason    string    `json:"reason"`
	Detail    string    `json:"detail"`
	Recorded  time.Time `json:"recorded"`
}

const deadLettersSQL = `
SELECT id, inbox_key, subject, stream_seq, size_bytes, reason, detail, created_at
FROM review_dead_letter
WHERE ($2::timestamptz IS NULL OR created_at >= $2) AND ($3::timestamptz IS NULL OR created_at < $3)
  AND $1 = $1 AND $4 = $4 AND $5 = $5
ORDER BY id
LIMIT $6`

// DeadLetters lists poison messages by recorded time (Filter.From, To and
// Limit apply), oldest first.
func (r *Reviewer) DeadLetters(ctx context.Context, f Filter) ([]DeadLetterRecord, error) {
	out, err := queryRows(ctx, r.pool, deadLettersSQL, func(row pgx.CollectableRow) (DeadLetterRecord, error) {
		var d DeadLetterRecord
		err := row.Scan(&d.ID, &d.InboxKey, &d.Subject, &d.StreamSeq, &d.SizeBytes, &d.Reason, &d.Detail, &d.Recorded)
		d.Recorded = d.Recorded.UTC()
		return d, err
	}, f.args()...)
	if err != nil {
		return nil, fmt.Errorf("list dead letters: %w", err)
	}
	return out, nil
}
