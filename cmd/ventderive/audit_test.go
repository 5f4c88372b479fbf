package main

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"flag"
	"fmt"
	"net/url"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/google/uuid"
	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/migrations"
	"github.com/ventderive/ventderive/physio"
)

// The -update flag is shared by every golden test of the package; whichever
// test file's init runs first defines it.
func init() {
	if flag.Lookup("update") == nil {
		flag.Bool("update", false, "rewrite golden files under testdata/")
	}
}

func updateGoldens() bool {
	f := flag.Lookup("update")
	return f != nil && f.Value.String() == "true"
}

// Invented ward data: Larkspur General Hospital, ICU 3 West.
var (
	auditT0 = time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)
	patA    = "Patient/lg-icu-0003"
	patB    = "Patient/lg-icu-0004"
)

func auditSHA(b []byte) string {
	s := sha256.Sum256(b)
	return hex.EncodeToString(s[:])
}

type auditObs struct {
	id, version string
	patient     string
	q           fhirmap.Quantity
	at          time.Time
	value       float64
	unit        string
	specimen    fhirmap.Specimen
	status      fhirmap.Status
}

func (o auditObs) message(seq uint64) consumer.Message {
	raw := fmt.Appendf(nil, `{"resourceType":"Observation","id":%q,"meta":{"versionId":%q},"status":%q,"subject":{"reference":%q},"effectiveDateTime":%q,"valueQuantity":{"value":%s,"unit":%q}}`,
		o.id, o.version, o.status, o.patient, o.at.Format(time.RFC3339), strconv.FormatFloat(o.value, 'f', -1, 64), o.unit)
	ref := "Observation/" + o.id
	r := fhirmap.Resource{Type: "Observation", Reference: ref, VersionID: o.version, Patient: o.patient, Digest: auditSHA(raw), Raw: raw}
	origin := fhirmap.OriginMeasured
	if o.specimen != "" {
		origin = ""
	}
	f := fhirmap.Fact{Key: ref, Resource: ref, VersionID: o.version, Digest: r.Digest, Patient: o.patient,
		Quantity: o.q, Origin: origin, Specimen: o.specimen, Value: o.value, Unit: o.unit, SourceValue: o.value,
		SourceUnit: o.unit, Code: fhirmap.Coding{System: "http://loinc.org", Code: "2019-8"}, Status: o.status, Effective: o.at}
	return consumer.Message{InboxKey: auditSHA(raw), Subject: "fhir.input.lab", StreamSeq: seq, Received: o.at.Add(10 * time.Minute),
		Raw: raw, Resources: []fhirmap.Resource{r}, Facts: []fhirmap.Fact{f},
		Window: fhirmap.Window{Before: 30 * time.Minute, After: 10 * time.Minute}, Horizon: 14 * 24 * time.Hour}
}

func gas(patient, id, version string, at time.Time, paco2 float64, sp fhirmap.Specimen, st fhirmap.Status) auditObs {
	return auditObs{id: id, version: version, patient: patient, q: fhirmap.QPCO2, at: at, value: paco2, unit: "mm[Hg]", specimen: sp, status: st}
}

func reading(patient, id string, q fhirmap.Quantity, at time.Time, v float64, unit string) auditObs {
	return auditObs{id: id, version: "1", patient: patient, q: q, at: at, value: v, unit: unit, status: fhirmap.StatusFinal}
}

// auditPlan is a small deterministic planner for the fixture: the real one
// lives in consumer; here only what the store records matters.
func auditPlan(s consumer.Snapshot) (consumer.Changes, error) {
	var ch consumer.Changes
	current := map[string]consumer.Stored{}
	for _, c := range s.Current {
		current[c.Key] = c
	}
	latest := func(key string) (f fhirmap.Fact) {
		for _, x := range s.Facts {
			if x.Key == key {
				f = x
			}
		}
		return f
	}
	nearest := func(q fhirmap.Quantity, bg fhirmap.Fact) *fhirmap.Fact {
		var best *fhirmap.Fact
		for _, x := range s.Facts {
			d := x.Effective.Sub(bg.Effective)
			if x.Quantity != q || d < -30*time.Minute || d > 10*time.Minute {
				continue
			}
			if best == nil || d.Abs() < best.Effective.Sub(bg.Effective).Abs() {
				best = &x
			}
		}
		return best
	}
	kinds := []string{"deadspace-fraction-vco2", "paco2-petco2-gradient", "paco2-predicted", "paco2-measured-minus-predicted"}
	for _, key := range s.Affected {
		bg := latest(key)
		refuse := func(reason, detail string, considered []fhirmap.Input) {
			for _, kind := range kinds {
				dkey := s.Patient + "|" + key + "|" + kind
				cur, ok := current[dkey]
				if ok && !cur.Refused && cur.Status != fhirmap.StatusEnteredInError {
					d := fhirmap.Derivation{Key: dkey, ID: uuid.NewSHA1(uuid.NameSpaceURL, []byte(dkey)).String(), Kind: kind,
						Patient: s.Patient, Effective: bg.Effective, BloodGas: key,
						Result: physio.Result{Value: cur.Value, Unit: unitOf(kind), Method: "retraction"},
						Inputs: []fhirmap.Input{{Role: "blood-gas", Fact: bg}}, Status: fhirmap.StatusEnteredInError,
						Algorithm: "ventderive-derive/1", Retracted: reason}
					d.Digest = auditSHA([]byte(dkey + "retracted" + bg.Digest))
					emit(&ch, d, cur.Version+1)
				}
				r := fhirmap.Refusal{Key: dkey, Kind: kind, Patient: s.Patient, BloodGas: key, Effective: bg.Effective,
					Reason: reason, Detail: detail, Considered: considered}
				r.Digest = auditSHA([]byte(dkey + reason + bg.Digest))
				if !ok || !cur.Refused || cur.Digest != r.Digest {
					ch.Refusals = append(ch.Refusals, r)
				}
			}
		}
		bgIn := []fhirmap.Input{{Role: "blood-gas", Fact: bg}}
		switch {
		case bg.Status == fhirmap.StatusEnteredInError:
			refuse("blood-gas-entered-in-error", "the blood gas was entered in error", bgIn)
			continue
		case bg.Specimen != fhirmap.SpecimenArterial:
			refuse(string(bg.Specimen)+"-specimen", "dead space needs arterial blood", bgIn)
			continue
		}
		ve, et := nearest(fhirmap.QMinuteVol, bg), nearest(fhirmap.QPETCO2, bg)
		if ve == nil || et == nil {
			refuse("no-ventilator-data-in-window", "no minute volume or end-tidal CO2 from 30 min before to 10 min after", bgIn)
			continue
		}
		paco2 := physio.MmHg(bg.Value)
		vdvt, err := physio.DeadSpaceFromVCO2(paco2, 210, physio.LPerMin(ve.Value), 37)
		if err != nil {
			return ch, err
		}
		grad, err := physio.EndTidalGradient(paco2, physio.MmHg(et.Value))
		if err != nil {
			return ch, err
		}
		pred, err := physio.PaCO2FromAlveolarVentilation(210, 4.4, 37)
		if err != nil {
			return ch, err
		}
		disc, err := physio.PaCO2Discrepancy(paco2, physio.MmHg(pred.Value), physio.VCO2Measured)
		if err != nil {
			return ch, err
		}
		veIn := fhirmap.Input{Role: "minute-volume", Fact: *ve, Offset: ve.Effective.Sub(bg.Effective)}
		etIn := fhirmap.Input{Role: "end-tidal-co2", Fact: *et, Offset: et.Effective.Sub(bg.Effective)}
		for i, r := range []physio.Result{vdvt, grad, pred, disc} {
			kind := kinds[i]
			dkey := s.Patient + "|" + key + "|" + kind
			d := fhirmap.Derivation{Key: dkey, ID: uuid.NewSHA1(uuid.NameSpaceURL, []byte(dkey)).String(), Kind: kind,
				Patient: s.Patient, Effective: bg.Effective, BloodGas: key, Result: r,
				Inputs: []fhirmap.Input{{Role: "blood-gas", Fact: bg}, veIn, etIn}, Status: fhirmap.StatusFinal, Algorithm: "ventderive-derive/1"}
			d.Digest = auditSHA(fmt.Appendf(nil, "%s|%.4f|%s|%s|%s", dkey, r.Value, bg.Digest, ve.Digest, et.Digest))
			cur, ok := current[dkey]
			if ok && !cur.Refused && cur.Digest == d.Digest {
				continue
			}
			version := 1
			if ok {
				version = cur.Version + 1
				if cur.Version > 0 {
					d.Status = fhirmap.StatusAmended
				}
			}
			emit(&ch, d, version)
		}
	}
	return ch, nil
}

func unitOf(kind string) string {
	switch kind {
	case "deadspace-fraction-vco2":
		return "1"
	}
	return "mm[Hg]"
}

func emit(ch *consumer.Changes, d fhirmap.Derivation, version int) {
	ch.Derivations = append(ch.Derivations, d)
	ch.Versions = append(ch.Versions, version)
	ch.Outbox = append(ch.Outbox, consumer.OutboxMessage{Subject: consumer.DefaultObservationSub,
		MsgID: auditSHA([]byte(d.Key + d.Digest)), Header: map[string]string{consumer.HeaderKind: d.Kind}, Payload: []byte("{}")})
}

// seedAudit records the fixture through the Store with a fixed clock.
func seedAudit(t *testing.T, ctx context.Context, u string) {
	t.Helper()
	pool, err := pgxpool.New(ctx, u)
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	var tick atomic.Int64
	clock := func() time.Time {
		return time.Date(2026, 3, 1, 9, 0, 0, 0, time.UTC).Add(time.Duration(tick.Add(1)) * 7 * time.Minute)
	}
	store := postgres.New(pool, postgres.Options{PatientKey: []byte("audit-test-key"), Now: clock})
	msgs := []auditObs{
		reading(patA, "ve-a1", fhirmap.QMinuteVol, auditT0.Add(-6*time.Minute), 9.5, "L/min"),
		reading(patA, "et-a1", fhirmap.QPETCO2, auditT0.Add(-2*time.Minute), 31, "mm[Hg]"),
		gas(patA, "abg-a1", "1", auditT0, 48, fhirmap.SpecimenArterial, fhirmap.StatusFinal),
		gas(patA, "abg-a1", "2", auditT0, 52, fhirmap.SpecimenArterial, fhirmap.StatusAmended),
		reading(patA, "ve-a2", fhirmap.QMinuteVol, auditT0.Add(4*time.Hour-3*time.Minute), 11, "L/min"),
		reading(patA, "et-a2", fhirmap.QPETCO2, auditT0.Add(4*time.Hour-1*time.Minute), 33, "mm[Hg]"),
		gas(patA, "abg-a2", "1", auditT0.Add(4*time.Hour), 41, fhirmap.SpecimenArterial, fhirmap.StatusFinal),
		gas(patA, "abg-a2", "2", auditT0.Add(4*time.Hour), 41, fhirmap.SpecimenArterial, fhirmap.StatusEnteredInError),
		gas(patB, "vbg-b1", "1", auditT0.Add(time.Hour), 50, fhirmap.SpecimenVenous, fhirmap.StatusFinal),
		gas(patB, "abg-b2", "1", auditT0.Add(26*time.Hour), 44, fhirmap.SpecimenArterial, fhirmap.StatusFinal),
	}
	for i, o := range msgs {
		if _, err := store.Ingest(ctx, o.message(uint64(i+1)), auditPlan); err != nil {
			t.Fatalf("ingest %s v%s: %v", o.id, o.version, err)
		}
	}
	for i, bad := range []string{`{"resourceType":"Observation",`, `{"resourceType":"Patient"}`} {
		msg := consumer.Message{InboxKey: auditSHA([]byte(bad)), Subject: "fhir.input.lab", StreamSeq: uint64(100 + i), Raw: []byte(bad)}
		if err := store.DeadLetter(ctx, msg, []string{"invalid-json", "wrong-resource-type"}[i], []string{"offset 30", "resourceType"}[i]); err != nil {
			t.Fatal(err)
		}
	}
}

// reviewerURL makes every session of u act as the reviewer role, whatever
// the server's authentication: the audit must work through the views alone.
func reviewerURL(t *testing.T, u string) string {
	t.Helper()
	p, err := url.Parse(u)
	if err != nil {
		t.Fatalf("test database URL must be a URL: %v", err)
	}
	q := p.Query()
	q.Set("options", "-crole=ventderive_reviewer")
	p.RawQuery = q.Encode()
	return p.String()
}

func TestAuditGolden(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	u := pgtest.NewDatabase(t)
	rolesSQL, err := os.ReadFile("../../deploy/postgres/roles.sql")
	if err != nil {
		t.Fatal(err)
	}
	pgtest.ApplyRoles(t, u, string(rolesSQL))
	seedAudit(t, ctx, u)
	ru := reviewerURL(t, u)

	key := patA + "|Observation/abg-a1|deadspace-fraction-vco2"
	obsID := uuid.NewSHA1(uuid.NameSpaceURL, []byte(patA+"|Observation/abg-a2|paco2-petco2-gradient")).String()
	questions := []struct {
		name string
		args []string
	}{
		{"show-key", []string{"show", key}},
		{"show-retracted-by-id", []string{"show", obsID}},
		{"list", []string{"list"}},
		{"list-patient-kind", []string{"list", "--patient", patA, "--kind", "paco2-predicted"}},
		{"list-from-to", []string{"list", "--from", "2026-03-01T10:00:00Z", "--to", "2026-03-02"}},
		{"refusals", []string{"refusals"}},
		{"refusals-patient", []string{"refusals", "--patient", patB}},
		{"discrepancies", []string{"discrepancies", "--threshold", "5"}},
		{"discrepancies-high-threshold", []string{"discrepancies", "--threshold", "50"}},
		{"changes", []string{"changes"}},
		{"daily", []string{"daily"}},
		{"deadletters", []string{"deadletters"}},
	}
	for _, q := range questions {
		for _, format := range []string{"table", "json", "csv"} {
			name := q.name + "." + format
			t.Run(name, func(t *testing.T) {
				var stdout, stderr bytes.Buffer
				args := append(append([]string{"audit"}, q.args...), "--format", format)
				e := env{getenv: func(k string) string {
					if k == "DATABASE_URL" {
						return ru
					}
					return ""
				}, stdout: &stdout, stderr: &stderr}
				if err := run(ctx, args, e); err != nil {
					t.Fatalf("ventderive %s: %v\n%s", strings.Join(args, " "), err, stderr.String())
				}
				checkAuditGolden(t, name, stdout.Bytes())
			})
		}
	}
}

func checkAuditGolden(t *testing.T, name string, got []byte) {
	t.Helper()
	path := filepath.Join("testdata", "audit", name)
	if updateGoldens() {
		if err := os.MkdirAll(filepath.Dir(path), 0o755); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, got, 0o644); err != nil {
			t.Fatal(err)
		}
		return
	}
	want, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("read golden (run with -update to create): %v", err)
	}
	if !bytes.Equal(got, want) {
		t.Errorf("output differs from %s (run with -update and review the diff):\n--- got\n%s\n--- want\n%s", path, got, want)
	}
}

func TestAuditUsage(t *testing.T) {
	tests := []struct {
		name string
		args []string
		says string // in the message, when set
	}{
		{"no question", []string{"audit"}, ""},
		{"unknown question without a database", []string{"audit", "frobnicate"}, "unknown question"},
		{"unknown question", []string{"audit", "frobnicate", "--database-url", "postgres://x@127.0.0.1:1/x"}, ""},
		{"show without id", []string{"audit", "show", "--database-url", "postgres://x@127.0.0.1:1/x"}, ""},
		{"bad format", []string{"audit", "list", "--format", "xml", "--database-url", "postgres://x@127.0.0.1:1/x"}, ""},
		{"bad time", []string{"audit", "list", "--from", "yesterday", "--database-url", "postgres://x@127.0.0.1:1/x"}, ""},
		{"no database", []string{"audit", "list"}, ""},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var out bytes.Buffer
			err := run(context.Background(), tc.args, env{getenv: func(string) string { return "" }, stdout: &out, stderr: &out})
			if err != errUsage {
				t.Errorf("err = %v, want usage error", err)
			}
			if !strings.Contains(out.String(), tc.says) {
				t.Errorf("message %q does not say %q", out.String(), tc.says)
			}
		})
	}
}

func TestMigrateCommand(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	u := pgtest.NewEmptyDatabase(t)
	for range 2 {
		var stdout, stderr bytes.Buffer
		e := env{getenv: func(k string) string {
			if k == "DATABASE_URL" {
				return u
			}
			return ""
		}, stdout: &stdout, stderr: &stderr}
		if err := run(ctx, []string{"migrate"}, e); err != nil {
			t.Fatalf("migrate: %v\n%s", err, stderr.String())
		}
		want := fmt.Sprintf("schema version %d (this binary knows %d)\n", migrations.Latest(), migrations.Latest())
		if stdout.String() != want {
			t.Errorf("migrate printed %q, want %q", stdout.String(), want)
		}
	}
	conn, err := pgx.Connect(ctx, u)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	var n int
	if err := conn.QueryRow(ctx, "SELECT count(*) FROM schema_version").Scan(&n); err != nil || n != migrations.Latest() {
		t.Errorf("schema_version rows = %d, %v; want %d", n, err, migrations.Latest())
	}
}
