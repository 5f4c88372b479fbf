package postgres

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"fmt"
	"strconv"
	"strings"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgtype"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/rawcodec"
	"github.com/ventderive/ventderive/fhirmap"
)

// Outcomes of a verification (Verdict.Outcome).
const (
	// OutcomeReproduced: the version re-derived from its stored inputs and
	// settings gives the published value, interpretation and digest, and
	// the Observation encoded from it has the published bytes' SHA-256.
	OutcomeReproduced = "reproduced"
	// OutcomeMismatch: at least one of them differs; Findings say which,
	// with both values.
	OutcomeMismatch = "mismatch"
	// OutcomeNotVerifiable: this build cannot re-derive the version (made
	// under another algorithm version, or recorded before the store kept
	// its settings); Why says which. Nothing is guessed.
	OutcomeNotVerifiable = "not-verifiable"
	// OutcomeRetraction: an entered-in-error version, published without a
	// value: there is no value to reproduce.
	OutcomeRetraction = "retraction"
)

// Verdict is the verification of one stored derivation version.
type Verdict struct {
	Key       string    `json:"key"`
	Kind      string    `json:"kind"`
	Patient   string    `json:"patient"`
	BloodGas  string    `json:"bloodGas"`
	Effective time.Time `json:"effective"` // blood-gas time
	Version   int       `json:"version"`
	Status    string    `json:"status"`
	Algorithm string    `json:"algorithm"`
	Settings  string    `json:"settingsDigest,omitempty"`
	Outcome   string    `json:"outcome"`
	Why       string    `json:"why,omitempty"`
	// Published and Rederived are the values as published (rounded);
	// *Value the full precision. Rederived* are empty when nothing was
	// re-derived.
	Published            string   `json:"published,omitempty"`
	PublishedValue       *float64 `json:"publishedValue,omitempty"`
	Rederived            string   `json:"rederived,omitempty"`
	RederivedValue       *float64 `json:"rederivedValue,omitempty"`
	Unit                 string   `json:"unit"`
	DisplayUnit          string   `json:"displayUnit,omitempty"`
	Interpretation       string   `json:"interpretation,omitempty"`
	RederivedInterp      string   `json:"rederivedInterpretation,omitempty"`
	Digest               string   `json:"digest"`
	RederivedDigest      string   `json:"rederivedDigest,omitempty"`
	ObservationDigest    string   `json:"observationSha256,omitempty"`
	RederivedObservation string   `json:"rederivedObservationSha256,omitempty"`
	// Reason and Detail are a refusal's stored reason and detail,
	// Rederived* what this build gives (Status is StatusRefused).
	Reason          string    `json:"reason,omitempty"`
	Detail          string    `json:"detail,omitempty"`
	RederivedReason string    `json:"rederivedReason,omitempty"`
	RederivedDetail string    `json:"rederivedDetail,omitempty"`
	Findings        []string  `json:"findings"`
	Recorded        time.Time `json:"recorded"`
}

const verifyInputsSQL = `
SELECT i.derivation_id, i.role, i.time_offset, i.fallback, ` + reviewFactColumns + `
FROM review_derivation_input i
CROSS JOIN LATERAL (
    SELECT * FROM review_fact f
    WHERE hashtextextended(f.key, 0) = hashtextextended(i.fact_key, 0) AND f.key = i.fact_key AND f.digest = i.fact_digest
    OFFSET 0) f
WHERE i.derivation_id = ANY($1::bigint[])
ORDER BY i.derivation_id, i.ordinal`

// reviewFactColumns are factColumns of review_fact f, for scanFactAfter.
const reviewFactColumns = `f.key, f.digest, f.resource_ref, f.version_id, f.last_updated, f.patient_ref, f.encounter,
    f.quantity, f.origin, f.detail, f.specimen, f.temp_corrected, f.value, f.unit, f.text, f.source_value,
    f.source_unit, f.code_system, f.code, f.code_display, f.status, f.effective, f.issued`

// verifySiblingsSQL finds, for an estimated dead-space fraction, the
// measured fractions of the same blood gas that were the keys' latest
// state when it was recorded: the estimated fraction's flag and reading
// depend on whether one existed (fhirmap: hasMeasuredFraction). $1 the
// estimated version's id.
const verifySiblingsSQL = `
SELECT s.id FROM review_derivation e
JOIN LATERAL (
    SELECT d.id, d.key, d.created_at, d.status FROM review_derivation d
    WHERE d.patient_ref = e.patient_ref AND d.blood_gas_key = e.blood_gas_key
      AND d.kind IN ('deadspace-fraction-enghoff', 'deadspace-fraction-vco2') AND d.created_at <= e.created_at
    ORDER BY d.kind, d.version DESC) s ON true
WHERE e.id = $1 AND s.status <> 'entered-in-error'
  AND NOT EXISTS (SELECT 1 FROM review_derivation n WHERE n.key = s.key AND n.created_at <= e.created_at AND n.id > s.id)
  AND NOT EXISTS (SELECT 1 FROM review_refusal r WHERE r.key = s.key AND r.created_at > s.created_at AND r.created_at <= e.created_at)`

// verifyObservationSQL reads the digest of each published message and, for
// one stored compressed (0018), its frame, which verifyVersions decodes and
// checks against the digest (the Observation's and the Provenance's): the
// re-encoded Observation is compared with the bytes kept, not only with
// the digest written beside them.
const verifyObservationSQL = `
SELECT derivation_id, resource_type, seq, payload_digest, payload_zstd FROM review_published
WHERE derivation_id = ANY($1::bigint[])`

// Verify re-derives every stored derivation version the filter selects
// (List's order and paging) from its stored inputs and its settings
// snapshot, with this build's code, and reports per version whether the
// published value, interpretation, digest and Observation bytes reproduce;
// then the refusals the filter selects (VerifyRefusals). The page's limit
// and offset apply to the versions and to the refusals each; More is set
// when either has more.
func (r *Reviewer) Verify(ctx context.Context, f Filter) (Page[Verdict], error) {
	versions, err := r.List(ctx, f)
	if err != nil {
		return Page[Verdict]{}, err
	}
	out := Page[Verdict]{Offset: versions.Offset, Limit: versions.Limit, More: versions.More, NextOffset: versions.NextOffset}
	out.Rows, err = r.verifyVersions(ctx, versions.Rows)
	if err != nil {
		return Page[Verdict]{}, fmt.Errorf("verify: %w", err)
	}
	refused, err := r.VerifyRefusals(ctx, f)
	if err != nil {
		return Page[Verdict]{}, err
	}
	out.Rows = append(out.Rows, refused.Rows...)
	if refused.More {
		out.More, out.NextOffset = true, refused.NextOffset
	}
	return out, nil
}

// VerifyKey verifies every version of one derived value (an Observation
// id or a key), oldest first.
func (r *Reviewer) VerifyKey(ctx context.Context, idOrKey string) ([]Verdict, error) {
	h, err := r.Show(ctx, idOrKey)
	if err != nil {
		return nil, err
	}
	out, err := r.verifyVersions(ctx, h.Versions)
	if err != nil {
		return nil, fmt.Errorf("verify: %w", err)
	}
	refused, err := r.verifyRefusals(ctx, h.Refusals)
	if err != nil {
		return nil, fmt.Errorf("verify refusals: %w", err)
	}
	return append(out, refused...), nil
}

// storedInput is an input as a derivation stored it, with its whole fact.
type storedInput struct {
	owner int64
	in    fhirmap.Input
}

func scanStoredInput(row pgx.CollectableRow) (storedInput, error) {
	var s storedInput
	var role string
	var offset pgtype.Interval
	var lastUpd, issued pgtype.Timestamptz
	var qty, org, spc, st string
	f := &s.in.Fact
	err := row.Scan(&s.owner, &role, &offset, &s.in.Fallback,
		&f.Key, &f.Digest, &f.Resource, &f.VersionID, &lastUpd, &f.Patient, &f.Encounter, &qty, &org,
		&f.Detail, &spc, &f.TempCorrected, &f.Value, &f.Unit, &f.Text, &f.SourceValue, &f.SourceUnit,
		&f.Code.System, &f.Code.Code, &f.Code.Display, &st, &f.Effective, &issued)
	if err != nil {
		return s, err
	}
	s.in.Role, s.in.Offset = fhirmap.Role(role), intervalDuration(offset)
	f.Quantity, f.Origin, f.Specimen, f.Status = fhirmap.Quantity(qty), fhirmap.Origin(org), fhirmap.Specimen(spc), fhirmap.Status(st)
	f.Effective = f.Effective.UTC()
	if lastUpd.Valid {
		f.LastUpdated = lastUpd.Time.UTC()
	}
	if issued.Valid {
		f.Issued = issued.Time.UTC()
	}
	return s, nil
}

func (r *Reviewer) storedInputs(ctx context.Context, ids []int64) (map[int64][]fhirmap.Input, error) {
	rows, err := queryRows(ctx, r.pool, verifyInputsSQL, scanStoredInput, ids)
	if err != nil {
		return nil, fmt.Errorf("read inputs: %w", err)
	}
	out := map[int64][]fhirmap.Input{}
	for _, s := range rows {
		out[s.owner] = append(out[s.owner], s.in)
	}
	return out, nil
}

func (r *Reviewer) verifyVersions(ctx context.Context, versions []Version) ([]Verdict, error) {
	ids := make([]int64, len(versions))
	for i, v := range versions {
		ids[i] = v.ID
	}
	inputs, err := r.storedInputs(ctx, ids)
	if err != nil {
		return nil, err
	}
	type obsDigest struct {
		id, seq      int64
		resourceType string
		digest       string
		stored       []byte
	}
	obs, err := queryRows(ctx, r.pool, verifyObservationSQL, func(row pgx.CollectableRow) (obsDigest, error) {
		var o obsDigest
		return o, row.Scan(&o.id, &o.resourceType, &o.seq, &o.digest, &o.stored)
	}, ids)
	if err != nil {
		return nil, fmt.Errorf("read published digests: %w", err)
	}
	published := map[int64]string{}
	damaged := map[int64]string{}
	for _, o := range obs {
		if o.resourceType == "Observation" {
			published[o.id] = o.digest
		}
		if o.stored == nil {
			continue
		}
		m := PublishedMessage{Seq: o.seq, Digest: o.digest, stored: o.stored}
		if err := r.decodeMessage(ctx, &m); err != nil {
			if !errors.Is(err, rawcodec.ErrCorrupt) && !errors.Is(err, ErrOutputMismatch) {
				return nil, fmt.Errorf("read published messages: %w", err)
			}
			damaged[o.id] = strings.TrimSpace(damaged[o.id] + " " + o.resourceType + ": " + err.Error())
		}
	}
	settings := map[string]*consumer.Settings{}
	out := make([]Verdict, 0, len(versions))
	for _, v := range versions {
		x := Verdict{Key: v.Key, Kind: v.Kind, Patient: v.Patient, BloodGas: v.BloodGas, Effective: v.Effective,
			Version: v.Version, Status: v.Status, Algorithm: v.Algorithm, Settings: v.Settings,
			Published: v.Published, PublishedValue: v.Value, Unit: v.Unit, DisplayUnit: v.DisplayUnit,
			Interpretation: v.Interpretation.Code, Digest: v.Digest, ObservationDigest: published[v.ID],
			Findings: []string{}, Recorded: v.Recorded}
		if why, ok := damaged[v.ID]; ok {
			x.Findings = append(x.Findings, "published: the stored published bytes are damaged: "+why)
		}
		switch {
		case v.Status == string(fhirmap.StatusEnteredInError):
			x.Outcome, x.Why = OutcomeRetraction, "entered in error: published without a value, nothing to reproduce"
		case v.Algorithm != fhirmap.Algorithm:
			x.Outcome = OutcomeNotVerifiable
			x.Why = fmt.Sprintf("not verifiable with this build: made under algorithm %s, this build runs %s", v.Algorithm, fhirmap.Algorithm)
		case v.Settings == "":
			x.Outcome = OutcomeNotVerifiable
			x.Why = "not verifiable with this build: no settings snapshot was recorded with this version (recorded before the store kept them)"
		default:
			s, ok := settings[v.Settings]
			if !ok {
				rec, err := r.Settings(ctx, v.Settings)
				if err != nil {
					return nil, fmt.Errorf("settings %s: %w", v.Settings, err)
				}
				parsed, err := consumer.ParseSettings([]byte(rec.Snapshot))
				if err != nil {
					return nil, err
				}
				s = &parsed
				settings[v.Settings] = s
			}
			if s.Algorithm != fhirmap.Algorithm {
				x.Outcome = OutcomeNotVerifiable
				x.Why = fmt.Sprintf("not verifiable with this build: the settings snapshot is of algorithm %s, this build runs %s", s.Algorithm, fhirmap.Algorithm)
				break
			}
			var others []fhirmap.Input
			if v.Kind == fhirmap.KindDeadSpaceEstimated {
				sib, err := queryRows(ctx, r.pool, verifySiblingsSQL, pgx.RowTo[int64], v.ID)
				if err != nil {
					return nil, fmt.Errorf("read measured fractions: %w", err)
				}
				if len(sib) > 0 {
					in, err := r.storedInputs(ctx, sib)
					if err != nil {
						return nil, err
					}
					for _, id := range sib {
						others = append(others, in[id]...)
					}
				}
			}
			rederive(&x, v, inputs[v.ID], others, s.Site)
		}
		if len(x.Findings) > 0 && x.Outcome != OutcomeMismatch {
			// Damaged stored bytes make a mismatch whatever else holds; Why
			// keeps what the version would be otherwise, so the verdict
			// does not read as a retraction or as not verifiable alone.
			if x.Why != "" {
				x.Why = "the stored published bytes are damaged (see findings); otherwise: " + x.Why
			}
			x.Outcome = OutcomeMismatch
		}
		out = append(out, x)
	}
	return out, nil
}

// rederive fills x from a re-derivation of v.
func rederive(x *Verdict, v Version, inputs, others []fhirmap.Input, site fhirmap.Site) {
	find := func(format string, a ...any) { x.Findings = append(x.Findings, fmt.Sprintf(format, a...)) }
	d, ref, ok := fhirmap.DeriveFrom(v.Kind, inputs, others, site)
	if !ok {
		x.Outcome = OutcomeMismatch
		if ref.Reason != "" {
			find("value: published %s, re-derived: refused (%s: %s)", withDisplayUnit(v.Published, v.DisplayUnit), ref.Reason, ref.Detail)
		} else {
			find("value: published %s, re-derived: nothing (the stored inputs do not start with the blood gas)", withDisplayUnit(v.Published, v.DisplayUnit))
		}
		return
	}
	computed := d.Status
	rv := d.Result.Value
	x.RederivedValue, x.Rederived = &rv, fhirmap.FormatValue(v.Kind, rv)
	x.RederivedInterp = d.Result.Interpretation.Code
	if x.Rederived != v.Published {
		find("value: published %s, re-derived %s", withDisplayUnit(v.Published, v.DisplayUnit), withDisplayUnit(x.Rederived, v.DisplayUnit))
	}
	if d.Result.Interpretation.Code != v.Interpretation.Code || d.Result.Interpretation.Text != v.Interpretation.Text {
		find("interpretation: published %q, re-derived %q", interpText(v.Interpretation.Code, v.Interpretation.Text),
			interpText(d.Result.Interpretation.Code, d.Result.Interpretation.Text))
	}
	// The stored status may be amended or corrected (it revises a published
	// version); the computed one is final or preliminary.
	if (computed == fhirmap.StatusPreliminary) != (v.Status == string(fhirmap.StatusPreliminary)) {
		find("status: published %s, re-derived inputs give %s", v.Status, computed)
	}
	d.Status = fhirmap.Status(v.Status)
	d.Seal()
	x.RederivedDigest = d.Digest
	if d.Digest != v.Digest {
		find("digest: published %s, re-derived %s", v.Digest, d.Digest)
	}
	if b, err := fhirmap.EncodeObservation(d, v.Version, site); err != nil {
		find("observation: cannot encode the re-derived value: %v", err)
	} else {
		sum := sha256.Sum256(b)
		x.RederivedObservation = hex.EncodeToString(sum[:])
		if x.ObservationDigest == "" {
			find("observation: no published Observation stored for this version")
		} else if x.RederivedObservation != x.ObservationDigest {
			find("observation: published bytes SHA-256 %s, re-encoded %s", x.ObservationDigest, x.RederivedObservation)
		}
	}
	x.Outcome = OutcomeReproduced
	if len(x.Findings) > 0 {
		x.Outcome = OutcomeMismatch
	}
}

func withDisplayUnit(v, unit string) string {
	if v == "" {
		return "(none)"
	}
	if unit == "" {
		return v
	}
	return v + " " + unit
}

func interpText(code, text string) string {
	if code == "" && text == "" {
		return "none"
	}
	return code + " " + text
}

// VerifySummary counts verdicts by outcome (versions and refusals
// together).
type VerifySummary struct {
	Versions      int `json:"versions"`
	Refusals      int `json:"refusals"`
	Reproduced    int `json:"reproduced"`
	Mismatches    int `json:"mismatches"`
	NotVerifiable int `json:"notVerifiable"`
	Retractions   int `json:"retractions"`
}

// Summarise counts vs by outcome.
func Summarise(vs []Verdict) VerifySummary {
	var s VerifySummary
	for _, v := range vs {
		if v.Status == StatusRefused {
			s.Refusals++
		} else {
			s.Versions++
		}
		switch v.Outcome {
		case OutcomeReproduced:
			s.Reproduced++
		case OutcomeMismatch:
			s.Mismatches++
		case OutcomeNotVerifiable:
			s.NotVerifiable++
		case OutcomeRetraction:
			s.Retractions++
		}
	}
	return s
}

func (s VerifySummary) String() string {
	return strconv.Itoa(s.Versions) + " version(s) and " + strconv.Itoa(s.Refusals) + " refusal(s): " + strconv.Itoa(s.Reproduced) + " reproduced, " +
		strconv.Itoa(s.Mismatches) + " mismatch(es), " + strconv.Itoa(s.NotVerifiable) + " not verifiable with this build, " +
		strconv.Itoa(s.Retractions) + " retraction(s) (no value to reproduce)"
}
