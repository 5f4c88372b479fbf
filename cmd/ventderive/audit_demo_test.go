package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"net/url"
	"os"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
)

// publishedObservation holds the elements of a published Observation that
// the store keeps a copy of.
type publishedObservation struct {
	ResourceType string `json:"resourceType"`
	ID           string `json:"id"`
	Meta         struct {
		VersionID string `json:"versionId"`
	} `json:"meta"`
	Status string `json:"status"`
	Code   struct {
		Coding []struct {
			Code string `json:"code"`
		} `json:"coding"`
	} `json:"code"`
	Subject   struct{ Reference string }  `json:"subject"`
	Encounter *struct{ Reference string } `json:"encounter"`
	Effective string                      `json:"effectiveDateTime"`
	Value     *struct {
		Value json.Number `json:"value"`
		Code  string      `json:"code"`
	} `json:"valueQuantity"`
	Interpretation []struct {
		Coding []struct {
			Code string `json:"code"`
		} `json:"coding"`
	} `json:"interpretation"`
	Note []struct {
		Text string `json:"text"`
	} `json:"note"`
	Method      struct{ Text string }        `json:"method"`
	DerivedFrom []struct{ Reference string } `json:"derivedFrom"`
}

type publishedProvenance struct {
	ResourceType string                       `json:"resourceType"`
	Target       []struct{ Reference string } `json:"target"`
}

// TestAuditDemoStoreMatchesPublished runs the demo, then walks every
// derivation version it stored, as the reviewer role, and checks what the
// audit shows against the bytes that were published for it, field by
// field: the value as published, unit, status, kind, patient, encounter,
// blood-gas time, interpretation, method, the stored constants and
// assumptions (each in the published note), the inputs behind derivedFrom,
// and the Provenance's target.
func TestAuditDemoStoreMatchesPublished(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 4*time.Minute)
	defer cancel()
	admin := pgtest.AdminURL(t)
	var stdout, stderr bytes.Buffer
	e := env{getenv: func(k string) string {
		if k == "DATABASE_URL" {
			return admin
		}
		return ""
	}, stdout: &stdout, stderr: &stderr}
	if err := run(ctx, []string{"demo", "--keep", "--speed", "0", "--duration", "6h", "--dir", t.TempDir()}, e); err != nil {
		t.Fatalf("demo: %v\n%s", err, stderr.String())
	}
	m := regexp.MustCompile(`export DATABASE_URL='([^']+)'`).FindStringSubmatch(stdout.String())
	if m == nil {
		t.Fatalf("the demo did not print its database:\n%s", stdout.String())
	}
	demoURL := m[1]
	p, err := url.Parse(demoURL)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { dropDatabase(admin, strings.TrimPrefix(p.Path, "/")) })
	rolesSQL, err := os.ReadFile("../../deploy/postgres/roles.sql")
	if err != nil {
		t.Fatal(err)
	}
	pgtest.ApplyRoles(t, demoURL, string(rolesSQL))
	pool, err := pgxpool.New(ctx, reviewerURL(t, demoURL))
	if err != nil {
		t.Fatal(err)
	}
	defer pool.Close()
	r := postgres.NewReviewer(pool)

	keys := map[string]bool{}
	for offset := 0; ; {
		page, err := r.List(ctx, postgres.Filter{Limit: 500, Offset: offset})
		if err != nil {
			t.Fatal(err)
		}
		for _, v := range page.Rows {
			keys[v.Key] = true
		}
		if !page.More {
			break
		}
		offset = page.NextOffset
	}
	if len(keys) < 50 {
		t.Fatalf("the demo stored %d derivation keys; too few to be the demo", len(keys))
	}
	versions, steps, refusals := 0, 0, 0
	var all []postgres.Version
	settings := map[string]bool{}
	for key := range keys {
		h, err := r.Show(ctx, key)
		if err != nil {
			t.Fatalf("show %s: %v", key, err)
		}
		for _, v := range h.Versions {
			versions++
			checkPublishedVersion(t, v)
			if v.Record != nil {
				steps += len(v.Record.Steps)
			}
			all = append(all, v)
			checkSettings(ctx, t, r, v.Key, v.Settings, v.Algorithm, settings)
		}
		for _, x := range h.Refusals {
			refusals++
			checkSettings(ctx, t, r, x.Key, x.Settings, "", settings)
		}
	}
	if steps == 0 {
		t.Errorf("no stored version has an intermediate step; the demo derives predicted PaCO2 (with its predicted-body-weight step)")
	}
	if len(settings) != 1 {
		t.Errorf("%d settings snapshots referenced, want 1: the demo runs under one set of settings", len(settings))
	}
	checkSettingsPublished(ctx, t, r, all)
	t.Logf("%d keys, %d versions (%d steps), %d refusals checked against their published bytes and settings", len(keys), versions, steps, refusals)

	retainDemoStore(ctx, t, demoURL)
	verifyDemoStore(ctx, t, r, demoURL, versions)
}

// retainDemoStore runs "ventderive retain" over the demo store with a
// horizon that puts every reading past it: the dry run removes nothing and
// reports what --apply then removes; afterwards every input any derivation
// or refusal cites is stored exactly as before (key, digest, value, unit,
// effective time, status), ventilator readings were removed, the payloads
// of messages left without facts are dropped while their inbox rows (the
// duplicate check) stay, and a second run finds nothing. The caller then
// runs audit verify over what is left.
func retainDemoStore(ctx context.Context, t *testing.T, demoURL string) {
	owner, err := pgxpool.New(ctx, demoURL)
	if err != nil {
		t.Fatal(err)
	}
	defer owner.Close()
	cited := func() []string {
		rows, err := owner.Query(ctx, `
SELECT 'd' || i.derivation_id || '/' || i.ordinal || ' ' || f.key || ' ' || f.digest || ' ' || f.value || ' ' || f.unit || ' ' || f.effective || ' ' || f.status
FROM derivation_input i LEFT JOIN fact f ON f.key = i.fact_key AND f.digest = i.fact_digest
UNION ALL
SELECT 'r' || i.refusal_id || '/' || i.ordinal || ' ' || f.key || ' ' || f.digest || ' ' || f.value || ' ' || f.unit || ' ' || f.effective || ' ' || f.status
FROM refusal_input i LEFT JOIN fact f ON f.key = i.fact_key AND f.digest = i.fact_digest
ORDER BY 1`)
		if err != nil {
			t.Fatal(err)
		}
		out, err := pgx.CollectRows(rows, func(r pgx.CollectableRow) (string, error) {
			var s *string
			err := r.Scan(&s)
			if s == nil {
				return "", err
			}
			return *s, err
		})
		if err != nil {
			t.Fatal(err)
		}
		return out
	}
	count := func(q string) int64 {
		var n int64
		if err := owner.QueryRow(ctx, q).Scan(&n); err != nil {
			t.Fatal(err)
		}
		return n
	}
	const readings = `SELECT count(*) FROM fact WHERE quantity IN ('minute-volume', 'tidal-volume', 'resp-rate', 'petco2', 'vco2', 'peco2', 'peep', 'plateau', 'mean-airway', 'fetco2')`
	before := cited()
	if len(before) == 0 {
		t.Fatal("the demo store cites no inputs")
	}
	for _, c := range before {
		if strings.Count(c, " ") < 6 {
			t.Fatalf("a cited input is not stored before retain: %q", c)
		}
	}
	facts0, readings0, inbox0 := count(`SELECT count(*) FROM fact`), count(readings), count(`SELECT count(*) FROM inbox`)
	raws0 := count(`SELECT count(*) FROM inbox WHERE raw IS NOT NULL`)
	var last time.Time
	if err := owner.QueryRow(ctx, `SELECT max(effective) FROM fact`).Scan(&last); err != nil {
		t.Fatal(err)
	}
	asOf := last.Add(48 * time.Hour).UTC().Format(time.RFC3339)
	retain := func(args ...string) string {
		var stdout, stderr bytes.Buffer
		e := env{getenv: func(string) string { return "" }, stdout: &stdout, stderr: &stderr}
		if err := run(ctx, append([]string{"retain", "--database-url", demoURL, "--horizon", "24h", "--as-of", asOf}, args...), e); err != nil {
			t.Fatalf("retain %v: %v\n%s", args, err, stderr.String())
		}
		return stdout.String()
	}
	removedRe := regexp.MustCompile(`(?:would remove|removed) (\d+) readings \((\d+) fact rows\) of (\d+) patients and the payloads of (\d+) messages`)
	parse := func(out string) []int64 {
		m := removedRe.FindStringSubmatch(out)
		if m == nil {
			t.Fatalf("retain printed no report:\n%s", out)
		}
		var v []int64
		for _, x := range m[1:] {
			n, _ := strconv.ParseInt(x, 10, 64)
			v = append(v, n)
		}
		return v
	}
	dry := retain()
	want := parse(dry)
	if !strings.Contains(dry, "dry run") || count(`SELECT count(*) FROM fact`) != facts0 {
		t.Fatalf("the dry run removed something or did not say it is one:\n%s", dry)
	}
	if want[1] == 0 || want[1] >= readings0 || want[3] == 0 {
		t.Fatalf("retain would remove %v of %d readings: want some readings and payloads, and not every reading (some are cited)", want, readings0)
	}
	got := parse(retain("--apply"))
	if !slices.Equal(got, want) {
		t.Errorf("--apply removed %v, the dry run said %v", got, want)
	}
	if n := count(`SELECT count(*) FROM fact`); n != facts0-want[1] {
		t.Errorf("facts %d after retain, want %d - %d", n, facts0, want[1])
	}
	if n := count(readings); n != readings0-want[1] {
		t.Errorf("ventilator readings %d after retain, want %d - %d (only readings go)", n, readings0, want[1])
	}
	if n := count(`SELECT count(*) FROM inbox`); n != inbox0 {
		t.Errorf("inbox rows %d after retain, want %d (they stay for the duplicate check)", n, inbox0)
	}
	if n := count(`SELECT count(*) FROM inbox WHERE raw IS NOT NULL`); n != raws0-want[3] {
		t.Errorf("payloads %d after retain, want %d - %d", n, raws0, want[3])
	}
	if after := cited(); !slices.Equal(after, before) {
		t.Errorf("cited inputs changed by retain: %d before, %d after", len(before), len(after))
	}
	if again := parse(retain("--apply")); again[1] != 0 {
		t.Errorf("a second retain removed %v, want nothing", again)
	}
	// Every payload kept is the bytes received (migration 0015: zstd with
	// the dictionary the database holds; the SHA-256 is the inbox key).
	var pout, perr bytes.Buffer
	pe := env{getenv: func(string) string { return "" }, stdout: &pout, stderr: &perr}
	if err := run(ctx, []string{"audit", "payloads", "--database-url", demoURL}, pe); err != nil {
		t.Fatalf("audit payloads: %v\n%s%s", err, pout.String(), perr.String())
	}
	wantLine := fmt.Sprintf("stored payloads that are the bytes received: %d (%d compressed, 0 plain", raws0-want[3], raws0-want[3])
	if !strings.Contains(pout.String(), wantLine) || !strings.Contains(pout.String(), "refused: 0") {
		t.Errorf("audit payloads printed\n%s\nwant %q and no refusal", pout.String(), wantLine)
	}
	t.Logf("retain removed %d readings (%d fact rows) of %d patients and %d payloads; %d cited inputs intact", want[0], want[1], want[2], want[3], len(before))
}

// verifyDemoStore runs audit verify over the whole demo store: every
// version that has a value must reproduce (value, interpretation, digest
// and the published Observation's bytes). Then, as the superuser in this
// throwaway database, it alters one stored input of a value and checks
// that verify reports that value as a mismatch with both values. Every
// refusal must reproduce too (reason, detail and digest), and altering the
// blood gas one considered makes it a mismatch with both reasons.
func verifyDemoStore(ctx context.Context, t *testing.T, r *postgres.Reviewer, demoURL string, versions int) {
	refusals := 0
	for offset := 0; ; {
		page, err := r.Refused(ctx, postgres.Filter{Limit: 500, Offset: offset})
		if err != nil {
			t.Fatal(err)
		}
		refusals += len(page.Rows)
		if !page.More {
			break
		}
		offset = page.NextOffset
	}
	var all []postgres.Verdict
	for offset := 0; ; {
		page, err := r.Verify(ctx, postgres.Filter{Limit: 200, Offset: offset})
		if err != nil {
			t.Fatal(err)
		}
		all = append(all, page.Rows...)
		if !page.More {
			break
		}
		offset = page.NextOffset
	}
	sum := postgres.Summarise(all)
	t.Logf("verify: %s", sum)
	if sum.Versions != versions || sum.Refusals != refusals || refusals == 0 ||
		sum.Reproduced+sum.Retractions != versions+refusals || sum.Reproduced == 0 {
		for _, v := range all {
			if v.Outcome != postgres.OutcomeReproduced && v.Outcome != postgres.OutcomeRetraction {
				t.Errorf("%s version %d (%s): %s %s %q", v.Key, v.Version, v.Status, v.Outcome, v.Why, v.Findings)
			}
		}
		t.Fatalf("verify over the demo store: %s; want every one of %d versions and %d refusals reproduced (or a retraction)", sum, versions, refusals)
	}
	var refused postgres.Verdict
	for _, v := range all {
		if v.Status == postgres.StatusRefused && v.Reason != fhirmap.ReasonImplausible && v.Outcome == postgres.OutcomeReproduced {
			refused = v
			break
		}
	}
	if refused.Key == "" {
		t.Fatal("the demo stored no refusal to alter")
	}

	// Alter the blood gas of one current predicted PaCO2 discrepancy (the
	// PaCO2 enters the difference one for one) in the stored fact.
	var target postgres.Verdict
	for _, v := range all {
		if v.Kind == fhirmap.KindPaCO2Discrepancy && v.Outcome == postgres.OutcomeReproduced {
			target = v
			break
		}
	}
	if target.Key == "" {
		t.Fatal("the demo stored no measured-minus-predicted PaCO2 to alter")
	}
	admin, err := pgxpool.New(ctx, demoURL)
	if err != nil {
		t.Fatal(err)
	}
	defer admin.Close()
	tag, err := admin.Exec(ctx, `UPDATE fact_row r SET value = r.value + 3 FROM fact_term t
		WHERE t.id = r.term_id AND r.key = $1 AND t.quantity = 'pco2'`, target.BloodGas)
	if err != nil || tag.RowsAffected() == 0 {
		t.Fatalf("alter the stored blood gas %s: %v (%d rows)", target.BloodGas, err, tag.RowsAffected())
	}
	got, err := r.VerifyKey(ctx, target.Key)
	if err != nil {
		t.Fatal(err)
	}
	found := false
	for _, v := range got {
		if v.Version != target.Version {
			continue
		}
		found = true
		if v.Outcome != postgres.OutcomeMismatch {
			t.Fatalf("after altering its blood gas, %s version %d: %s, want a mismatch", v.Key, v.Version, v.Outcome)
		}
		want := "value: published " + target.Published + " mmHg, re-derived " + v.Rederived + " mmHg"
		if v.Rederived == target.Published || !slices.Contains(v.Findings, want) {
			t.Errorf("findings %q, want %q (both values)", v.Findings, want)
		}
	}
	if !found {
		t.Fatalf("verify of %s returned no version %d", target.Key, target.Version)
	}

	// A PaCO2 of 400 mmHg is outside physio's plausible range: every kind
	// of that blood gas is then refused as implausible, whatever the
	// stored refusal said.
	if refused.BloodGas != target.BloodGas {
		tag, err = admin.Exec(ctx, `UPDATE fact_row r SET value = 400 FROM fact_term t
			WHERE t.id = r.term_id AND r.key = $1 AND t.quantity = 'pco2'`, refused.BloodGas)
		if err != nil || tag.RowsAffected() == 0 {
			t.Fatalf("alter the stored blood gas %s: %v", refused.BloodGas, err)
		}
		got, err = r.VerifyKey(ctx, refused.Key)
		if err != nil {
			t.Fatal(err)
		}
		found = false
		for _, v := range got {
			if v.Status != postgres.StatusRefused || !v.Recorded.Equal(refused.Recorded) {
				continue
			}
			found = true
			want := "reason: stored " + refused.Reason + ", re-derived " + fhirmap.ReasonImplausible
			if v.Outcome != postgres.OutcomeMismatch || v.RederivedReason != fhirmap.ReasonImplausible || !slices.Contains(v.Findings, want) {
				t.Errorf("after altering its blood gas, refusal %s: %s %q, want a mismatch with %q", v.Key, v.Outcome, v.Findings, want)
			}
		}
		if !found {
			t.Fatalf("verify of %s returned no refusal", refused.Key)
		}
	}
}

// checkSettings checks that a stored version or refusal names a settings
// snapshot whose bytes hash to its digest and that names the version's
// algorithm. The snapshot's settings are the demo's: the site it runs
// (apparatus dead space and target configured, the default window).
func checkSettings(ctx context.Context, t *testing.T, r *postgres.Reviewer, key, digest, algorithm string, seen map[string]bool) {
	t.Helper()
	if digest == "" {
		t.Errorf("%s: no settings snapshot recorded", key)
		return
	}
	if seen[digest] {
		return
	}
	seen[digest] = true
	s, err := r.Settings(ctx, digest)
	if err != nil {
		t.Fatalf("%s: settings %s: %v", key, digest, err)
	}
	if auditSHA([]byte(s.Snapshot)) != digest {
		t.Errorf("settings %s: the stored bytes hash to %s", digest, auditSHA([]byte(s.Snapshot)))
	}
	if algorithm != "" && s.Algorithm != algorithm {
		t.Errorf("settings %s: algorithm %s, the version's %s", digest, s.Algorithm, algorithm)
	}
	parsed, err := consumer.ParseSettings([]byte(s.Snapshot))
	if err != nil {
		t.Fatal(err)
	}
	if !parsed.Site.ApparatusDeadSpaceConfigured || parsed.Site.TargetPaCO2mmHg == 0 || parsed.Site.Window != fhirmap.DefaultSite().Window {
		t.Errorf("settings %s: site %+v is not the demo's", digest, parsed.Site)
	}
}

// checkSettingsPublished checks the stored settings against what the
// published values used: the apparatus dead space in every predicted
// PaCO2's worked basis (VA = (VT - VDanat - VDapp) x RR), the target in
// every for-target value's constants.
func checkSettingsPublished(ctx context.Context, t *testing.T, r *postgres.Reviewer, versions []postgres.Version) {
	t.Helper()
	checked := 0
	for _, v := range versions {
		if v.Record == nil || v.Settings == "" {
			continue
		}
		rec, err := r.Settings(ctx, v.Settings)
		if err != nil {
			t.Fatal(err)
		}
		st, err := consumer.ParseSettings([]byte(rec.Snapshot))
		if err != nil {
			t.Fatal(err)
		}
		switch v.Kind {
		case fhirmap.KindPredictedPaCO2:
			checked++
			if want := " - " + physio.DisplayNumber(st.Site.ApparatusDeadSpaceML) + " mL) x "; !strings.Contains(v.Record.Worked, want) {
				t.Errorf("%s: worked basis %q lacks the stored apparatus dead space (%q)", v.Key, v.Record.Worked, want)
			}
		case fhirmap.KindRateForTarget, fhirmap.KindTidalVolumeForTarget:
			checked++
			if !slices.ContainsFunc(v.Record.Constants, func(c fhirmap.RecordConstant) bool {
				return c.Name == "target PaCO2" && c.Value == st.Site.TargetPaCO2mmHg
			}) {
				t.Errorf("%s: constants %+v lack the stored target %g", v.Key, v.Record.Constants, st.Site.TargetPaCO2mmHg)
			}
		}
	}
	if checked == 0 {
		t.Error("no predicted PaCO2 or for-target value to check the stored settings against")
	}
}

// recordNotes renders the note lines a stored record stands for, as the
// published Observation writes them (the "Formula", "Intermediate steps",
// "Constants", "Assumptions" and "Flags" lines: the format the README
// documents for readers of the notes). Lines a record leaves empty are
// absent, as in the notes.
func recordNotes(rec *fhirmap.Record) map[string]string {
	out := map[string]string{}
	basis := "Formula: " + rec.Formula + "."
	if rec.Worked != "" {
		basis += " Worked: " + rec.Worked + "."
	}
	out["Formula"] = basis
	var steps []string
	for _, st := range rec.Steps {
		if st.Basis != "" {
			steps = append(steps, st.Method+": "+st.Basis)
		}
	}
	if len(steps) > 0 {
		out["Intermediate steps"] = "Intermediate steps: " + strings.Join(steps, "; ") + "."
	}
	if len(rec.Constants) > 0 {
		parts := make([]string, len(rec.Constants))
		for i, c := range rec.Constants {
			parts[i] = c.Name + " = " + physio.DisplayNumber(c.Value)
			if u := physio.DisplayUnit(c.Unit); u != "" {
				parts[i] += " " + u
			}
			if c.Source != "" {
				parts[i] += " (" + c.Source + ")"
			}
		}
		out["Constants"] = "Constants: " + strings.Join(parts, "; ") + "."
	}
	if len(rec.Assumptions) > 0 {
		out["Assumptions"] = "Assumptions: " + strings.Join(rec.Assumptions, "; ") + "."
	}
	if len(rec.Flags) > 0 {
		out["Flags"] = "Flags: " + strings.Join(rec.Flags, "; ") + "."
	}
	return out
}

// checkRecord compares a stored record with the published notes line by
// line, and its steps and constants with the value's basis.
func checkRecord(t *testing.T, v postgres.Version, notes []string) {
	t.Helper()
	if v.Status == "entered-in-error" {
		if v.Record != nil {
			t.Errorf("%s version %d: a retraction with a record", v.Key, v.Version)
		}
		return
	}
	if v.Record == nil {
		t.Errorf("%s version %d: no record stored", v.Key, v.Version)
		return
	}
	published := map[string]string{}
	for _, n := range notes {
		if label, _, ok := strings.Cut(n, ":"); ok {
			switch label {
			case "Formula", "Intermediate steps", "Constants", "Assumptions", "Flags":
				published[label] = n
			}
		}
	}
	want := recordNotes(v.Record)
	for _, label := range []string{"Formula", "Intermediate steps", "Constants", "Assumptions", "Flags"} {
		if published[label] != want[label] {
			t.Errorf("%s version %d: %s: published %q, stored record gives %q", v.Key, v.Version, label, published[label], want[label])
		}
	}
	if v.Record.Worked != v.Basis {
		t.Errorf("%s version %d: record worked basis %q, stored basis %q", v.Key, v.Version, v.Record.Worked, v.Basis)
	}
	if !slices.Equal(v.Record.Flags, v.Flags) {
		t.Errorf("%s version %d: record flags %q, stored flags %q", v.Key, v.Version, v.Record.Flags, v.Flags)
	}
	// The value's own constants are among the record's (which adds the steps').
	for _, c := range v.Constants {
		if !slices.ContainsFunc(v.Record.Constants, func(x fhirmap.RecordConstant) bool { return x.Name == c.Name && x.Value == c.Value }) {
			t.Errorf("%s version %d: constant %s not in the record", v.Key, v.Version, c.Name)
		}
	}
	// A predicted PaCO2 rests on the predicted body weight: that step is
	// stored with its own basis and constants (ARDSNet PBW formula [common
	// practice]: 50 or 45.5 kg + 0.91 x (height - 152.4 cm)).
	if v.Kind == fhirmap.KindPredictedPaCO2 {
		i := slices.IndexFunc(v.Record.Steps, func(s fhirmap.RecordStep) bool { return s.Unit == "kg" })
		if i < 0 {
			t.Errorf("%s version %d: no predicted-body-weight step in %+v", v.Key, v.Version, v.Record.Steps)
		} else if st := v.Record.Steps[i]; st.Basis == "" || st.Value < 30 || st.Value > 100 || !strings.Contains(st.Basis, "152.4") {
			t.Errorf("%s version %d: predicted-body-weight step %+v", v.Key, v.Version, st)
		}
	}
}

func checkPublishedVersion(t *testing.T, v postgres.Version) {
	t.Helper()
	fail := func(what string, got, want any) {
		t.Helper()
		t.Errorf("%s version %d: %s: published %v, stored %v", v.Key, v.Version, what, got, want)
	}
	var obs *publishedObservation
	var prov *publishedProvenance
	for _, m := range v.Messages {
		if auditSHA(m.Payload) != m.Digest {
			fail(m.ResourceType+" digest", auditSHA(m.Payload), m.Digest)
		}
		switch m.ResourceType {
		case "Observation":
			obs = &publishedObservation{}
			if err := json.Unmarshal(m.Payload, obs); err != nil {
				t.Fatalf("%s: observation: %v", v.Key, err)
			}
		case "Provenance":
			prov = &publishedProvenance{}
			if err := json.Unmarshal(m.Payload, prov); err != nil {
				t.Fatalf("%s: provenance: %v", v.Key, err)
			}
		}
	}
	if obs == nil || prov == nil || len(v.Messages) != 2 {
		t.Fatalf("%s version %d: %d published messages, want one Observation and one Provenance", v.Key, v.Version, len(v.Messages))
	}
	if obs.ResourceType != "Observation" || obs.ID != v.ObservationID {
		fail("id", obs.ID, v.ObservationID)
	}
	if obs.Meta.VersionID != strconv.Itoa(v.Version) {
		fail("meta.versionId", obs.Meta.VersionID, v.Version)
	}
	if obs.Status != v.Status {
		fail("status", obs.Status, v.Status)
	}
	if len(obs.Code.Coding) == 0 || obs.Code.Coding[0].Code != v.Kind {
		fail("code", obs.Code.Coding, v.Kind)
	}
	if obs.Subject.Reference != v.Patient {
		fail("subject", obs.Subject.Reference, v.Patient)
	}
	if enc := ""; obs.Encounter != nil {
		enc = obs.Encounter.Reference
		if enc != v.Encounter {
			fail("encounter", enc, v.Encounter)
		}
	} else if v.Encounter != "" {
		fail("encounter", "", v.Encounter)
	}
	if eff, err := time.Parse(time.RFC3339Nano, obs.Effective); err != nil || !eff.Equal(v.Effective) {
		fail("effectiveDateTime", obs.Effective, v.Effective)
	}
	// The value the audit prints is the published one; a retraction has none.
	switch {
	case v.Value == nil && obs.Value != nil:
		fail("valueQuantity of a retraction", obs.Value.Value, "none")
	case v.Value != nil && (obs.Value == nil || obs.Value.Value.String() != v.Published || obs.Value.Code != v.Unit):
		fail("valueQuantity", obs.Value, v.Published+" "+v.Unit)
	}
	code := ""
	if len(obs.Interpretation) > 0 && len(obs.Interpretation[0].Coding) > 0 {
		code = obs.Interpretation[0].Coding[0].Code
	}
	if v.Status != "entered-in-error" && code != v.Interpretation.Code {
		fail("interpretation", code, v.Interpretation.Code)
	}
	if v.Status != "entered-in-error" && !strings.HasPrefix(obs.Method.Text, v.Method+", method version "+v.MethodVersion) {
		fail("method", obs.Method.Text, v.Method)
	}
	var notes strings.Builder
	var lines []string
	for _, n := range obs.Note {
		notes.WriteString(n.Text + "\n")
		lines = append(lines, n.Text)
	}
	checkRecord(t, v, lines)
	for _, c := range v.Constants {
		// The note writes a constant for people as "name = value unit
		// (source)", at physio.DisplayNumber's precision; the store keeps it
		// at full precision.
		if !strings.Contains(notes.String(), c.Name+" = "+physio.DisplayNumber(c.Value)) {
			fail("constant "+c.Name, "absent from the notes", physio.DisplayNumber(c.Value)+" (stored "+strconv.FormatFloat(c.Value, 'g', -1, 64)+")")
		}
	}
	for _, a := range v.Assumptions {
		if !strings.Contains(notes.String(), a) {
			fail("assumption", "absent from the notes", a)
		}
	}
	resources := map[string]bool{}
	for _, in := range v.Inputs {
		resources[in.Resource] = true
		if in.PatientLevel != (in.Effective == nil) || in.PatientLevel && in.Offset != nil {
			fail("input "+in.Role+" time", in.Effective, in.PatientLevel)
		}
	}
	for _, d := range obs.DerivedFrom {
		if !resources[d.Reference] {
			fail("derivedFrom", d.Reference, "not among the stored inputs")
		}
	}
	want := "Observation/" + v.ObservationID + "/_history/" + strconv.Itoa(v.Version)
	if len(prov.Target) != 1 || prov.Target[0].Reference != want {
		fail("Provenance.target", prov.Target, want)
	}
}
