package main

import (
	"bytes"
	"context"
	"encoding/json"
	"net/url"
	"os"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
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
	versions := 0
	for key := range keys {
		h, err := r.Show(ctx, key)
		if err != nil {
			t.Fatalf("show %s: %v", key, err)
		}
		for _, v := range h.Versions {
			versions++
			checkPublishedVersion(t, v)
		}
	}
	t.Logf("%d keys, %d versions checked against their published bytes", len(keys), versions)
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
	for _, n := range obs.Note {
		notes.WriteString(n.Text + "\n")
	}
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
