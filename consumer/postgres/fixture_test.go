package postgres_test

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"fmt"
	"strconv"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/google/uuid"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// t0 is the invented time of the first blood gas of every test.
var t0 = time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)

var window = fhirmap.Window{Before: 30 * time.Minute, After: 10 * time.Minute}

// tempWindow is the body-temperature window (fhirmap defaults).
var tempWindow = fhirmap.Window{Before: fhirmap.DefaultTemperatureWindowBefore, After: fhirmap.DefaultTemperatureWindowAfter}

const horizon = 14 * 24 * time.Hour

var testKey = []byte("pgtest-patient-hash-key-0123456789abcdef")

type fixture struct {
	ctx   context.Context
	url   string
	pool  *pgxpool.Pool
	store *postgres.Store
}

// clock is a fixed clock that moves one second per reading.
func clock() func() time.Time {
	var n atomic.Int64
	base := time.Date(2026, 3, 2, 12, 0, 0, 0, time.UTC)
	return func() time.Time { return base.Add(time.Duration(n.Add(1)) * time.Second) }
}

func newFixture(t testing.TB) *fixture {
	t.Helper()
	u := pgtest.NewDatabase(t)
	return fixtureAt(t, u)
}

func fixtureAt(t testing.TB, u string) *fixture {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	t.Cleanup(cancel)
	pool, err := pgxpool.New(ctx, u)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(pool.Close)
	return &fixture{ctx: ctx, url: u, pool: pool, store: postgres.New(pool, postgres.Options{PatientKey: testKey, Now: clock()})}
}

func (f *fixture) count(t testing.TB, table string) int {
	t.Helper()
	var n int
	if err := f.pool.QueryRow(f.ctx, "SELECT count(*) FROM "+table).Scan(&n); err != nil {
		t.Fatal(err)
	}
	return n
}

func sha(b []byte) string {
	s := sha256.Sum256(b)
	return hex.EncodeToString(s[:])
}

// obs is an invented Observation: its raw JSON, its resource and its fact.
type obs struct {
	id, version string
	patient     string
	q           fhirmap.Quantity
	at          time.Time
	value       float64
	unit        string
	specimen    fhirmap.Specimen
	status      fhirmap.Status
}

func (o obs) resource() fhirmap.Resource {
	raw := fmt.Appendf(nil, `{"resourceType":"Observation","id":%q,"meta":{"versionId":%q},"status":%q,"subject":{"reference":%q},"effectiveDateTime":%q,"valueQuantity":{"value":%s,"unit":%q}}`,
		o.id, o.version, o.status, o.patient, o.at.Format(time.RFC3339), strconv.FormatFloat(o.value, 'g', -1, 64), o.unit)
	return fhirmap.Resource{Type: "Observation", Reference: "Observation/" + o.id, VersionID: o.version, Patient: o.patient, Digest: sha(raw), Raw: raw}
}

func (o obs) fact() fhirmap.Fact {
	r := o.resource()
	origin := fhirmap.OriginMeasured
	return fhirmap.Fact{
		Key: r.Reference, Resource: r.Reference, VersionID: o.version, Digest: r.Digest,
		Patient: o.patient, Quantity: o.q, Origin: origin, Specimen: o.specimen,
		Value: o.value, Unit: o.unit, SourceValue: o.value, SourceUnit: o.unit,
		Code: fhirmap.Coding{System: "http://loinc.org", Code: "x"}, Status: o.status, Effective: o.at,
	}
}

func abg(patient, id string, at time.Time, paco2 float64) obs {
	return obs{id: id, version: "1", patient: patient, q: fhirmap.QPCO2, at: at, value: paco2, unit: "mm[Hg]", specimen: fhirmap.SpecimenArterial, status: fhirmap.StatusFinal}
}

func vent(patient, id string, q fhirmap.Quantity, at time.Time, v float64, unit string) obs {
	return obs{id: id, version: "1", patient: patient, q: q, at: at, value: v, unit: unit, status: fhirmap.StatusFinal}
}

// message wraps observations into one input message, keyed by its payload.
func message(subject string, seq uint64, os ...obs) consumer.Message {
	m := consumer.Message{Subject: subject, StreamSeq: seq, Received: t0.Add(time.Hour), Window: window, TempWindow: tempWindow, Horizon: horizon}
	var raws []string
	for _, o := range os {
		r := o.resource()
		m.Resources = append(m.Resources, r)
		m.Facts = append(m.Facts, o.fact())
		raws = append(raws, string(r.Raw))
	}
	m.Raw = []byte("[" + strings.Join(raws, ",") + "]")
	m.InboxKey = sha(m.Raw)
	return m
}

// Kinds the test plan derives (codes of the service's catalogue).
const (
	kindVDVT     = "deadspace-fraction-vco2"
	kindGradient = "paco2-petco2-gradient"
)

// testPlan is a small planner for store tests: for each affected arterial
// blood gas it derives VD/VT from VCO2 and the expired minute volume in the
// snapshot nearest to it (physio.DeadSpaceFromVCO2), or refuses with
// "no-minute-volume"; it records every snapshot it was given.
type testPlan struct {
	snaps []consumer.Snapshot
}

func (p *testPlan) plan(s consumer.Snapshot) (consumer.Changes, error) {
	p.snaps = append(p.snaps, s)
	var ch consumer.Changes
	current := map[string]consumer.Stored{}
	for _, c := range s.Current {
		current[c.Key] = c
	}
	for _, key := range s.Affected {
		bg := latest(s.Facts, key)
		dkey := s.Patient + "|" + key + "|" + kindVDVT
		cur, seen := current[dkey]
		var ve *fhirmap.Fact
		for _, f := range s.Facts {
			if f.Quantity == fhirmap.QMinuteVol && within(f.Effective, bg.Effective) {
				if ve == nil || absDur(f.Effective.Sub(bg.Effective)) < absDur(ve.Effective.Sub(bg.Effective)) {
					ve = &f
				}
			}
		}
		if ve == nil || bg.Status == fhirmap.StatusEnteredInError {
			r := fhirmap.Refusal{Key: dkey, Kind: kindVDVT, Patient: s.Patient, BloodGas: key, Effective: bg.Effective,
				Reason: "no-minute-volume", Detail: "no expired minute volume in window",
				Considered: []fhirmap.Input{{Role: "blood-gas", Fact: bg}}}
			r.Digest = sha([]byte(r.Kind + r.Reason + bg.Digest))
			if !seen || !cur.Refused || cur.Digest != r.Digest {
				ch.Refusals = append(ch.Refusals, r)
			}
			continue
		}
		res, err := physio.DeadSpaceFromVCO2(physio.MmHg(bg.Value), 200, physio.LPerMin(ve.Value), 37)
		if err != nil {
			return ch, err
		}
		status := fhirmap.StatusFinal
		if seen && cur.Version > 0 {
			status = fhirmap.StatusAmended
		}
		d := fhirmap.Derivation{Key: dkey, ID: uuid.NewSHA1(uuid.NameSpaceURL, []byte(dkey)).String(), Kind: kindVDVT,
			Patient: s.Patient, Effective: bg.Effective, BloodGas: key, Result: res, Status: status, Algorithm: "test/1",
			Inputs: []fhirmap.Input{
				{Role: "blood-gas", Fact: bg},
				{Role: "minute-volume", Fact: *ve, Offset: ve.Effective.Sub(bg.Effective)},
			}}
		d.Digest = sha(fmt.Appendf(nil, "%s|%.4f|%s|%s|%s", d.Kind, res.Value, bg.Digest, ve.Digest, d.Status))
		if seen && !cur.Refused && cur.Digest == d.Digest {
			continue
		}
		version := 1
		if seen {
			version = cur.Version + 1
		}
		ch.Derivations = append(ch.Derivations, d)
		ch.Versions = append(ch.Versions, version)
		ch.Outbox = append(ch.Outbox, consumer.OutboxMessage{Subject: consumer.DefaultObservationSub,
			MsgID: sha([]byte(d.Key + d.Digest)), Header: map[string]string{consumer.HeaderKind: d.Kind}, Payload: []byte(`{"resourceType":"Observation"}`)})
	}
	if len(ch.Derivations)+len(ch.Refusals) > 0 {
		// The settings snapshot the store keeps once and links every row to.
		snap, err := consumer.Settings{Algorithm: "test/1", Site: fhirmap.DefaultSite()}.Snapshot()
		if err != nil {
			return ch, err
		}
		ch.Settings = snap
	}
	return ch, nil
}

// latest is the newest stored version of a fact key in a snapshot.
func latest(facts []fhirmap.Fact, key string) fhirmap.Fact {
	var out fhirmap.Fact
	for _, f := range facts {
		if f.Key == key {
			out = f
		}
	}
	return out
}

func within(t, bg time.Time) bool {
	return !t.Before(bg.Add(-window.Before)) && !t.After(bg.Add(window.After))
}

func absDur(d time.Duration) time.Duration {
	if d < 0 {
		return -d
	}
	return d
}
