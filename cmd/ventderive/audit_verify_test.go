package main

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"slices"
	"strconv"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
)

// Invented ward data: Larkspur General Hospital, ICU 3 West, bed 5.
var patC = "Patient/lg-icu-0005"

// deviceReading is an invented ventilator or monitor Observation with the
// detail the service's code table gives it (expired, total...).
func deviceReading(patient, id string, q fhirmap.Quantity, at time.Time, v float64, unit, detail string, seq uint64) (consumer.Message, fhirmap.Fact) {
	return observationVersion(patient, id, "1", fhirmap.StatusFinal, q, at, v, unit, detail, seq)
}

// observationVersion is deviceReading with a version id and status.
func observationVersion(patient, id, version string, st fhirmap.Status, q fhirmap.Quantity, at time.Time, v float64, unit, detail string, seq uint64) (consumer.Message, fhirmap.Fact) {
	raw := fmt.Appendf(nil, `{"resourceType":"Observation","id":%q,"meta":{"versionId":%q},"status":%q,"subject":{"reference":%q},"effectiveDateTime":%q,"valueQuantity":{"value":%s,"unit":%q}}`,
		id, version, st, patient, at.Format(time.RFC3339), strconv.FormatFloat(v, 'f', -1, 64), unit)
	ref := "Observation/" + id
	r := fhirmap.Resource{Type: "Observation", Reference: ref, VersionID: version, Patient: patient, Digest: auditSHA(raw), Raw: raw}
	f := fhirmap.Fact{Key: ref, Resource: ref, VersionID: version, Digest: r.Digest, Patient: patient, Quantity: q,
		Origin: fhirmap.OriginMeasured, Detail: detail, Value: v, Unit: unit, SourceValue: v, SourceUnit: unit,
		Code: fhirmap.Coding{System: "http://loinc.org", Code: "x"}, Status: st, Effective: at}
	if q == fhirmap.QPCO2 {
		f.Origin, f.Specimen = "", fhirmap.SpecimenArterial
	}
	return consumer.Message{InboxKey: auditSHA(raw), Subject: "fhir.input.device", StreamSeq: seq, Received: at.Add(5 * time.Minute),
		Raw: raw, Resources: []fhirmap.Resource{r}, Facts: []fhirmap.Fact{f},
		Window: site0().Window, Horizon: 14 * 24 * time.Hour}, f
}

// site0 is the site the verify fixture is recorded under: apparatus dead
// space 50 mL and a site target PaCO2 of 45 mmHg, the "modified setting"
// that the replay below undoes.
func site0() fhirmap.Site {
	s := fhirmap.DefaultSite()
	s.ApparatusDeadSpaceML, s.ApparatusDeadSpaceConfigured = 50, true
	s.TargetPaCO2mmHg = 45
	return s
}

// seedVerify records, through the service's planner, a patient with sex,
// birth date, height and weight, two arterial blood gases with a full set
// of ventilator readings, and a third without any reading in its window.
// It returns every fact sent.
func seedVerify(t *testing.T, ctx context.Context, u string) []fhirmap.Fact {
	t.Helper()
	pool, err := pgxpool.New(ctx, u)
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	var tick atomic.Int64
	clock := func() time.Time {
		return time.Date(2026, 3, 1, 9, 0, 0, 0, time.UTC).Add(time.Duration(tick.Add(1)) * 3 * time.Minute)
	}
	store := postgres.New(pool, postgres.Options{PatientKey: []byte("audit-test-key"), Now: clock})
	pl := consumer.Planner{Site: site0(), ObservationSub: consumer.DefaultObservationSub, ProvenanceSub: consumer.DefaultProvenanceSub}
	plan := func(s consumer.Snapshot) (consumer.Changes, error) { return pl.Plan(s, auditT0.Add(12*time.Hour)) }

	pm := patientMessage(patC, "male", "1958-09-30", 1)
	facts := append([]fhirmap.Fact(nil), pm.Facts...)
	msgs := []consumer.Message{pm}
	add := func(id string, q fhirmap.Quantity, at time.Time, v float64, unit, detail string) {
		m, f := deviceReading(patC, id, q, at, v, unit, detail, uint64(len(msgs)+1))
		msgs, facts = append(msgs, m), append(facts, f)
	}
	add("height-c", fhirmap.QHeight, auditT0.Add(-48*time.Hour), 178, "cm", "")
	add("weight-c", fhirmap.QWeight, auditT0.Add(-48*time.Hour), 82, "kg", "")
	for i, g := range []struct {
		at              time.Duration
		paco2, ve, vco2 float64
	}{{0, 47, 8.4, 230}, {4 * time.Hour, 43, 9.6, 215}} {
		at := auditT0.Add(g.at)
		n := strconv.Itoa(i + 1)
		add("ve-c"+n, fhirmap.QMinuteVol, at.Add(-4*time.Minute), g.ve, "L/min", "expired")
		add("vt-c"+n, fhirmap.QTidalVol, at.Add(-4*time.Minute), 470, "mL", "expired")
		add("rr-c"+n, fhirmap.QRespRate, at.Add(-4*time.Minute), 18, "/min", "total")
		add("vco2-c"+n, fhirmap.QVCO2, at.Add(-3*time.Minute), g.vco2, "mL/min", "")
		add("et-c"+n, fhirmap.QPETCO2, at.Add(-2*time.Minute), 36, "mm[Hg]", "")
		add("abg-c"+n, fhirmap.QPCO2, at, g.paco2, "mm[Hg]", "")
	}
	// The third blood gas: its nearest reading is 2 h before it.
	add("abg-c3", fhirmap.QPCO2, auditT0.Add(6*time.Hour), 51, "mm[Hg]", "")
	// The laboratory amends the second blood gas: its values get version 2,
	// status amended (verify re-derives them from the amended PaCO2).
	m, f := observationVersion(patC, "abg-c2", "2", fhirmap.StatusAmended, fhirmap.QPCO2, auditT0.Add(4*time.Hour), 44.5, "mm[Hg]", "", uint64(len(msgs)+1))
	msgs, facts = append(msgs, m), append(facts, f)
	for _, m := range msgs {
		if _, err := store.Ingest(ctx, m, plan); err != nil {
			t.Fatalf("ingest %d: %v", m.StreamSeq, err)
		}
	}
	return facts
}

// TestAuditVerifyReplay records a store under site0 with the real
// planner, then: verify reports every value reproduced; replay with the
// target changed back to 40 mmHg reports exactly the values a derivation
// under each site gives differently (and only the for-target advice, the
// only kinds the target enters); replay writes nothing; and the golden
// outputs of settings, verify and replay in every format.
func TestAuditVerifyReplay(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	u := pgtest.NewDatabase(t)
	rolesSQL, err := os.ReadFile("../../deploy/postgres/roles.sql")
	if err != nil {
		t.Fatal(err)
	}
	pgtest.ApplyRoles(t, u, string(rolesSQL))
	facts := seedVerify(t, ctx, u)
	ru := reviewerURL(t, u)
	pool, err := pgxpool.New(ctx, ru)
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	r := postgres.NewReviewer(pool)

	page, err := r.Verify(ctx, postgres.Filter{})
	if err != nil {
		t.Fatal(err)
	}
	sum := postgres.Summarise(page.Rows)
	// abg-c3 has no ventilator reading in its window: its kinds that need
	// one are refused, and those refusals reproduce too.
	if sum.Versions < 10 || sum.Refusals < 5 || sum.Reproduced != sum.Versions+sum.Refusals {
		t.Fatalf("verify: %s; want every version and refusal reproduced: %+v", sum, page.Rows)
	}
	for _, v := range page.Rows {
		if v.Status == postgres.StatusRefused && v.BloodGas == "Observation/abg-c3" && v.Kind == fhirmap.KindPredictedPaCO2 &&
			(v.RederivedReason != fhirmap.ReasonNoVentilatorData || v.RederivedDetail != v.Detail || !strings.Contains(v.Detail, "the nearest is")) {
			t.Errorf("abg-c3 predicted PaCO2 refusal: stored %s %q, re-derived %s %q; want the same, naming the nearest reading",
				v.Reason, v.Detail, v.RederivedReason, v.RederivedDetail)
		}
	}

	// What each site gives, derived directly from the facts sent.
	newSite := site0()
	newSite.TargetPaCO2mmHg = 40
	published := func(site fhirmap.Site) map[string]string {
		out := map[string]string{}
		ds, rs := fhirmap.DeriveAll(facts, site)
		for _, d := range ds {
			out[d.Key] = fhirmap.FormatValue(d.Kind, d.Result.Value)
		}
		for _, x := range rs {
			out[x.Key] = "refused " + x.Reason
		}
		return out
	}
	before, after := published(site0()), published(newSite)
	var want []string
	for k, v := range after {
		if before[k] != v {
			want = append(want, k)
		}
	}
	slices.Sort(want)
	counts := func() string {
		admin, err := pgxpool.New(ctx, u)
		if err != nil {
			t.Fatal(err)
		}
		defer admin.Close()
		var s string
		if err := admin.QueryRow(ctx, `SELECT (SELECT count(*) FROM derivation) || '/' || (SELECT count(*) FROM refusal) || '/' ||
			(SELECT count(*) FROM outbox) || '/' || (SELECT count(*) FROM site_settings) || '/' || (SELECT count(*) FROM head)`).Scan(&s); err != nil {
			t.Fatal(err)
		}
		return s
	}
	rowsBefore := counts()
	rep, err := r.Replay(ctx, postgres.Filter{From: auditT0.Add(-time.Hour), To: auditT0.Add(7 * time.Hour)}, newSite)
	if err != nil {
		t.Fatal(err)
	}
	var got []string
	for _, c := range rep.Changes.Rows {
		got = append(got, c.Key)
		if c.Kind != fhirmap.KindRateForTarget && c.Kind != fhirmap.KindTidalVolumeForTarget {
			t.Errorf("replay changed %s (%s -> %s); the target enters only the for-target advice", c.Key, c.From, c.To)
		}
		if c.Change != postgres.ReplayValueChanged || c.Delta == nil {
			t.Errorf("%s: change %s, want a changed value with its difference", c.Key, c.Change)
		}
	}
	slices.Sort(got)
	if len(want) == 0 || !slices.Equal(got, want) {
		t.Errorf("replay changed %q, want exactly %q", got, want)
	}
	if rep.BloodGases != 3 {
		t.Errorf("replay recomputed %d blood gases, want 3", rep.BloodGases)
	}
	if c := counts(); c != rowsBefore {
		t.Errorf("rows derivation/refusal/outbox/settings/head %s after replay, %s before: replay wrote", c, rowsBefore)
	}

	key := patC + "|Observation/abg-c1|" + fhirmap.KindPredictedPaCO2
	snap, err := consumer.Settings{Algorithm: fhirmap.Algorithm, Site: site0()}.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	snapDigest := snap.Digest
	questions := []goldenQuestion{
		{"settings-latest", []string{"settings"}},
		{"settings-by-digest", []string{"settings", snapDigest}},
		{"verify", []string{"verify"}},
		{"verify-key", []string{"verify", key}},
		{"verify-page", []string{"verify", "--kind", fhirmap.KindPredictedPaCO2, "--limit", "1"}},
		{"show-steps-settings", []string{"show", key}},
		{"refused-nearest", []string{"refused", "--patient", patC, "--kind", fhirmap.KindPredictedPaCO2}},
		{"replay-target-40", []string{"replay", "--algorithm", "current", "--from", "2026-03-01T07:00:00Z", "--to", "2026-03-01T15:00:00Z", "--site", `{"TargetPaCO2mmHg":40}`}},
		{"replay-page", []string{"replay", "--algorithm", "current", "--from", "2026-03-01", "--to", "2026-03-02", "--site", `{"TargetPaCO2mmHg":40}`, "--limit", "1", "--offset", "1"}},
		{"replay-unchanged", []string{"replay", "--algorithm", "current", "--from", "2026-03-01", "--to", "2026-03-02", "--kind", fhirmap.KindPredictedPaCO2}},
	}
	runAuditGoldens(ctx, t, ru, "verify/", questions)

	// Refusals that become values and the reverse: without an apparatus
	// dead space the predicted PaCO2 and its discrepancy are refused (never
	// computed with an assumed zero); a pairing window of 3 h before the
	// blood gas reaches abg-c3's readings 2 h 02 min before it.
	other := site0()
	other.ApparatusDeadSpaceConfigured, other.ApparatusDeadSpaceML = false, 0
	other.Window.Before = 3 * time.Hour
	rep, err = r.Replay(ctx, postgres.Filter{From: auditT0.Add(-time.Hour), To: auditT0.Add(7 * time.Hour), Limit: 1000}, other)
	if err != nil {
		t.Fatal(err)
	}
	toRefusal, toValue := map[string]bool{}, map[string]bool{}
	for _, c := range rep.Changes.Rows {
		switch c.Change {
		case postgres.ReplayValueToRefusal:
			toRefusal[c.Key] = true
			if c.To != "refused: "+fhirmap.ReasonApparatusNotSet {
				t.Errorf("%s: %s -> %s, want refused for want of the apparatus dead space", c.Key, c.From, c.To)
			}
		case postgres.ReplayRefusalToValue:
			toValue[c.Key] = true
			if c.BloodGas != "Observation/abg-c3" || c.From != "refused: "+fhirmap.ReasonNoVentilatorData {
				t.Errorf("%s: %s -> %s, want abg-c3's refusal for want of ventilator data become a value", c.Key, c.From, c.To)
			}
		}
	}
	for _, bg := range []string{"abg-c1", "abg-c2"} {
		for _, kind := range []string{fhirmap.KindPredictedPaCO2, fhirmap.KindPaCO2Discrepancy} {
			if k := patC + "|Observation/" + bg + "|" + kind; !toRefusal[k] {
				t.Errorf("replay without an apparatus dead space: %s not reported as a value that becomes a refusal", k)
			}
		}
	}
	if len(toValue) == 0 || len(toRefusal) != 4 {
		t.Errorf("replay: %d refusals become values (want some, abg-c3's), %d values become refusals (want 4)", len(toValue), len(toRefusal))
	}

	// Tampering, as the superuser of this throwaway database: a stored
	// input altered is a mismatch naming both values, and the command
	// fails; a version whose settings link is removed is not verifiable.
	admin, err := pgxpool.New(ctx, u)
	if err != nil {
		t.Fatal(err)
	}
	defer admin.Close()
	if _, err := admin.Exec(ctx, `UPDATE fact_row SET value = 420 WHERE key = 'Observation/vt-c1'`); err != nil {
		t.Fatal(err)
	}
	if _, err := admin.Exec(ctx, `UPDATE derivation SET settings_digest = NULL WHERE key = $1`, patC+"|Observation/abg-c2|"+fhirmap.KindPredictedPaCO2); err != nil {
		t.Fatal(err)
	}
	var stdout, stderr bytes.Buffer
	e := env{getenv: func(k string) string {
		if k == "DATABASE_URL" {
			return ru
		}
		return ""
	}, stdout: &stdout, stderr: &stderr}
	err = run(ctx, []string{"audit", "verify", "--kind", fhirmap.KindPredictedPaCO2}, e)
	if err == nil || !strings.Contains(err.Error(), "1 mismatch") {
		t.Errorf("verify after altering a stored tidal volume: err = %v, want 1 mismatch", err)
	}
	out := stdout.String()
	if !strings.Contains(out, "mismatch") || !strings.Contains(out, "value: published 31.5 mmHg, re-derived ") {
		t.Errorf("verify output does not report the mismatch with both values:\n%s", out)
	}
	if !strings.Contains(out, "not verifiable with this build: no settings snapshot was recorded") {
		t.Errorf("verify output does not report the version without settings as not verifiable:\n%s", out)
	}

	// Refusals: a PaCO2 of 400 mmHg stored for abg-c3 (outside physio's
	// plausible range) turns its refusals for want of ventilator data into
	// mismatches naming both reasons; a refusal without its settings link,
	// or linked to a snapshot of another algorithm, is not verifiable.
	if _, err := admin.Exec(ctx, `UPDATE fact_row SET value = 400 WHERE key = 'Observation/abg-c3'`); err != nil {
		t.Fatal(err)
	}
	discrepancy := patC + "|Observation/abg-c3|" + fhirmap.KindPaCO2Discrepancy
	if _, err := admin.Exec(ctx, `UPDATE refusal SET settings_digest = NULL WHERE key = $1`, discrepancy); err != nil {
		t.Fatal(err)
	}
	var snapshot, inbox string
	if err := admin.QueryRow(ctx, `SELECT snapshot, encode(inbox_key, 'hex') FROM site_settings WHERE digest = $1`, snapDigest).Scan(&snapshot, &inbox); err != nil {
		t.Fatal(err)
	}
	older := strings.Replace(snapshot, `"algorithm":"`+fhirmap.Algorithm+`"`, `"algorithm":"ventderive-derive/0"`, 1)
	if older == snapshot {
		t.Fatalf("the snapshot does not name its algorithm as expected: %s", snapshot)
	}
	if _, err := admin.Exec(ctx, `INSERT INTO site_settings (digest, snapshot, algorithm, alias_digest, inbox_key, created_at)
		VALUES ($1, $2, 'ventderive-derive/0', '', decode($3, 'hex'), now())`, auditSHA([]byte(older)), older, inbox); err != nil {
		t.Fatal(err)
	}
	ratio := patC + "|Observation/abg-c3|" + fhirmap.KindVentilatoryRatio
	if tag, err := admin.Exec(ctx, `UPDATE refusal SET settings_digest = $1 WHERE key = $2`, auditSHA([]byte(older)), ratio); err != nil || tag.RowsAffected() == 0 {
		t.Fatalf("link %s to the older snapshot: %v", ratio, err)
	}
	for _, format := range []string{"table", "json", "csv"} {
		stdout.Reset()
		err = run(ctx, []string{"audit", "verify", "--patient", patC, "--from", "2026-03-01T13:30:00Z", "--to", "2026-03-01T14:30:00Z", "--format", format}, e)
		if err == nil || !strings.Contains(err.Error(), "10 mismatch") {
			t.Errorf("verify --format %s after altering abg-c3: err = %v, want 10 mismatches (its refusals but the two not verifiable)", format, err)
		}
		checkAuditGolden(t, "verify/verify-refusals-altered."+format, stdout.Bytes())
	}
	vs, err := r.VerifyKey(ctx, patC+"|Observation/abg-c3|"+fhirmap.KindPredictedPaCO2)
	if err != nil {
		t.Fatal(err)
	}
	wantFinding := "reason: stored " + fhirmap.ReasonNoVentilatorData + ", re-derived " + fhirmap.ReasonImplausible
	if len(vs) != 1 || vs[0].Outcome != postgres.OutcomeMismatch || !slices.Contains(vs[0].Findings, wantFinding) {
		t.Errorf("verify of abg-c3's predicted PaCO2 refusal after the alteration: %+v; want a mismatch with %q", vs, wantFinding)
	}
	for key, why := range map[string]string{
		discrepancy: "no settings snapshot was recorded with this refusal",
		ratio:       "made under algorithm ventderive-derive/0, this build runs " + fhirmap.Algorithm,
	} {
		vs, err := r.VerifyKey(ctx, key)
		if err != nil {
			t.Fatal(err)
		}
		if len(vs) != 1 || vs[0].Outcome != postgres.OutcomeNotVerifiable || !strings.Contains(vs[0].Why, why) {
			t.Errorf("verify of %s: %+v; want not verifiable: %q", key, vs, why)
		}
	}
}

// TestLoadCodesDigest checks that the alias digest a settings snapshot
// records is the SHA-256 of the alias file's bytes (FIPS 180-4, here as
// computed by Go's crypto/sha256 through auditSHA), "" without a file.
func TestLoadCodesDigest(t *testing.T) {
	path := "testdata/derive/hv-aliases.jsonl"
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	codes, digest, err := loadCodes(path)
	if err != nil {
		t.Fatal(err)
	}
	if digest != auditSHA(b) || codes.Len() <= fhirmap.DefaultCodes().Len() {
		t.Errorf("loadCodes(%s) = %d codes, digest %s; want more than the %d standard codes and %s", path, codes.Len(), digest, fhirmap.DefaultCodes().Len(), auditSHA(b))
	}
	if _, digest, err := loadCodes(""); err != nil || digest != "" {
		t.Errorf(`loadCodes("") digest %q, %v; want ""`, digest, err)
	}
}
