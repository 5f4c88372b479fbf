package postgres

import (
	"context"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"strconv"
	"time"

	"github.com/google/uuid"
	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgtype"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
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

// Filter narrows a reviewer query and chooses its page. Zero fields do not
// filter.
//
// Time basis: From and To are blood-gas effective times for every question
// about derived values and refusals (List, Refusals, Refused, Discrepancies,
// Changes, Daily); dead letters have no blood gas, so DeadLetters uses their
// recorded time. Recorded times are returned as their own field.
type Filter struct {
	Patient   string    // FHIR reference, e.g. "Patient/lg-icu-0001"
	From      time.Time // inclusive
	To        time.Time // exclusive
	Kind      string    // derivation kind code
	Algorithm string    // algorithm version, e.g. "ventderive-derive/1"
	Reason    string    // refusal reason code (Refusals, Refused)
	Limit     int       // rows per page; 0 means DefaultLimit, at most MaxLimit
	Offset    int       // rows of the same ordering to skip (the next page starts at Page.NextOffset)
}

// DefaultLimit and MaxLimit bound the rows of one page.
const (
	DefaultLimit = 1000
	MaxLimit     = 10000
)

func (f Filter) limit() int {
	switch {
	case f.Limit <= 0:
		return DefaultLimit
	case f.Limit > MaxLimit:
		return MaxLimit
	}
	return f.Limit
}

// args are $1..$8 of every paged query: the filter, then one row more than
// the page (to learn whether more rows exist) and the offset.
func (f Filter) args() []any {
	return []any{f.Patient, optTime(f.From), optTime(f.To), f.Kind, f.Algorithm, f.limit() + 1, max(f.Offset, 0), f.Reason}
}

// Page is one page of a question's rows in its stated order. More reports
// that rows follow; NextOffset is then the Filter.Offset of the next page.
// Nothing is cut off silently: a caller that ignores More still has it.
type Page[T any] struct {
	Rows       []T  `json:"rows"`
	Offset     int  `json:"offset"`
	Limit      int  `json:"limit"`
	More       bool `json:"more"`
	NextOffset int  `json:"nextOffset,omitempty"`
}

func pageOf[T any](rows []T, f Filter) Page[T] {
	p := Page[T]{Rows: rows, Offset: max(f.Offset, 0), Limit: f.limit()}
	if p.Rows == nil {
		p.Rows = []T{}
	}
	if len(p.Rows) > p.Limit {
		p.Rows, p.More, p.NextOffset = p.Rows[:p.Limit], true, p.Offset+p.Limit
	}
	return p
}

// pageSQL ends every paged query ($6 is the page size plus one, $7 the offset).
const pageSQL = `
LIMIT $6 OFFSET $7`

// filterSQL is the WHERE clause of Filter over a view with patient_ref,
// effective, kind and algorithm columns ($1..$5).
const filterSQL = `($1 = '' OR patient_ref = $1)
  AND ($2::timestamptz IS NULL OR effective >= $2)
  AND ($3::timestamptz IS NULL OR effective < $3)
  AND ($4 = '' OR kind = $4)
  AND ($5 = '' OR algorithm = $5)`

// Constant is a constant as recorded with a derivation, at full precision
// (as the published note writes it).
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
//
// Value is the stored value at full precision and Published the same value
// as it was published (valueQuantity.value: rounded to the kind's decimals,
// fhirmap.FormatValue). A retraction (status entered-in-error) was
// published without a value, so both are empty for it; the withdrawn value
// is the superseded version's.
type Version struct {
	ID             int64          `json:"id"`
	Key            string         `json:"key"`
	Version        int            `json:"version"`
	ObservationID  string         `json:"observationId"`
	Kind           string         `json:"kind"`
	Patient        string         `json:"patient"`
	Encounter      string         `json:"encounter,omitempty"`
	BloodGas       string         `json:"bloodGas"`
	Effective      time.Time      `json:"effective"` // blood-gas time
	Value          *float64       `json:"value,omitempty"`
	Published      string         `json:"published,omitempty"`
	Unit           string         `json:"unit"` // UCUM
	DisplayUnit    string         `json:"displayUnit,omitempty"`
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
	// Record is the published basis as data (formula, worked basis,
	// intermediate steps, every constant, assumption and flag exactly as
	// the Observation's notes write them); nil for a retraction and for a
	// version recorded before the store kept it.
	Record *fhirmap.Record `json:"record,omitempty"`
	// Settings is the digest of the site-settings snapshot the version was
	// made under (Reviewer.Settings reads it); "" for a retraction made by
	// an older build and for versions recorded before the store kept it.
	Settings string  `json:"settingsDigest,omitempty"`
	Inputs   []Input `json:"inputs,omitempty"`
	// Messages are the resources published for this version (Observation
	// and Provenance), exact bytes with their digests; Show fills them.
	Messages []PublishedMessage `json:"messages,omitempty"`
}

// PublishedMessage is one message published for a derivation version, as
// the outbox kept it: the relay publishes these bytes unchanged.
type PublishedMessage struct {
	ResourceType string            `json:"resourceType"` // Observation or Provenance
	Seq          int64             `json:"seq"`
	Subject      string            `json:"subject"`
	MsgID        string            `json:"msgId"`
	Headers      map[string]string `json:"headers"`
	Payload      []byte            `json:"-"`
	PayloadText  string            `json:"payload"`       // the exact bytes, as a JSON string
	Digest       string            `json:"payloadSha256"` // hex SHA-256 of Payload
	SizeBytes    int               `json:"sizeBytes"`
	Recorded     time.Time         `json:"recorded"`
	PublishedAt  *time.Time        `json:"publishedAt,omitempty"` // nil until the relay had a PubAck
	stored       []byte            // the zstd frame of a compressed row, until decodeMessage reads it
}

// Input is one fact a derivation used or a refusal considered.
//
// A patient-level fact (sex, birth date: from the Patient resource) has no
// time of its own: PatientLevel is true and Effective and Offset are nil.
// Coded and date facts (sex, birth date) have Text and no Value. Shown is
// the value as the published note writes it (at most 3 decimals, or the
// text).
type Input struct {
	Ordinal      int            `json:"ordinal"`
	Role         string         `json:"role"`
	FactKey      string         `json:"factKey"`
	FactDigest   string         `json:"factDigest"`
	Resource     string         `json:"resource"`
	VersionID    string         `json:"versionId,omitempty"`
	Quantity     string         `json:"quantity"`
	Origin       string         `json:"origin,omitempty"`
	Detail       string         `json:"detail,omitempty"`
	Specimen     string         `json:"specimen,omitempty"`
	Value        *float64       `json:"value,omitempty"` // canonical unit, full precision
	Text         string         `json:"text,omitempty"`
	Shown        string         `json:"shown"`
	Unit         string         `json:"unit,omitempty"` // UCUM, canonical
	DisplayUnit  string         `json:"displayUnit,omitempty"`
	SourceValue  *float64       `json:"sourceValue,omitempty"` // as sent, when sent in another unit
	SourceUnit   string         `json:"sourceUnit,omitempty"`
	Status       string         `json:"status"`
	PatientLevel bool           `json:"patientLevel,omitempty"`
	Effective    *time.Time     `json:"effective,omitempty"`
	Offset       *time.Duration `json:"offsetNs,omitempty"` // input time minus blood-gas time
	Fallback     string         `json:"fallback,omitempty"`
}

// OffsetText is the offset as a duration ("-6m0s"), "" for a
// patient-level input.
func (in Input) OffsetText() string {
	if in.Offset == nil {
		return ""
	}
	return in.Offset.String()
}

// Refusal is one stored refusal.
type Refusal struct {
	ID         int64     `json:"id"`
	Key        string    `json:"key"`
	Kind       string    `json:"kind"`
	Patient    string    `json:"patient"`
	BloodGas   string    `json:"bloodGas"`
	Effective  time.Time `json:"effective"` // blood-gas time
	Reason     string    `json:"reason"`
	Detail     string    `json:"detail"`
	Digest     string    `json:"digest"`
	Current    bool      `json:"current"`
	Recorded   time.Time `json:"recorded"`
	Settings   string    `json:"settingsDigest,omitempty"` // site-settings snapshot; "" before the store kept it
	Considered []Input   `json:"considered"`
}

// History is everything recorded under one derivation key, oldest first.
type History struct {
	Key      string    `json:"key"`
	Versions []Version `json:"versions"`
	Refusals []Refusal `json:"refusals"`
}

// DisplayUnit is the unit as people read it (mmHg, °C, L/min, mL) for a
// UCUM code; "" for the dimensionless "1". It is physio.DisplayUnit, the one
// table the published notes use too.
func DisplayUnit(ucum string) string { return physio.DisplayUnit(ucum) }

// Shown renders an input value as the published notes do: at most 3
// decimals, no trailing zeros.
func shownNumber(v float64) string {
	r := math.Round(v*1000) / 1000
	if r == 0 {
		r = 0
	}
	return strconv.FormatFloat(r, 'f', -1, 64)
}

const (
	versionColumns = `id, key, version, observation_id::text, kind, patient_ref, encounter, blood_gas_key,
    effective, value, unit, method, method_version, constants::text, assumptions::text, basis,
    interp_code, interp_text, interp_source, flags::text, status, retracted, algorithm, digest,
    coalesce(supersedes_version, 0), coalesce(superseded_by_version, 0), coalesce(is_current, false), created_at,
    record::text, coalesce(settings_digest, '')`

	showKeySQL = `
SELECT key FROM review_derivation WHERE key = $1 OR observation_id::text = $2
UNION SELECT key FROM review_refusal WHERE key = $1
LIMIT 2`

	showVersionsSQL = `SELECT ` + versionColumns + `
FROM review_derivation WHERE key = $1 ORDER BY version`

	// inputColumns read an input with the fact's text and value as sent
	// (review_fact; (key, digest) is unique). Each input's fact is one
	// probe of the unique index by the key's hash (migration 0017), in a
	// lateral subquery the planner may not flatten: as a join it hashed
	// every fact of the store (no statistics on the partitioned table).
	inputColumns = `i.ordinal, i.role, i.fact_key, i.fact_digest, i.resource_ref, i.version_id, i.quantity,
       i.origin, i.detail, i.specimen, i.value, i.unit, f.text, f.source_value, f.source_unit, i.status,
       i.effective, i.time_offset, i.fallback`

	showInputsSQL = `
SELECT i.derivation_id, ` + inputColumns + `
FROM review_derivation_input i
CROSS JOIN LATERAL (
    SELECT * FROM review_fact f
    WHERE hashtextextended(f.key, 0) = hashtextextended(i.fact_key, 0) AND f.key = i.fact_key AND f.digest = i.fact_digest
    OFFSET 0) f
WHERE i.derivation_id IN (SELECT id FROM review_derivation WHERE key = $1)
ORDER BY i.derivation_id, i.ordinal`

	showPublishedSQL = `
SELECT derivation_id, resource_type, seq, subject, msg_id, headers::text, payload, payload_digest, size_bytes,
       created_at, published_at, payload_zstd
FROM review_published WHERE key = $1 ORDER BY version, resource_type`

	showRefusalsSQL = `
SELECT id, key, kind, patient_ref, blood_gas_key, effective, reason, detail, digest,
       coalesce(is_current, false), created_at, coalesce(settings_digest, '')
FROM review_refusal WHERE key = $1 ORDER BY id`

	showConsideredSQL = `
SELECT i.refusal_id, ` + inputColumns + `
FROM review_refusal_input i
CROSS JOIN LATERAL (
    SELECT * FROM review_fact f
    WHERE hashtextextended(f.key, 0) = hashtextextended(i.fact_key, 0) AND f.key = i.fact_key AND f.digest = i.fact_digest
    OFFSET 0) f
WHERE i.refusal_id IN (SELECT id FROM review_refusal WHERE key = $1)
ORDER BY i.refusal_id, i.ordinal`
)

// Show returns the full history of one derived value, found by its
// Observation id (a UUID) or its key ("<patient>|<blood-gas key>|<kind>"):
// every version with its inputs, constants, assumptions and basis, what
// superseded what, and every refusal with the inputs it considered. It
// returns ErrNotFound when nothing matches. A key's history is not paged:
// it is one value's versions, each bounded by the inputs of one blood gas.
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
	b.Queue(showPublishedSQL, h.Key)
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
	messages, err := collectPublished(br)
	if err != nil {
		return History{}, fmt.Errorf("read published messages: %w", err)
	}
	for i := range h.Versions {
		h.Versions[i].Messages = messages[h.Versions[i].ID]
	}
	rows, err = br.Query()
	if err == nil {
		h.Refusals, err = pgx.CollectRows(rows, scanRefusal)
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
		if h.Refusals[i].Considered == nil {
			h.Refusals[i].Considered = []Input{}
		}
	}
	if h.Versions == nil {
		h.Versions = []Version{}
	}
	if h.Refusals == nil {
		h.Refusals = []Refusal{}
	}
	if err := br.Close(); err != nil {
		return History{}, err
	}
	for i := range h.Versions {
		for j := range h.Versions[i].Messages {
			if err := r.decodeMessage(ctx, &h.Versions[i].Messages[j]); err != nil {
				return History{}, fmt.Errorf("read published messages: %w", err)
			}
		}
	}
	return h, nil
}

// decodeMessage gives a message stored compressed (0018) its exact bytes,
// checked against the digest stored with them: bytes that do not match
// are refused, never shown as published.
func (r *Reviewer) decodeMessage(ctx context.Context, m *PublishedMessage) error {
	if m.stored == nil {
		return nil
	}
	sum, err := hex.DecodeString(m.Digest)
	if err != nil {
		return fmt.Errorf("outbox %d: stored digest %q: %w", m.Seq, m.Digest, err)
	}
	b, err := decodePublished(ctx, r.pool, reviewerDictionariesSQL, m.Seq, m.stored, sum)
	if err != nil {
		return err
	}
	m.Payload, m.PayloadText, m.stored = b, string(b), nil
	return nil
}

func collectPublished(br pgx.BatchResults) (map[int64][]PublishedMessage, error) {
	rows, err := br.Query()
	if err != nil {
		return nil, err
	}
	out := map[int64][]PublishedMessage{}
	var owner int64
	var m PublishedMessage
	var headers string
	var published *time.Time
	var stored []byte
	_, err = pgx.ForEachRow(rows, []any{&owner, &m.ResourceType, &m.Seq, &m.Subject, &m.MsgID, &headers, &m.Payload,
		&m.Digest, &m.SizeBytes, &m.Recorded, &published, &stored}, func() error {
		x := m
		x.Headers = nil
		if err := json.Unmarshal([]byte(headers), &x.Headers); err != nil {
			return fmt.Errorf("outbox %d headers: %w", x.Seq, err)
		}
		x.Payload = append([]byte(nil), m.Payload...)
		x.PayloadText = string(x.Payload)
		if stored != nil {
			x.stored = append([]byte(nil), stored...)
		}
		x.Recorded = x.Recorded.UTC()
		if published != nil {
			t := published.UTC()
			x.PublishedAt = &t
		}
		out[owner] = append(out[owner], x)
		return nil
	})
	return out, err
}

func scanRefusal(row pgx.CollectableRow) (Refusal, error) {
	var x Refusal
	err := row.Scan(&x.ID, &x.Key, &x.Kind, &x.Patient, &x.BloodGas, &x.Effective, &x.Reason, &x.Detail,
		&x.Digest, &x.Current, &x.Recorded, &x.Settings)
	x.Effective, x.Recorded = x.Effective.UTC(), x.Recorded.UTC()
	return x, err
}

// collectInputs reads rows of an owner id followed by inputColumns.
func collectInputs(br pgx.BatchResults) (map[int64][]Input, error) {
	rows, err := br.Query()
	if err != nil {
		return nil, err
	}
	out := map[int64][]Input{}
	var owner int64
	var in Input
	var value, sourceValue float64
	var effective time.Time
	var offset pgtype.Interval
	_, err = pgx.ForEachRow(rows, []any{&owner, &in.Ordinal, &in.Role, &in.FactKey, &in.FactDigest, &in.Resource,
		&in.VersionID, &in.Quantity, &in.Origin, &in.Detail, &in.Specimen, &value, &in.Unit, &in.Text,
		&sourceValue, &in.SourceUnit, &in.Status, &effective, &offset, &in.Fallback}, func() error {
		out[owner] = append(out[owner], makeInput(in, value, sourceValue, effective, offset))
		return nil
	})
	return out, err
}

// makeInput fills what the stored row implies: a coded or date fact shows
// its text (its stored value 0 means nothing); a fact without a time of its
// own (stored as the zero time, 0001-01-01) is patient-level and has no
// offset (the stored one is the saturated difference to year 1).
func makeInput(in Input, value, sourceValue float64, effective time.Time, offset pgtype.Interval) Input {
	switch fhirmap.Quantity(in.Quantity) {
	case fhirmap.QSex, fhirmap.QBirthDate, fhirmap.QAirway:
		in.Shown, in.Unit, in.SourceUnit = in.Text, "", ""
	default:
		in.Value = &value
		in.Shown = shownNumber(value)
		in.DisplayUnit = DisplayUnit(in.Unit)
		if in.SourceUnit != "" && in.SourceUnit != in.Unit {
			in.SourceValue = &sourceValue
		} else {
			in.SourceUnit = ""
		}
	}
	if effective = effective.UTC(); effective.IsZero() {
		in.PatientLevel = true
		return in
	}
	in.Effective = &effective
	d := intervalDuration(offset)
	in.Offset = &d
	return in
}

// intervalDuration converts a stored interval (days of 24 h, months of 30
// days: the store writes microseconds only).
func intervalDuration(i pgtype.Interval) time.Duration {
	return time.Duration(i.Microseconds)*time.Microsecond +
		time.Duration(i.Days)*24*time.Hour + time.Duration(i.Months)*30*24*time.Hour
}

// published sets Value and Published from the stored value, or clears
// them for a retraction (published without a value).
func published(kind, status string, v float64) (*float64, string) {
	if status == string(fhirmap.StatusEnteredInError) {
		return nil, ""
	}
	return &v, fhirmap.FormatValue(kind, v)
}

func scanVersion(row pgx.CollectableRow) (Version, error) {
	var v Version
	var value float64
	var consts, assumptions, flags string
	var record *string
	err := row.Scan(&v.ID, &v.Key, &v.Version, &v.ObservationID, &v.Kind, &v.Patient, &v.Encounter, &v.BloodGas,
		&v.Effective, &value, &v.Unit, &v.Method, &v.MethodVersion, &consts, &assumptions, &v.Basis,
		&v.Interpretation.Code, &v.Interpretation.Text, &v.Interpretation.Source, &flags, &v.Status, &v.Retracted,
		&v.Algorithm, &v.Digest, &v.Supersedes, &v.SupersededBy, &v.Current, &v.Recorded, &record, &v.Settings)
	if err != nil {
		return v, err
	}
	if record != nil {
		v.Record = &fhirmap.Record{}
		if err := json.Unmarshal([]byte(*record), v.Record); err != nil {
			return v, fmt.Errorf("derivation %d record: %w", v.ID, err)
		}
	}
	v.Effective, v.Recorded = v.Effective.UTC(), v.Recorded.UTC()
	v.Value, v.Published = published(v.Kind, v.Status, value)
	v.DisplayUnit = DisplayUnit(v.Unit)
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

// queryPage runs a paged query (args from Filter.args plus extra) and cuts
// the extra row off into Page.More.
func queryPage[T any](ctx context.Context, pool *pgxpool.Pool, sql string, fn pgx.RowToFunc[T], f Filter, extra ...any) (Page[T], error) {
	rows, err := queryRows(ctx, pool, sql, fn, append(f.args(), extra...)...)
	if err != nil {
		return Page[T]{}, err
	}
	return pageOf(rows, f), nil
}

const listSQL = `SELECT ` + versionColumns + `
FROM review_derivation
WHERE ` + filterSQL + ` AND $8 = $8
ORDER BY effective, key, version` + pageSQL

// List returns derivation versions (all versions, not only current ones)
// whose blood gas falls in f's period, oldest blood gas first (then key and
// version), without their inputs.
func (r *Reviewer) List(ctx context.Context, f Filter) (Page[Version], error) {
	out, err := queryPage(ctx, r.pool, listSQL, scanVersion, f)
	if err != nil {
		return out, fmt.Errorf("list derivations: %w", err)
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
	First    time.Time `json:"first"` // earliest blood-gas time
	Last     time.Time `json:"last"`  // latest blood-gas time
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
  AND ($8 = '' OR reason = $8)
GROUP BY reason, kind
ORDER BY count(*) DESC, reason, kind` + pageSQL

// Refusals summarises refusals by reason code and kind, most frequent
// first, by blood-gas time. Filter.Algorithm does not apply (refusals carry
// no algorithm).
func (r *Reviewer) Refusals(ctx context.Context, f Filter) (Page[ReasonCount], error) {
	out, err := queryPage(ctx, r.pool, refusalsSQL, func(row pgx.CollectableRow) (ReasonCount, error) {
		var c ReasonCount
		err := row.Scan(&c.Reason, &c.Kind, &c.Count, &c.Current, &c.Patients, &c.First, &c.Last)
		c.First, c.Last = c.First.UTC(), c.Last.UTC()
		return c, err
	}, f)
	if err != nil {
		return out, fmt.Errorf("summarise refusals: %w", err)
	}
	return out, nil
}

// Discrepancy is a current measured-minus-predicted PaCO2 at or beyond a
// threshold, with the predicted and measured values when recorded. The
// *MmHg fields are full precision; Difference and Predicted are as
// published (rounded to their kinds' decimals), Measured as the published
// note shows the input.
type Discrepancy struct {
	Key            string    `json:"key"`
	ObservationID  string    `json:"observationId"`
	Patient        string    `json:"patient"`
	BloodGas       string    `json:"bloodGas"`
	Effective      time.Time `json:"effective"` // blood-gas time
	Version        int       `json:"version"`
	Status         string    `json:"status"`
	DifferenceMmHg float64   `json:"differenceMmHg"`
	Difference     string    `json:"difference"`
	PredictedMmHg  *float64  `json:"predictedMmHg"`
	Predicted      string    `json:"predicted,omitempty"`
	MeasuredMmHg   *float64  `json:"measuredMmHg"`
	Measured       string    `json:"measured,omitempty"`
	InterpCode     string    `json:"interpretationCode,omitempty"`
	Interpretation string    `json:"interpretation"`
	Basis          string    `json:"basis"`
	Recorded       time.Time `json:"recorded"`
}

const discrepanciesSQL = `
SELECT d.key, d.observation_id::text, d.patient_ref, d.blood_gas_key, d.effective, d.version, d.status,
       d.value, CASE WHEN p.status <> 'entered-in-error' THEN p.value END, m.value, d.interp_code, d.interp_text,
       d.basis, d.created_at
FROM review_derivation d
LEFT JOIN review_derivation p
       ON p.patient_ref = d.patient_ref AND p.blood_gas_key = d.blood_gas_key
      AND p.kind = $10 AND p.is_current
LEFT JOIN LATERAL (
    SELECT i.value FROM review_derivation_input i
    WHERE i.derivation_id = d.id AND i.fact_key = d.blood_gas_key
    ORDER BY i.ordinal LIMIT 1) m ON true
WHERE d.is_current AND d.status <> 'entered-in-error'
  AND ($4 = '' OR d.kind = $4) AND d.kind = $9
  AND abs(d.value) >= $11
  AND ($1 = '' OR d.patient_ref = $1)
  AND ($2::timestamptz IS NULL OR d.effective >= $2)
  AND ($3::timestamptz IS NULL OR d.effective < $3)
  AND ($5 = '' OR d.algorithm = $5)
  AND $8 = $8
ORDER BY abs(d.value) DESC, d.effective, d.key` + pageSQL

// Discrepancies returns current measured-minus-predicted PaCO2 values whose
// size is at least thresholdMmHg (mm[Hg]), largest first, by blood-gas
// time.
func (r *Reviewer) Discrepancies(ctx context.Context, thresholdMmHg float64, f Filter) (Page[Discrepancy], error) {
	out, err := queryPage(ctx, r.pool, discrepanciesSQL, func(row pgx.CollectableRow) (Discrepancy, error) {
		var d Discrepancy
		err := row.Scan(&d.Key, &d.ObservationID, &d.Patient, &d.BloodGas, &d.Effective, &d.Version, &d.Status,
			&d.DifferenceMmHg, &d.PredictedMmHg, &d.MeasuredMmHg, &d.InterpCode, &d.Interpretation, &d.Basis, &d.Recorded)
		d.Effective, d.Recorded = d.Effective.UTC(), d.Recorded.UTC()
		d.Difference = fhirmap.FormatValue(fhirmap.KindPaCO2Discrepancy, d.DifferenceMmHg)
		if d.PredictedMmHg != nil {
			d.Predicted = fhirmap.FormatValue(fhirmap.KindPredictedPaCO2, *d.PredictedMmHg)
		}
		if d.MeasuredMmHg != nil {
			d.Measured = shownNumber(*d.MeasuredMmHg)
		}
		return d, err
	}, f, fhirmap.KindPaCO2Discrepancy, fhirmap.KindPredictedPaCO2, thresholdMmHg)
	if err != nil {
		return out, fmt.Errorf("find discrepancies: %w", err)
	}
	return out, nil
}

// Change is a derived value changed by a later version: amended,
// corrected, retracted, or recomputed to another value. From and To values
// follow Version: full precision in *Value, as published in *Published,
// none for a retraction (on either side: a value derived again after a
// retraction comes from none).
type Change struct {
	Key           string    `json:"key"`
	Kind          string    `json:"kind"`
	Patient       string    `json:"patient"`
	BloodGas      string    `json:"bloodGas"`
	Effective     time.Time `json:"effective"` // blood-gas time
	FromVersion   int       `json:"fromVersion"`
	ToVersion     int       `json:"toVersion"`
	FromValue     *float64  `json:"fromValue,omitempty"`
	FromPublished string    `json:"fromPublished,omitempty"`
	ToValue       *float64  `json:"toValue,omitempty"`
	ToPublished   string    `json:"toPublished,omitempty"`
	Unit          string    `json:"unit"` // UCUM
	DisplayUnit   string    `json:"displayUnit,omitempty"`
	FromStatus    string    `json:"fromStatus"`
	ToStatus      string    `json:"toStatus"`
	Retracted     string    `json:"retracted,omitempty"`
	Recorded      time.Time `json:"recorded"` // when the later version was recorded
}

const changesSQL = `
SELECT key, kind, patient_ref, blood_gas_key, effective, supersedes_version, version,
       supersedes_value, value, unit, supersedes_status, status, retracted, created_at
FROM review_derivation
WHERE supersedes_version IS NOT NULL
  AND (status IN ('amended', 'corrected', 'entered-in-error') OR value <> supersedes_value
       OR status <> supersedes_status)
  AND ` + filterSQL + ` AND $8 = $8
ORDER BY effective, key, version` + pageSQL

// Changes returns every version that changed a previously recorded value
// (by amendment, correction, retraction or recomputation), by blood-gas
// time (then key and version).
func (r *Reviewer) Changes(ctx context.Context, f Filter) (Page[Change], error) {
	out, err := queryPage(ctx, r.pool, changesSQL, func(row pgx.CollectableRow) (Change, error) {
		var c Change
		var from, to float64
		err := row.Scan(&c.Key, &c.Kind, &c.Patient, &c.BloodGas, &c.Effective, &c.FromVersion, &c.ToVersion,
			&from, &to, &c.Unit, &c.FromStatus, &c.ToStatus, &c.Retracted, &c.Recorded)
		c.Effective, c.Recorded = c.Effective.UTC(), c.Recorded.UTC()
		c.FromValue, c.FromPublished = published(c.Kind, c.FromStatus, from)
		c.ToValue, c.ToPublished = published(c.Kind, c.ToStatus, to)
		c.DisplayUnit = DisplayUnit(c.Unit)
		return c, err
	}, f)
	if err != nil {
		return out, fmt.Errorf("list changes: %w", err)
	}
	return out, nil
}

// DayCount is what was recorded for the blood gases of one UTC day.
type DayCount struct {
	Day         string `json:"day"` // YYYY-MM-DD, UTC, of the blood-gas time
	BloodGases  int    `json:"bloodGases"`
	Derivations int    `json:"derivations"` // versions, retractions included
	Retractions int    `json:"retractions"`
	Refusals    int    `json:"refusals"`
}

const dailySQL = `
WITH ev AS (
    SELECT effective, patient_ref, blood_gas_key, 1 AS derivation, (status = 'entered-in-error')::int AS retraction, 0 AS refusal
    FROM review_derivation
    WHERE ($1 = '' OR patient_ref = $1) AND ($4 = '' OR kind = $4) AND ($5 = '' OR algorithm = $5)
    UNION ALL
    SELECT effective, patient_ref, blood_gas_key, 0, 0, 1 FROM review_refusal
    WHERE ($1 = '' OR patient_ref = $1) AND ($4 = '' OR kind = $4) AND $5 = ''
)
SELECT to_char(effective AT TIME ZONE 'UTC', 'YYYY-MM-DD') AS day,
       count(DISTINCT (patient_ref, blood_gas_key)), sum(derivation), sum(retraction), sum(refusal)
FROM ev
WHERE ($2::timestamptz IS NULL OR effective >= $2) AND ($3::timestamptz IS NULL OR effective < $3)
  AND $8 = $8
GROUP BY day
ORDER BY day` + pageSQL

// Daily counts, per UTC day of blood-gas time, the blood gases with any
// record, the derivation versions (and among them retractions) and the
// refusals. A kind or algorithm filter leaves out what does not carry one
// (refusals for an algorithm). Dead letters have no blood gas: see
// DeadLetters.
func (r *Reviewer) Daily(ctx context.Context, f Filter) (Page[DayCount], error) {
	out, err := queryPage(ctx, r.pool, dailySQL, func(row pgx.CollectableRow) (DayCount, error) {
		var d DayCount
		err := row.Scan(&d.Day, &d.BloodGases, &d.Derivations, &d.Retractions, &d.Refusals)
		return d, err
	}, f)
	if err != nil {
		return out, fmt.Errorf("count per day: %w", err)
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
  AND $1 = $1 AND $4 = $4 AND $5 = $5 AND ($8 = '' OR reason = $8)
ORDER BY id` + pageSQL

// DeadLetters lists poison messages by recorded time (their only time:
// they were never understood), oldest first. Filter.Patient, Kind and
// Algorithm do not apply.
func (r *Reviewer) DeadLetters(ctx context.Context, f Filter) (Page[DeadLetterRecord], error) {
	out, err := queryPage(ctx, r.pool, deadLettersSQL, func(row pgx.CollectableRow) (DeadLetterRecord, error) {
		var d DeadLetterRecord
		err := row.Scan(&d.ID, &d.InboxKey, &d.Subject, &d.StreamSeq, &d.SizeBytes, &d.Reason, &d.Detail, &d.Recorded)
		d.Recorded = d.Recorded.UTC()
		return d, err
	}, f)
	if err != nil {
		return out, fmt.Errorf("list dead letters: %w", err)
	}
	return out, nil
}

// RefusalRow is one refusal listed with the inputs it considered and, for
// a refusal for want of ventilator data, the nearest usable ventilator
// reading recorded by then (review_refusal_nearest).
type RefusalRow struct {
	Refusal
	Nearest *NearestReading `json:"nearest,omitempty"`
}

// NearestReading is the ventilator reading nearest to a refused blood gas.
type NearestReading struct {
	FactKey     string        `json:"factKey"`
	Resource    string        `json:"resource"`
	Quantity    string        `json:"quantity"`
	Origin      string        `json:"origin,omitempty"`
	Value       float64       `json:"value"`
	Shown       string        `json:"shown"`
	Unit        string        `json:"unit"` // UCUM
	DisplayUnit string        `json:"displayUnit,omitempty"`
	Status      string        `json:"status"`
	Effective   time.Time     `json:"effective"`
	Offset      time.Duration `json:"offsetNs"` // reading time minus blood-gas time
}

const refusedSQL = `
WITH page AS (
    SELECT id, key, kind, patient_ref, blood_gas_key, effective, reason, detail, digest,
           coalesce(is_current, false) AS is_current, created_at, coalesce(settings_digest, '') AS settings_digest
    FROM review_refusal
    WHERE ($1 = '' OR patient_ref = $1)
      AND ($2::timestamptz IS NULL OR effective >= $2)
      AND ($3::timestamptz IS NULL OR effective < $3)
      AND ($4 = '' OR kind = $4)
      AND $5 = $5
      AND ($8 = '' OR reason = $8)
    ORDER BY effective, patient_ref, blood_gas_key, kind, id` + pageSQL + `
)
SELECT p.id, p.key, p.kind, p.patient_ref, p.blood_gas_key, p.effective, p.reason, p.detail, p.digest,
       p.is_current, p.created_at, p.settings_digest,
       n.fact_key, n.resource_ref, n.quantity, n.origin, n.value, n.unit, n.status, n.effective, n.time_offset
FROM page p
LEFT JOIN review_refusal_nearest n ON n.refusal_id = p.id
ORDER BY p.effective, p.patient_ref, p.blood_gas_key, p.kind, p.id`

const refusedInputsSQL = `
SELECT i.refusal_id, ` + inputColumns + `
FROM review_refusal_input i
CROSS JOIN LATERAL (
    SELECT * FROM review_fact f
    WHERE hashtextextended(f.key, 0) = hashtextextended(i.fact_key, 0) AND f.key = i.fact_key AND f.digest = i.fact_digest
    OFFSET 0) f
WHERE i.refusal_id = ANY($1::bigint[])
ORDER BY i.refusal_id, i.ordinal`

// Refused lists refusals one by one, by blood-gas time (then patient,
// blood gas and kind: the refusals of one blood gas are together), with
// their reason, detail, the inputs considered and the nearest ventilator
// reading where the reason is no-ventilator-data-in-window. Filter.Reason,
// Kind, Patient, From and To apply; Algorithm does not (refusals carry
// none).
func (r *Reviewer) Refused(ctx context.Context, f Filter) (Page[RefusalRow], error) {
	rows, err := queryRows(ctx, r.pool, refusedSQL, func(row pgx.CollectableRow) (RefusalRow, error) {
		var x RefusalRow
		var key, resource, quantity, origin, unit, status *string
		var value *float64
		var effective *time.Time
		var offset pgtype.Interval
		err := row.Scan(&x.ID, &x.Key, &x.Kind, &x.Patient, &x.BloodGas, &x.Effective, &x.Reason, &x.Detail,
			&x.Digest, &x.Current, &x.Recorded, &x.Settings, &key, &resource, &quantity, &origin, &value, &unit, &status, &effective, &offset)
		x.Effective, x.Recorded = x.Effective.UTC(), x.Recorded.UTC()
		if err == nil && key != nil {
			x.Nearest = &NearestReading{FactKey: *key, Resource: *resource, Quantity: *quantity, Origin: *origin,
				Value: *value, Shown: shownNumber(*value), Unit: *unit, DisplayUnit: DisplayUnit(*unit), Status: *status,
				Effective: effective.UTC(), Offset: intervalDuration(offset)}
		}
		return x, err
	}, f.args()...)
	if err != nil {
		return Page[RefusalRow]{}, fmt.Errorf("list refusals: %w", err)
	}
	page := pageOf(rows, f)
	ids := make([]int64, len(page.Rows))
	for i, x := range page.Rows {
		ids[i] = x.ID
	}
	b := &pgx.Batch{}
	b.Queue(refusedInputsSQL, ids)
	br := r.pool.SendBatch(ctx, b)
	defer br.Close()
	considered, err := collectInputs(br)
	if err != nil {
		return Page[RefusalRow]{}, fmt.Errorf("read considered inputs: %w", err)
	}
	for i := range page.Rows {
		page.Rows[i].Considered = considered[page.Rows[i].ID]
		if page.Rows[i].Considered == nil {
			page.Rows[i].Considered = []Input{}
		}
	}
	return page, br.Close()
}

// SettingsRecord is one stored site-settings snapshot: its exact bytes,
// their digest, and the parsed settings.
type SettingsRecord struct {
	Digest      string          `json:"digest"`
	Algorithm   string          `json:"algorithm"`
	AliasDigest string          `json:"aliasDigest"`
	Snapshot    string          `json:"snapshot"` // the exact bytes stored, whose SHA-256 is Digest
	Site        json.RawMessage `json:"site"`
	Recorded    time.Time       `json:"recorded"`
}

const settingsSQL = `
SELECT digest, algorithm, alias_digest, snapshot, site::text, created_at FROM review_settings
WHERE digest = $1`

// Settings returns the settings snapshot with digest, or ErrNotFound.
func (r *Reviewer) Settings(ctx context.Context, digest string) (SettingsRecord, error) {
	rows, err := queryRows(ctx, r.pool, settingsSQL, scanSettings, digest)
	if err != nil {
		return SettingsRecord{}, fmt.Errorf("read settings: %w", err)
	}
	if len(rows) == 0 {
		return SettingsRecord{}, ErrNotFound
	}
	return rows[0], nil
}

func scanSettings(row pgx.CollectableRow) (SettingsRecord, error) {
	var s SettingsRecord
	var site string
	err := row.Scan(&s.Digest, &s.Algorithm, &s.AliasDigest, &s.Snapshot, &site, &s.Recorded)
	s.Site, s.Recorded = json.RawMessage(site), s.Recorded.UTC()
	return s, err
}
