package main

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
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
	sentValue   float64 // as sent, when sent in another unit
	sentUnit    string
}

func (o auditObs) message(seq uint64) consumer.Message {
	sentValue, sentUnit := o.value, o.unit
	if o.sentUnit != "" {
		sentValue, sentUnit = o.sentValue, o.sentUnit
	}
	raw := fmt.Appendf(nil, `{"resourceType":"Observation","id":%q,"meta":{"versionId":%q},"status":%q,"subject":{"reference":%q},"effectiveDateTime":%q,"valueQuantity":{"value":%s,"unit":%q}}`,
		o.id, o.version, o.status, o.patient, o.at.Format(time.RFC3339), strconv.FormatFloat(sentValue, 'f', -1, 64), sentUnit)
	ref := "Observation/" + o.id
	r := fhirmap.Resource{Type: "Observation", Reference: ref, VersionID: o.version, Patient: o.patient, Digest: auditSHA(raw), Raw: raw}
	origin := fhirmap.OriginMeasured
	if o.specimen != "" {
		origin = ""
	}
	f := fhirmap.Fact{Key: ref, Resource: ref, VersionID: o.version, Digest: r.Digest, Patient: o.patient,
		Quantity: o.q, Origin: origin, Specimen: o.specimen, Value: o.value, Unit: o.unit, SourceValue: sentValue,
		SourceUnit: sentUnit, Code: fhirmap.Coding{System: "http://loinc.org", Code: "2019-8"}, Status: o.status, Effective: o.at}
	return consumer.Message{InboxKey: auditSHA(raw), Subject: "fhir.input.lab", StreamSeq: seq, Received: o.at.Add(10 * time.Minute),
		Raw: raw, Resources: []fhirmap.Resource{r}, Facts: []fhirmap.Fact{f},
		Window: fhirmap.Window{Before: 30 * time.Minute, After: 10 * time.Minute}, Horizon: 14 * 24 * time.Hour}
}

// patientMessage is a Patient resource with sex and birth date: two
// patient-level facts, which have no time of their own.
func patientMessage(patient, sex, birthDate string, seq uint64) consumer.Message {
	id := strings.TrimPrefix(patient, "Patient/")
	raw := fmt.Appendf(nil, `{"resourceType":"Patient","id":%q,"gender":%q,"birthDate":%q}`, id, sex, birthDate)
	r := fhirmap.Resource{Type: "Patient", Reference: patient, Patient: patient, Digest: auditSHA(raw), Raw: raw}
	base := fhirmap.Fact{Resource: patient, Patient: patient, Digest: r.Digest, Status: fhirmap.StatusFinal}
	sf, bf := base, base
	sf.Key, sf.Quantity, sf.Text, sf.Code = patient+"#sex", fhirmap.QSex, sex, fhirmap.Coding{Code: fhirmap.PatientGender, Display: "administrative gender"}
	bf.Key, bf.Quantity, bf.Text, bf.Code = patient+"#birth-date", fhirmap.QBirthDate, birthDate, fhirmap.Coding{Code: fhirmap.PatientBirthday, Display: "birth date"}
	return consumer.Message{InboxKey: auditSHA(raw), Subject: "fhir.input.adt", StreamSeq: seq, Received: auditT0.Add(-time.Hour),
		Raw: raw, Resources: []fhirmap.Resource{r}, Facts: []fhirmap.Fact{sf, bf},
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
		// The predicted PaCO2 also lists the patient-level facts, as the
		// real planner does for a predicted body weight.
		var patientIns []fhirmap.Input
		for _, x := range s.Facts {
			if x.Quantity == fhirmap.QSex || x.Quantity == fhirmap.QBirthDate {
				patientIns = append(patientIns, fhirmap.Input{Role: fhirmap.Role(x.Quantity), Fact: x, Offset: x.Effective.Sub(bg.Effective)})
			}
		}
		for i, r := range []physio.Result{vdvt, grad, pred, disc} {
			kind := kinds[i]
			dkey := s.Patient + "|" + key + "|" + kind
			ins := []fhirmap.Input{{Role: "blood-gas", Fact: bg}, veIn, etIn}
			if kind == "paco2-predicted" {
				ins = append(ins, patientIns...)
			}
			d := fhirmap.Derivation{Key: dkey, ID: uuid.NewSHA1(uuid.NameSpaceURL, []byte(dkey)).String(), Kind: kind,
				Patient: s.Patient, Effective: bg.Effective, BloodGas: key, Result: r,
				Inputs: ins, Status: fhirmap.StatusFinal, Algorithm: "ventderive-derive/1"}
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

// emit records a version with its Observation and Provenance encoded as
// the service encodes them, under the service's message ids, so that the
// published bytes the audit shows are real ones.
func emit(ch *consumer.Changes, d fhirmap.Derivation, version int) {
	ch.Derivations = append(ch.Derivations, d)
	ch.Versions = append(ch.Versions, version)
	obs, err := fhirmap.EncodeObservation(d, version, fhirmap.Site{})
	if err != nil {
		panic(fmt.Sprintf("encode observation %s: %v", d.Kind, err))
	}
	prov, err := fhirmap.EncodeProvenance(d, version, auditT0.Add(2*time.Hour), fhirmap.Site{})
	if err != nil {
		panic(fmt.Sprintf("encode provenance %s: %v", d.Kind, err))
	}
	id := fmt.Sprintf("%s/_history/%d", d.ID, version)
	header := map[string]string{consumer.HeaderKind: d.Kind}
	ch.Outbox = append(ch.Outbox,
		consumer.OutboxMessage{Subject: consumer.DefaultObservationSub, MsgID: "Observation/" + id, Header: header, Payload: obs},
		consumer.OutboxMessage{Subject: consumer.DefaultObservationSub, MsgID: "Provenance/" + id, Header: header, Payload: prov})
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
	if _, err := store.Ingest(ctx, patientMessage(patA, "female", "1961-04-12", 1000), auditPlan); err != nil {
		t.Fatalf("ingest patient: %v", err)
	}
	// abg-b2 was sent in kPa: 5.9 kPa is 44.25 mm[Hg] (7.500638 mm[Hg]/kPa, UCUM).
	kpaGas := gas(patB, "abg-b2", "1", auditT0.Add(26*time.Hour), 5.9*7.500638, fhirmap.SpecimenArterial, fhirmap.StatusFinal)
	kpaGas.sentValue, kpaGas.sentUnit = 5.9, "kPa"
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
		// Outside abg-b2's window (30 min before to 10 min after): the
		// nearest reading of its refusal, 50 min before.
		reading(patB, "ve-b0", fhirmap.QMinuteVol, auditT0.Add(26*time.Hour-50*time.Minute), 8.25, "L/min"),
		reading(patB, "et-b0", fhirmap.QPETCO2, auditT0.Add(26*time.Hour+55*time.Minute), 36, "mm[Hg]"),
		kpaGas,
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
	questions := []goldenQuestion{
		{"show-key", []string{"show", key}},
		{"show-retracted-by-id", []string{"show", obsID}},
		{"show-patient-level-inputs", []string{"show", patA + "|Observation/abg-a1|paco2-predicted"}},
		{"show-refused-kpa-input", []string{"show", patB + "|Observation/abg-b2|paco2-petco2-gradient"}},
		{"published-bytes", []string{"published", patA + "|Observation/abg-a1|paco2-petco2-gradient", "--version-id", "1"}},
		{"list-page-1", []string{"list", "--limit", "6"}},
		{"list-page-2", []string{"list", "--limit", "6", "--offset", "6"}},
		{"list-page-last", []string{"list", "--limit", "6", "--offset", "12"}},
		{"list-page-beyond-end", []string{"list", "--limit", "6", "--offset", "18"}},
		{"list", []string{"list"}},
		{"list-patient-kind", []string{"list", "--patient", patA, "--kind", "paco2-predicted"}},
		{"list-from-to", []string{"list", "--from", "2026-03-01T10:00:00Z", "--to", "2026-03-02"}},
		{"refusals", []string{"refusals"}},
		{"refusals-patient", []string{"refusals", "--patient", patB}},
		{"refused", []string{"refused"}},
		{"refused-reason-kind", []string{"refused", "--reason", "no-ventilator-data-in-window", "--kind", "paco2-predicted"}},
		{"refused-patient-period-page", []string{"refused", "--patient", patA, "--from", "2026-03-01T11:00:00Z", "--to", "2026-03-01T13:00:00Z", "--limit", "2", "--offset", "1"}},
		{"refusals-reason-page", []string{"refusals", "--reason", "no-ventilator-data-in-window", "--limit", "2"}},
		{"discrepancies-page", []string{"discrepancies", "--threshold", "0", "--limit", "1"}},
		{"discrepancies", []string{"discrepancies", "--threshold", "5"}},
		{"discrepancies-high-threshold", []string{"discrepancies", "--threshold", "50"}},
		{"changes", []string{"changes"}},
		{"changes-page", []string{"changes", "--limit", "3", "--offset", "3"}},
		{"daily", []string{"daily"}},
		{"daily-page", []string{"daily", "--limit", "1"}},
		{"deadletters", []string{"deadletters"}},
		{"deadletters-page", []string{"deadletters", "--limit", "1", "--offset", "1"}},
		// Made by an older algorithm (ventderive-derive/1) without settings
		// snapshots: nothing to re-derive with this build, and it says so.
		{"verify-older-algorithm-page", []string{"verify", "--limit", "5"}},
	}
	runAuditGoldens(ctx, t, ru, "", questions)
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

// TestAuditUsage checks that every malformed argument is refused with a
// message naming it, before connecting: the database URL points at a port
// where nothing listens, so a connection attempt would fail differently.
func TestAuditUsage(t *testing.T) {
	const nowhere = "postgres://x@127.0.0.1:1/x"
	tests := []struct {
		name string
		args []string
		says string
	}{
		{"no question", []string{"audit"}, "usage: ventderive audit"},
		{"unknown question without a database", []string{"audit", "frobnicate"}, `unknown question "frobnicate"`},
		{"unknown question", []string{"audit", "frobnicate", "--database-url", nowhere}, `unknown question "frobnicate"`},
		{"show without id", []string{"audit", "show", "--database-url", nowhere}, "show takes one argument"},
		{"show with two ids", []string{"audit", "show", "a", "b", "--database-url", nowhere}, "show takes one argument"},
		{"show malformed key", []string{"audit", "show", "lg-icu-0003|Observation/abg-a1|paco2-predicted", "--database-url", nowhere}, "not a reference Patient/<id>"},
		{"show key of unknown kind", []string{"audit", "show", "Patient/lg-icu-0003|Observation/abg-a1|paco2-guessed", "--database-url", nowhere}, `kind "paco2-guessed"`},
		{"show neither id nor key", []string{"audit", "show", "abg-a1", "--database-url", nowhere}, `show "abg-a1"`},
		{"list with an argument", []string{"audit", "list", "extra", "--database-url", nowhere}, `list takes no argument, got "extra"`},
		{"bad format", []string{"audit", "list", "--format", "xml", "--database-url", nowhere}, `--format "xml"`},
		{"bad time", []string{"audit", "list", "--from", "yesterday", "--database-url", nowhere}, "--from"},
		{"bad end time", []string{"audit", "list", "--to", "2026-13-01", "--database-url", nowhere}, "--to"},
		{"reversed period", []string{"audit", "list", "--from", "2026-03-02", "--to", "2026-03-01", "--database-url", nowhere}, "--from 2026-03-02 is not before --to 2026-03-01"},
		{"empty period", []string{"audit", "changes", "--from", "2026-03-01", "--to", "2026-03-01T00:00:00Z", "--database-url", nowhere}, "is not before --to"},
		{"unknown kind", []string{"audit", "list", "--kind", "deadspace", "--database-url", nowhere}, `--kind "deadspace"`},
		{"patient without Patient/", []string{"audit", "list", "--patient", "lg-icu-0003", "--database-url", nowhere}, `--patient "lg-icu-0003"`},
		{"patient of another type", []string{"audit", "daily", "--patient", "Encounter/e1", "--database-url", nowhere}, "--patient"},
		{"malformed reason", []string{"audit", "refusals", "--reason", "No Data", "--database-url", nowhere}, `--reason "No Data"`},
		{"zero limit", []string{"audit", "list", "--limit", "0", "--database-url", nowhere}, "--limit 0"},
		{"limit too large", []string{"audit", "list", "--limit", "10001", "--database-url", nowhere}, "--limit 10001"},
		{"negative offset", []string{"audit", "list", "--offset", "-1", "--database-url", nowhere}, "--offset -1"},
		{"negative threshold", []string{"audit", "discrepancies", "--threshold", "-5", "--database-url", nowhere}, "--threshold -5"},
		{"NaN threshold", []string{"audit", "discrepancies", "--threshold", "NaN", "--database-url", nowhere}, "--threshold NaN"},
		{"threshold for list", []string{"audit", "list", "--threshold", "8", "--database-url", nowhere}, "--threshold does not apply to list"},
		{"patient for deadletters", []string{"audit", "deadletters", "--patient", "Patient/lg-icu-0003", "--database-url", nowhere}, "--patient does not apply to deadletters"},
		{"algorithm for refusals", []string{"audit", "refusals", "--algorithm", "ventderive-derive/1", "--database-url", nowhere}, "--algorithm does not apply to refusals"},
		{"paging for show", []string{"audit", "show", "--limit", "5", "Patient/lg-icu-0003|Observation/abg-a1|paco2-predicted", "--database-url", nowhere}, "--limit does not apply to show"},
		{"published without a key", []string{"audit", "published", "--database-url", nowhere}, "published takes one argument"},
		{"published of another type", []string{"audit", "published", "Patient/lg-icu-0003|Observation/abg-a1|paco2-predicted", "--type", "Bundle", "--database-url", nowhere}, `--type "Bundle"`},
		{"published negative version", []string{"audit", "published", "Patient/lg-icu-0003|Observation/abg-a1|paco2-predicted", "--version-id", "-1", "--database-url", nowhere}, "--version-id -1"},
		{"version for list", []string{"audit", "list", "--version-id", "2", "--database-url", nowhere}, "--version-id does not apply to list"},
		{"refused with an algorithm", []string{"audit", "refused", "--algorithm", "ventderive-derive/1", "--database-url", nowhere}, "--algorithm does not apply to refused"},
		{"replay without --algorithm current", []string{"audit", "replay", "--from", "2026-03-01", "--to", "2026-03-02", "--database-url", nowhere}, `--algorithm "": this build replays only under its own algorithm`},
		{"replay under another algorithm", []string{"audit", "replay", "--algorithm", "ventderive-derive/1", "--from", "2026-03-01", "--to", "2026-03-02", "--database-url", nowhere}, "--algorithm current"},
		{"replay without a period", []string{"audit", "replay", "--algorithm", "current", "--database-url", nowhere}, "--from and --to are required"},
		{"replay with an unknown setting", []string{"audit", "replay", "--algorithm", "current", "--from", "2026-03-01", "--to", "2026-03-02", "--site", `{"TargetPaco2":40}`, "--database-url", nowhere}, `"TargetPaco2" is not a site setting`},
		{"replay with settings not JSON", []string{"audit", "replay", "--algorithm", "current", "--from", "2026-03-01", "--to", "2026-03-02", "--site", "target=40", "--database-url", nowhere}, "--site: want a JSON object"},
		{"site for list", []string{"audit", "list", "--site", "{}", "--database-url", nowhere}, "--site does not apply to list"},
		{"verify of one value with a filter", []string{"audit", "verify", "Patient/lg-icu-0003|Observation/abg-a1|paco2-predicted", "--patient", "Patient/lg-icu-0003", "--database-url", nowhere}, "verify of one value takes no --patient"},
		{"verify of a malformed key", []string{"audit", "verify", "abg-a1", "--database-url", nowhere}, `show "abg-a1"`},
		{"verify with an algorithm", []string{"audit", "verify", "--algorithm", "ventderive-derive/2", "--database-url", nowhere}, "--algorithm does not apply to verify"},
		{"settings of a malformed digest", []string{"audit", "settings", "41af6d79", "--database-url", nowhere}, `settings "41af6d79": want a settings digest`},
		{"settings with a filter", []string{"audit", "settings", "--patient", "Patient/lg-icu-0003", "--database-url", nowhere}, "--patient does not apply to settings"},
		{"no database", []string{"audit", "list"}, "no database"},
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

// auditRun runs one audit command against the reviewer URL ru.
func auditRun(t *testing.T, ctx context.Context, ru string, args ...string) string {
	t.Helper()
	var stdout, stderr bytes.Buffer
	e := env{getenv: func(k string) string {
		if k == "DATABASE_URL" {
			return ru
		}
		return ""
	}, stdout: &stdout, stderr: &stderr}
	if err := run(ctx, append([]string{"audit"}, args...), e); err != nil {
		t.Fatalf("ventderive audit %s: %v\n%s", strings.Join(args, " "), err, stderr.String())
	}
	return stdout.String()
}

// TestAuditReportedBugs has one subtest per fault found when the audit was
// tried as a reviewer would, over the fixture as the reviewer role.
func TestAuditReportedBugs(t *testing.T) {
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

	t.Run("values are printed as published, full precision only in JSON and CSV", func(t *testing.T) {
		// The stored dead-space fraction is 48 mm[Hg]-based 0.6025641...;
		// the kind publishes 3 decimals (fhirmap catalogue).
		table := auditRun(t, ctx, ru, "list", "--kind", "deadspace-fraction-vco2", "--patient", patA)
		if !strings.Contains(table, " 0.603 ") || strings.Contains(table, "0.6025641025641026") {
			t.Errorf("table does not show the published 0.603 alone:\n%s", table)
		}
		var page struct {
			Rows []struct {
				Value     *float64 `json:"value"`
				Published string   `json:"published"`
			} `json:"rows"`
		}
		if err := json.Unmarshal([]byte(auditRun(t, ctx, ru, "list", "--kind", "deadspace-fraction-vco2", "--patient", patA, "--format", "json")), &page); err != nil {
			t.Fatal(err)
		}
		if len(page.Rows) == 0 || page.Rows[0].Published != "0.603" || page.Rows[0].Value == nil || *page.Rows[0].Value != 1-0.8630036630036629*210/(9.5*48) {
			t.Errorf("JSON first row = %+v, want published 0.603 beside the full value", page.Rows)
		}
		disc := auditRun(t, ctx, ru, "discrepancies", "--threshold", "0")
		if !strings.Contains(disc, "MEASURED-PREDICTED mmHg") || strings.Contains(disc, "mm[Hg]  ") || !strings.Contains(disc, " 10.8 ") {
			t.Errorf("discrepancies not in mmHg as published:\n%s", disc)
		}
	})

	t.Run("sex and birth date are shown as such, never as sentinels", func(t *testing.T) {
		for _, format := range []string{"table", "csv", "json"} {
			out := auditRun(t, ctx, ru, "show", patA+"|Observation/abg-a1|paco2-predicted", "--format", format)
			for _, bad := range []string{"0001-01-01", "2562047h", "-9223372036854775808", "9223372036854775807"} {
				if strings.Contains(out, bad) {
					t.Errorf("%s shows the sentinel %q", format, bad)
				}
			}
			for _, want := range []string{"female", "1961-04-12"} {
				if !strings.Contains(out, want) {
					t.Errorf("%s does not show %q", format, want)
				}
			}
		}
		var h postgres.History
		if err := json.Unmarshal([]byte(auditRun(t, ctx, ru, "show", patA+"|Observation/abg-a1|paco2-predicted", "--format", "json")), &h); err != nil {
			t.Fatal(err)
		}
		for _, in := range h.Versions[0].Inputs {
			patientLevel := in.Quantity == "sex" || in.Quantity == "birth-date"
			if in.PatientLevel != patientLevel || patientLevel && (in.Value != nil || in.Effective != nil || in.Offset != nil || in.Text == "") {
				t.Errorf("input %s: %+v", in.Role, in)
			}
		}
	})

	t.Run("retractions print no value", func(t *testing.T) {
		key := patA + "|Observation/abg-a2|paco2-petco2-gradient"
		var h postgres.History
		if err := json.Unmarshal([]byte(auditRun(t, ctx, ru, "show", key, "--format", "json")), &h); err != nil {
			t.Fatal(err)
		}
		if len(h.Versions) != 2 || h.Versions[1].Status != "entered-in-error" || h.Versions[1].Value != nil || h.Versions[1].Published != "" {
			t.Fatalf("retraction version = %+v, want no value", h.Versions[len(h.Versions)-1])
		}
		table := auditRun(t, ctx, ru, "show", key)
		v2 := table[strings.Index(table, "\nversion 2"):]
		if !strings.Contains(v2, "value           none") || strings.Contains(v2[:strings.Index(v2, "inputs:")], "8.0") {
			t.Errorf("show prints a value for the retraction:\n%s", v2)
		}
		changes := auditRun(t, ctx, ru, "changes", "--kind", "paco2-petco2-gradient", "--format", "csv")
		for _, line := range strings.Split(changes, "\n") {
			if strings.Contains(line, "entered-in-error") && !strings.Contains(line, ",8.0,8,,,mmHg,") {
				t.Errorf("changes CSV row of a retraction carries a to-value: %s", line)
			}
		}
	})

	t.Run("paging walks every row once and says when more exist", func(t *testing.T) {
		type page struct {
			Rows []struct {
				ID int64 `json:"id"`
			} `json:"rows"`
			More       bool `json:"more"`
			NextOffset int  `json:"nextOffset"`
		}
		var all page
		if err := json.Unmarshal([]byte(auditRun(t, ctx, ru, "list", "--format", "json")), &all); err != nil {
			t.Fatal(err)
		}
		if all.More || len(all.Rows) < 10 {
			t.Fatalf("whole list: %d rows, more=%v", len(all.Rows), all.More)
		}
		var walked []int64
		offset := 0
		for pages := 0; ; pages++ {
			if pages > len(all.Rows) {
				t.Fatal("paging does not end")
			}
			var p page
			if err := json.Unmarshal([]byte(auditRun(t, ctx, ru, "list", "--format", "json", "--limit", "3", "--offset", strconv.Itoa(offset))), &p); err != nil {
				t.Fatal(err)
			}
			for _, r := range p.Rows {
				walked = append(walked, r.ID)
			}
			if !p.More {
				break
			}
			if len(p.Rows) != 3 || p.NextOffset != offset+3 {
				t.Fatalf("page at %d: %d rows, next %d", offset, len(p.Rows), p.NextOffset)
			}
			offset = p.NextOffset
		}
		var want []int64
		for _, r := range all.Rows {
			want = append(want, r.ID)
		}
		if fmt.Sprint(walked) != fmt.Sprint(want) {
			t.Errorf("pages gave %v, the whole list %v", walked, want)
		}
		for _, format := range []string{"table", "csv"} {
			out := auditRun(t, ctx, ru, "list", "--format", format, "--limit", "2")
			if !strings.Contains(out, "more rows") || !strings.Contains(out, "--offset 2") {
				t.Errorf("%s with --limit 2 does not say more rows exist:\n%s", format, out)
			}
			if out := auditRun(t, ctx, ru, "list", "--format", format); strings.Contains(out, "more rows") {
				t.Errorf("%s says more rows on the last page", format)
			}
		}
	})

	t.Run("refusals are listed per blood gas with detail, inputs considered and nearest reading", func(t *testing.T) {
		var page struct {
			Rows []postgres.RefusalRow `json:"rows"`
			More bool                  `json:"more"`
		}
		out := auditRun(t, ctx, ru, "refused", "--patient", patB, "--reason", "no-ventilator-data-in-window", "--format", "json")
		if err := json.Unmarshal([]byte(out), &page); err != nil {
			t.Fatal(err)
		}
		if len(page.Rows) != 4 || page.More {
			t.Fatalf("%d refusals (more %v), want one per kind of abg-b2", len(page.Rows), page.More)
		}
		for _, r := range page.Rows {
			// ve-b0 is 50 min before, et-b0 55 min after: the earlier and
			// nearer wins.
			n := r.Nearest
			if r.BloodGas != "Observation/abg-b2" || r.Detail == "" || len(r.Considered) != 1 ||
				n == nil || n.FactKey != "Observation/ve-b0" || n.Offset != -50*time.Minute || n.Value != 8.25 {
				t.Errorf("refusal %+v, nearest %+v", r.Refusal, n)
			}
		}
		out = auditRun(t, ctx, ru, "refused", "--patient", patB, "--reason", "venous-specimen", "--format", "json")
		page.Rows = nil // a fresh slice: Unmarshal would keep the old rows' pointers
		if err := json.Unmarshal([]byte(out), &page); err != nil {
			t.Fatal(err)
		}
		if len(page.Rows) != 4 || page.Rows[0].Nearest != nil {
			t.Errorf("venous refusals: %d, first nearest %+v; want 4 without a nearest reading", len(page.Rows), page.Rows[0].Nearest)
		}
	})

	t.Run("the exact published bytes are readable with their digest", func(t *testing.T) {
		key := patA + "|Observation/abg-a1|deadspace-fraction-vco2"
		var h postgres.History
		if err := json.Unmarshal([]byte(auditRun(t, ctx, ru, "show", key, "--format", "json")), &h); err != nil {
			t.Fatal(err)
		}
		for _, v := range h.Versions {
			if len(v.Messages) != 2 {
				t.Fatalf("version %d has %d published messages, want Observation and Provenance", v.Version, len(v.Messages))
			}
			for _, m := range v.Messages {
				raw := auditRun(t, ctx, ru, "published", key, "--version-id", strconv.Itoa(v.Version), "--type", m.ResourceType)
				if auditSHA([]byte(raw)) != m.Digest || raw != m.PayloadText || len(raw) != m.SizeBytes {
					t.Errorf("version %d %s: bytes do not match the digest shown", v.Version, m.ResourceType)
				}
				var res struct {
					ResourceType  string `json:"resourceType"`
					ValueQuantity *struct {
						Value json.Number `json:"value"`
					} `json:"valueQuantity"`
				}
				if err := json.Unmarshal([]byte(raw), &res); err != nil || res.ResourceType != m.ResourceType {
					t.Fatalf("version %d %s: %v, resourceType %q", v.Version, m.ResourceType, err, res.ResourceType)
				}
				// The value the audit prints is the value the Observation carries.
				if m.ResourceType == "Observation" && (res.ValueQuantity == nil || res.ValueQuantity.Value.String() != v.Published) {
					t.Errorf("version %d: published %v, audit prints %s", v.Version, res.ValueQuantity, v.Published)
				}
			}
		}
		latest := auditRun(t, ctx, ru, "published", key)
		if latest != h.Versions[len(h.Versions)-1].Messages[0].PayloadText {
			t.Error("published without --version-id is not the latest version's Observation")
		}
	})

	t.Run("daily counts by blood-gas day, as list filters", func(t *testing.T) {
		// abg-b2 was taken on 2 March and recorded on 1 March: it counts on
		// the day of the blood gas, like list --from/--to.
		daily := auditRun(t, ctx, ru, "daily", "--patient", patB, "--format", "csv")
		want := "blood_gas_day,blood_gases,derivations,retractions,refusals\n2026-03-01,1,0,0,4\n2026-03-02,1,0,0,4\n"
		if daily != want {
			t.Errorf("daily = %q, want %q", daily, want)
		}
		if !strings.Contains(auditUsage, "time basis: the blood gas's effective time") || !strings.Contains(auditUsage, "deadletters") {
			t.Error("the help does not name the time basis")
		}
	})
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
	// One row per migration file (versions may have gaps).
	files, err := filepath.Glob("../../migrations/*.sql")
	if err != nil {
		t.Fatal(err)
	}
	var n int
	if err := conn.QueryRow(ctx, "SELECT count(*) FROM schema_version").Scan(&n); err != nil || n != len(files) {
		t.Errorf("schema_version rows = %d, %v; want %d", n, err, len(files))
	}
}

// goldenQuestion is one audit question of a golden test: its name (the
// golden file's stem) and its arguments after "audit".
type goldenQuestion struct {
	name string
	args []string
}

// runAuditGoldens asks every question in every format against the store at
// ru and compares each output with testdata/audit/<prefix><name>.<format>.
func runAuditGoldens(ctx context.Context, t *testing.T, ru, prefix string, questions []goldenQuestion) {
	t.Helper()
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
				checkAuditGolden(t, prefix+name, stdout.Bytes())
			})
		}
	}
}
