package main

import (
	"bytes"
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/sha256"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/csv"
	"encoding/hex"
	"encoding/json"
	"encoding/pem"
	"errors"
	"io"
	"log/slog"
	"math/big"
	"net"
	"net/http"
	"net/http/httptest"
	"net/netip"
	"net/url"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/review"
	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
	"github.com/ventderive/ventderive/consumer/rawcodec"
)

// consoleStore is a store filled by the real pipeline (the demo, 6 h of
// the invented ICU day) with the roles applied: admin is the superuser URL
// of its database (for the independent checks), reviewer the reviewer
// role's.
type consoleStore struct {
	admin, reviewer string
	adminPool       *pgxpool.Pool
	demoOutput      string
}

func newConsoleStore(t *testing.T, ctx context.Context) consoleStore {
	t.Helper()
	admin := pgtest.AdminURL(t)
	var stdout, stderr bytes.Buffer
	e := env{getenv: func(k string) string {
		if k == "DATABASE_URL" {
			return admin
		}
		return ""
	}, stdin: strings.NewReader(""), stdout: &stdout, stderr: &stderr}
	if err := run(ctx, []string{"demo", "--keep", "--speed", "0", "--duration", "6h", "--dir", t.TempDir()}, e); err != nil {
		t.Fatalf("demo: %v\n%s", err, stderr.String())
	}
	m := regexp.MustCompile(`export DATABASE_URL='([^']+)'`).FindStringSubmatch(stdout.String())
	if m == nil {
		t.Fatalf("the demo did not print its database:\n%s", stdout.String())
	}
	p, err := url.Parse(m[1])
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { dropDatabase(admin, strings.TrimPrefix(p.Path, "/")) })
	rolesSQL, err := os.ReadFile("../../deploy/postgres/roles.sql")
	if err != nil {
		t.Fatal(err)
	}
	pgtest.ApplyRoles(t, m[1], string(rolesSQL))
	pool, err := pgxpool.New(ctx, m[1])
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(pool.Close)
	return consoleStore{admin: m[1], reviewer: reviewerURL(t, m[1]), adminPool: pool, demoOutput: stdout.String()}
}

// console starts the console over the store as the reviewer role, as
// `ventderive review` connects (read-only transactions).
func (cs consoleStore) console(t *testing.T, ctx context.Context, cfg review.Config) *httptest.Server {
	t.Helper()
	pc, err := pgxpool.ParseConfig(cs.reviewer)
	if err != nil {
		t.Fatal(err)
	}
	pc.ConnConfig.RuntimeParams["default_transaction_read_only"] = "on"
	pool, err := pgxpool.NewWithConfig(ctx, pc)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(pool.Close)
	srv, err := review.New(review.NewStore(pool), cfg)
	if err != nil {
		t.Fatal(err)
	}
	ts := httptest.NewServer(srv)
	t.Cleanup(ts.Close)
	return ts
}

func (cs consoleStore) scalar(t *testing.T, ctx context.Context, sql string, args ...any) int {
	t.Helper()
	var n int
	if err := cs.adminPool.QueryRow(ctx, sql, args...).Scan(&n); err != nil {
		t.Fatalf("%s: %v", sql, err)
	}
	return n
}

func (cs consoleStore) text(t *testing.T, ctx context.Context, sql string, args ...any) string {
	t.Helper()
	var s string
	if err := cs.adminPool.QueryRow(ctx, sql, args...).Scan(&s); err != nil {
		t.Fatalf("%s: %v", sql, err)
	}
	return s
}

func get(t *testing.T, c *http.Client, u string) (*http.Response, string) {
	t.Helper()
	resp, err := c.Get(u)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	return resp, string(b)
}

// Independent counts: from the base tables (as the superuser), not through
// the review_* views the console reads.
const (
	// current, not retracted, derived values of a patient and kinds
	currentValuesSQL = `SELECT count(*) FROM head h JOIN derivation d ON d.id = h.derivation_id
		WHERE NOT h.refused AND d.status <> 'entered-in-error' AND h.patient_ref = $1 AND h.kind = ANY($2)`
	currentRefusalsSQL    = `SELECT count(*) FROM head WHERE refused AND patient_ref = $1`
	currentRetractionsSQL = `SELECT count(*) FROM head WHERE status = 'entered-in-error' AND patient_ref = $1`
	patientWithRetraction = `SELECT patient_ref FROM head WHERE status = 'entered-in-error' ORDER BY patient_ref LIMIT 1`
	patientWithRefusal    = `SELECT patient_ref FROM head WHERE refused ORDER BY patient_ref LIMIT 1`
)

var deadSpaceKinds = []string{"deadspace-fraction-enghoff", "deadspace-fraction-vco2", "deadspace-fraction-estimated"}

var dataPointsRE = regexp.MustCompile(`id="fig-([a-z0-9-]+)">\s*<img [^>]*data-points="(\d+)"`)

func figurePoints(page string) map[string]int {
	out := map[string]int{}
	for _, m := range dataPointsRE.FindAllStringSubmatch(page, -1) {
		n, _ := strconv.Atoi(m[2])
		out[m[1]] = n
	}
	return out
}

// TestReviewConsole fills a store with the demo's pipeline once and checks
// the console's pages against it: handlers over HTTP, then the pages in a
// real headless Chromium.
func TestReviewConsole(t *testing.T) {
	ctx, cancel := context.WithTimeout(context.Background(), 8*time.Minute)
	defer cancel()
	cs := newConsoleStore(t, ctx)
	var logs lockedBuilder
	ts := cs.console(t, ctx, review.Config{Loopback: true, Log: slog.New(slog.NewJSONHandler(&logs, nil))})
	c := ts.Client()
	patient := cs.text(t, ctx, patientWithRetraction)
	pid := strings.TrimPrefix(patient, "Patient/")

	t.Run("patient list", func(t *testing.T) {
		resp, body := get(t, c, ts.URL+"/patients")
		if resp.StatusCode != 200 {
			t.Fatalf("status %d: %s", resp.StatusCode, body)
		}
		n := cs.scalar(t, ctx, `SELECT count(DISTINCT patient_ref) FROM head`)
		if got := strings.Count(body, `<a href="/patients/lg-icu-`); got != n {
			t.Errorf("list links %d patients, the store has %d", got, n)
		}
		// Never the keyed hash: no patient_hash of the store is on the page.
		rows, err := cs.adminPool.Query(ctx, `SELECT patient_hash FROM derivation UNION SELECT patient_hash FROM refusal UNION SELECT patient_hash FROM head`)
		if err != nil {
			t.Fatal(err)
		}
		hashes, err := pgx.CollectRows(rows, pgx.RowTo[string])
		if err != nil {
			t.Fatal(err)
		}
		for _, h := range hashes {
			if strings.Contains(body, h) {
				t.Fatalf("the patient list shows a keyed patient hash")
			}
		}
		// Counts: the blood gases of the patient with a retraction.
		resp, csvBody := get(t, c, ts.URL+"/patients?format=csv")
		if ct := resp.Header.Get("Content-Type"); !strings.HasPrefix(ct, "text/csv") {
			t.Fatalf("CSV content type %q", ct)
		}
		recs, err := csv.NewReader(strings.NewReader(csvBody)).ReadAll()
		if err != nil {
			t.Fatalf("CSV: %v", err)
		}
		if len(recs) != n+1 {
			t.Fatalf("CSV has %d rows, want the header and %d patients", len(recs), n)
		}
		for _, r := range recs[1:] {
			if r[0] != patient {
				continue
			}
			gases := cs.scalar(t, ctx, `SELECT count(DISTINCT blood_gas_key) FROM head WHERE patient_ref = $1`, patient)
			if r[1] != strconv.Itoa(gases) {
				t.Errorf("%s: %s blood gases in the list, %d in the store", patient, r[1], gases)
			}
			if want := cs.scalar(t, ctx, currentRetractionsSQL, patient); r[4] != strconv.Itoa(want) {
				t.Errorf("%s: %s retractions in the list, %d in the store", patient, r[4], want)
			}
			if want := cs.scalar(t, ctx, currentRefusalsSQL, patient); r[3] != strconv.Itoa(want) {
				t.Errorf("%s: %s refusals in the list, %d in the store", patient, r[3], want)
			}
		}
		// The retraction filter lists exactly the patients with one.
		_, body = get(t, c, ts.URL+"/patients?has=retraction")
		want := cs.scalar(t, ctx, `SELECT count(DISTINCT patient_ref) FROM head WHERE status = 'entered-in-error'`)
		if got := strings.Count(body, `<a href="/patients/lg-icu-`); got != want || want == 0 {
			t.Errorf("has=retraction lists %d patients, the store has %d with a retraction", got, want)
		}
		if resp, _ := get(t, c, ts.URL+"/patients?from=yesterday"); resp.StatusCode != 400 {
			t.Errorf("a bad period: status %d, want 400", resp.StatusCode)
		}
	})

	t.Run("timeline", func(t *testing.T) {
		resp, body := get(t, c, ts.URL+"/patients/"+pid)
		if resp.StatusCode != 200 {
			t.Fatalf("status %d", resp.StatusCode)
		}
		if len(body) > 500<<10 {
			t.Errorf("patient page weighs %d bytes, budget 500 KB", len(body))
		}
		pts := figurePoints(body)
		if want := cs.scalar(t, ctx, currentValuesSQL, patient, deadSpaceKinds); pts["deadspace"] != want || want == 0 {
			t.Errorf("dead-space plot has %d points, the store %d current values", pts["deadspace"], want)
		}
		want := cs.scalar(t, ctx, currentRefusalsSQL, patient) + cs.scalar(t, ctx, currentRetractionsSQL, patient)
		if pts["marks"] != want {
			t.Errorf("marks plot has %d marks, the store %d current refusals and retractions", pts["marks"], want)
		}
		if enc := cs.text(t, ctx, `SELECT min(encounter) FROM derivation WHERE patient_ref = $1`, patient); !strings.Contains(body, ">"+enc+"<") {
			t.Errorf("the patient page does not name the stay %s", enc)
		}
		if !strings.Contains(body, "Nunn &amp; Hill") || !strings.Contains(body, "Tyburski") {
			t.Errorf("reference lines' sources missing from the page")
		}
		if resp, _ := get(t, c, ts.URL+"/patients/"+pid+"/report"); resp.StatusCode != 200 {
			t.Errorf("report: status %d", resp.StatusCode)
		}
		if resp, _ := get(t, c, ts.URL+"/patients/nobody-here"); resp.StatusCode != 404 {
			t.Errorf("unknown patient: status %d, want 404", resp.StatusCode)
		}
	})

	t.Run("value page matches the published Observation", func(t *testing.T) {
		var key, basis, obsID string
		var version int
		var payload []byte
		err := cs.adminPool.QueryRow(ctx, `
			SELECT d.key, d.basis, d.observation_id::text, d.version, o.stored_payload
			FROM derivation d JOIN outbox o ON o.msg_id = 'Observation/' || d.observation_id || '/_history/' || d.version
			WHERE d.patient_ref = $1 AND d.kind = 'deadspace-fraction-vco2' ORDER BY d.id LIMIT 1`, patient).
			Scan(&key, &basis, &obsID, &version, &payload)
		if err != nil {
			t.Fatal(err)
		}
		// Stored compressed since migration 0018: the exact bytes are the
		// frame decoded with the embedded outbox dictionary.
		if payload, err = rawcodec.Outbox().Decode(payload); err != nil {
			t.Fatal(err)
		}
		var obs publishedObservation
		if err := json.Unmarshal(payload, &obs); err != nil {
			t.Fatal(err)
		}
		_, body := get(t, c, ts.URL+"/values?key="+url.QueryEscape(key))
		v := regexp.MustCompile(`id="value-` + strconv.Itoa(version) + `">([^<]*)<`).FindStringSubmatch(body)
		if v == nil || obs.Value == nil || strings.TrimSpace(v[1]) != string(obs.Value.Value) {
			t.Errorf("value page shows %q, the published Observation %v", v, obs.Value)
		}
		b := regexp.MustCompile(`id="basis-` + strconv.Itoa(version) + `">([^<]*)<`).FindStringSubmatch(body)
		if b == nil || htmlUnescape(b[1]) != basis {
			t.Errorf("basis on the page %q, stored %q", b, basis)
		}
		found := false
		for _, n := range obs.Note {
			found = found || strings.Contains(n.Text, basis)
		}
		if !found {
			t.Errorf("the stored basis is not in the published note; the page would show another text")
		}
		// The published bytes, exactly.
		resp, raw := get(t, c, ts.URL+"/published?"+url.Values{"key": {obsID}, "version": {strconv.Itoa(version)}, "type": {"Observation"}}.Encode())
		sum := sha256.Sum256(payload)
		if resp.StatusCode != 200 || raw != string(payload) || resp.Header.Get("X-Payload-Sha256") != hex.EncodeToString(sum[:]) {
			t.Errorf("published Observation: status %d, %d bytes; want the outbox's %d bytes", resp.StatusCode, len(raw), len(payload))
		}
	})

	t.Run("refusal page", func(t *testing.T) {
		var key, reason, detail string
		if err := cs.adminPool.QueryRow(ctx, `SELECT r.key, r.reason, r.detail FROM head h JOIN refusal r ON r.id = h.refusal_id
			WHERE h.refused ORDER BY r.id LIMIT 1`).Scan(&key, &reason, &detail); err != nil {
			t.Fatal(err)
		}
		_, body := get(t, c, ts.URL+"/values?key="+url.QueryEscape(key))
		if !strings.Contains(body, `class="reason">`+reason+`<`) || !strings.Contains(body, htmlEscape(detail)) {
			t.Errorf("refusal page lacks the reason %q or its detail", reason)
		}
	})

	t.Run("value page shows the settings snapshot and the steps", func(t *testing.T) {
		// A predicted PaCO2 uses the apparatus dead space and keeps its
		// predicted-body-weight step (review_derivation_step).
		var key, digest, alias, algorithm string
		var version int
		var ml, target float64
		var before, after int64
		err := cs.adminPool.QueryRow(ctx, `
			SELECT d.key, d.version, d.settings_digest, s.alias_digest, s.algorithm,
			       (s.snapshot::jsonb -> 'site' ->> 'ApparatusDeadSpaceML')::float8,
			       (s.snapshot::jsonb -> 'site' ->> 'TargetPaCO2mmHg')::float8,
			       (s.snapshot::jsonb -> 'site' -> 'Window' ->> 'Before')::bigint,
			       (s.snapshot::jsonb -> 'site' -> 'Window' ->> 'After')::bigint
			FROM derivation d JOIN site_settings s ON s.digest = d.settings_digest
			WHERE d.patient_ref = $1 AND d.kind = 'paco2-predicted' AND d.record IS NOT NULL ORDER BY d.id LIMIT 1`, patient).
			Scan(&key, &version, &digest, &alias, &algorithm, &ml, &target, &before, &after)
		if err != nil {
			t.Fatal(err)
		}
		_, body := get(t, c, ts.URL+"/values?key="+url.QueryEscape(key))
		// The heading names the snapshot of each version. The versions and
		// refusals made under one snapshot share its line ("version 1,
		// version 2: snapshot ..."), and how many the key has depends on
		// the order its inputs were recorded in, so the version is found in
		// its snapshot's list, not at a fixed place in it.
		who := `(?:(?:version|refusal) [0-9]+, )*`
		want := `<li>` + who + `version ` + strconv.Itoa(version) + `(?:, (?:version|refusal) [0-9]+)*: snapshot <a class="mono" href="/settings\?digest=` +
			digest + `">` + digest[:12] + `</a>: apparatus dead space ` + regexp.QuoteMeta(strconv.FormatFloat(ml, 'f', -1, 64)) + ` mL`
		if !regexp.MustCompile(want).MatchString(body) {
			t.Errorf("the page's heading does not list version %d under snapshot %s with apparatus dead space %g mL (pattern %s)", version, digest[:12], ml, want)
		}
		i := strings.Index(body, `id="version-`+strconv.Itoa(version)+`"`)
		if i < 0 {
			t.Fatalf("no section for version %d", version)
		}
		section := body[i:]
		if j := strings.Index(section, "</section>"); j > 0 {
			section = section[:j]
		}
		// Display units: mL, mmHg, minutes (the window is stored in ns).
		for _, want := range []string{
			`<a class="settings-link" href="/settings?digest=` + digest + `">` + digest + `</a>`,
			"<dd>" + algorithm + "</dd>",
			`data-setting="ApparatusDeadSpaceML">` + strconv.FormatFloat(ml, 'f', -1, 64) + " mL<",
			`data-setting="TargetPaCO2mmHg">` + strconv.FormatFloat(target, 'f', -1, 64) + " mmHg<",
			`data-setting="Window.Before">` + strconv.FormatInt(before/int64(time.Minute), 10) + " min<",
			`data-setting="Window.After">` + strconv.FormatInt(after/int64(time.Minute), 10) + " min<",
		} {
			if !strings.Contains(section, want) {
				t.Errorf("version %d's section lacks %q", version, want)
			}
		}
		if alias == "" && !strings.Contains(section, "none (no code alias file)") || alias != "" && !strings.Contains(section, "SHA-256 "+alias) {
			t.Errorf("version %d's section does not name the alias file %q", version, alias)
		}
		rows, err := cs.adminPool.Query(ctx, `SELECT s.basis FROM review_derivation_step s JOIN derivation d ON d.id = s.derivation_id
			WHERE d.key = $1 AND d.version = $2 ORDER BY s.ordinal`, key, version)
		if err != nil {
			t.Fatal(err)
		}
		steps, err := pgx.CollectRows(rows, pgx.RowTo[string])
		if err != nil {
			t.Fatal(err)
		}
		if len(steps) == 0 {
			t.Fatal("the predicted PaCO2 kept no step")
		}
		_, csvBody := get(t, c, ts.URL+"/values?"+url.Values{"key": {key}, "format": {"csv"}, "table": {"steps-v" + strconv.Itoa(version)}}.Encode())
		recs, err := csv.NewReader(strings.NewReader(csvBody)).ReadAll()
		if err != nil || len(recs) != len(steps)+1 {
			t.Fatalf("steps CSV: %v, %d rows; want %d steps", err, len(recs)-1, len(steps))
		}
		for n, b := range steps {
			if recs[n+1][4] != b || !strings.Contains(section, htmlEscape(b)) {
				t.Errorf("step %d: shown %q, the store %q", n+1, recs[n+1][4], b)
			}
		}

		// The whole snapshot on its own page: every setting, the exact bytes.
		resp, page := get(t, c, ts.URL+"/settings?digest="+digest)
		if resp.StatusCode != 200 {
			t.Fatalf("settings page: status %d", resp.StatusCode)
		}
		var snapshot string
		var names []string
		if err := cs.adminPool.QueryRow(ctx, `SELECT snapshot, ARRAY(SELECT jsonb_object_keys(snapshot::jsonb -> 'site') ORDER BY 1)
			FROM site_settings WHERE digest = $1`, digest).Scan(&snapshot, &names); err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(page, htmlEscape(snapshot)) || !strings.Contains(page, `id="settings-digest">`+digest+"<") {
			t.Errorf("settings page lacks the stored bytes or the digest")
		}
		for _, n := range names {
			if !strings.Contains(page, "<td>"+n) {
				t.Errorf("settings page lacks the setting %s", n)
			}
		}
		if !strings.Contains(page, "<td>"+strconv.FormatFloat(ml, 'f', -1, 64)+" mL</td>") {
			t.Errorf("settings page does not show the apparatus dead space in mL")
		}
		if resp, _ := get(t, c, ts.URL+"/settings?digest=nothex"); resp.StatusCode != 400 {
			t.Errorf("malformed digest: status %d, want 400", resp.StatusCode)
		}
		if resp, _ := get(t, c, ts.URL+"/settings?digest="+strings.Repeat("0", 64)); resp.StatusCode != 404 {
			t.Errorf("unknown digest: status %d, want 404", resp.StatusCode)
		}
	})

	t.Run("refusal page shows its settings snapshot; a refusal without one says so", func(t *testing.T) {
		var key, digest string
		var id int64
		if err := cs.adminPool.QueryRow(ctx, `SELECT r.key, r.id, r.settings_digest FROM refusal r
			WHERE r.settings_digest IS NOT NULL ORDER BY r.id LIMIT 1`).Scan(&key, &id, &digest); err != nil {
			t.Fatal(err)
		}
		_, body := get(t, c, ts.URL+"/values?key="+url.QueryEscape(key))
		i := strings.Index(body, `id="refusal-`+strconv.FormatInt(id, 10)+`"`)
		if i < 0 || !strings.Contains(body[i:], `href="/settings?digest=`+digest+`"`) {
			t.Errorf("refusal %d's section does not link its snapshot %s", id, digest)
		}
		// As recorded before migration 0006: no snapshot. Restored after.
		if _, err := cs.adminPool.Exec(ctx, `UPDATE refusal SET settings_digest = NULL WHERE id = $1`, id); err != nil {
			t.Fatal(err)
		}
		defer func() {
			if _, err := cs.adminPool.Exec(ctx, `UPDATE refusal SET settings_digest = $2 WHERE id = $1`, id, digest); err != nil {
				t.Fatal(err)
			}
		}()
		_, body = get(t, c, ts.URL+"/values?key="+url.QueryEscape(key))
		i = strings.Index(body, `id="refusal-`+strconv.FormatInt(id, 10)+`"`)
		if i < 0 || !strings.Contains(body[i:], `class="hint settings-none">none recorded: made before the store kept settings snapshots`) {
			t.Errorf("a refusal without a snapshot does not say so")
		}
	})

	t.Run("quality views", func(t *testing.T) {
		for _, p := range []string{"/quality/refusals", "/quality/deadletters", "/quality/changes", "/quality/discrepancies?threshold=3"} {
			resp, body := get(t, c, ts.URL+p)
			if resp.StatusCode != 200 {
				t.Errorf("%s: status %d", p, resp.StatusCode)
			}
			if len(body) > 500<<10 {
				t.Errorf("%s weighs %d bytes, budget 500 KB", p, len(body))
			}
		}
		_, body := get(t, c, ts.URL+"/quality/deadletters?format=csv&table=by-reason")
		recs, err := csv.NewReader(strings.NewReader(body)).ReadAll()
		if err != nil {
			t.Fatal(err)
		}
		total := 0
		for _, r := range recs[1:] {
			n, _ := strconv.Atoi(r[1])
			total += n
		}
		if want := cs.scalar(t, ctx, `SELECT count(*) FROM dead_letter`); total != want || want == 0 {
			t.Errorf("dead letters by reason add up to %d, the store has %d", total, want)
		}
		_, body = get(t, c, ts.URL+"/quality/changes?format=csv")
		recs, err = csv.NewReader(strings.NewReader(body)).ReadAll()
		if err != nil {
			t.Fatal(err)
		}
		retracted := 0
		for _, r := range recs[1:] {
			if r[9] == "entered-in-error" {
				retracted++
			}
		}
		if want := cs.scalar(t, ctx, `SELECT count(*) FROM derivation WHERE status = 'entered-in-error'`); retracted != want {
			t.Errorf("changes list %d retractions, the store has %d", retracted, want)
		}
	})

	t.Run("no script and no inline style on any page", func(t *testing.T) {
		for _, p := range []string{"/patients", "/patients/" + pid, "/patients/" + pid + "/report", "/quality/refusals",
			"/quality/deadletters", "/quality/changes", "/quality/discrepancies", "/settings?digest=" + cs.text(t, ctx, `SELECT digest FROM site_settings LIMIT 1`)} {
			_, body := get(t, c, ts.URL+p)
			for _, bad := range []string{"<script", " style=", "<style", "javascript:", " onclick=", " onload="} {
				if strings.Contains(body, bad) {
					t.Errorf("%s contains %q: the CSP would block it", p, bad)
				}
			}
			for _, src := range regexp.MustCompile(`(?:src|href)="(https?:)?//`).FindAllString(body, -1) {
				t.Errorf("%s loads %s from elsewhere: the console must work offline", p, src)
			}
		}
	})

	t.Run("headers", func(t *testing.T) {
		resp, _ := get(t, c, ts.URL+"/patients/"+pid)
		h := resp.Header
		csp := h.Get("Content-Security-Policy")
		if !strings.Contains(csp, "default-src 'none'") || strings.Contains(csp, "unsafe-inline") || strings.Contains(csp, "script-src") ||
			!strings.Contains(csp, "frame-ancestors 'none'") {
			t.Errorf("CSP %q: want no script source at all and frame denial", csp)
		}
		if h.Get("Cache-Control") != "no-store" || h.Get("X-Frame-Options") != "DENY" || h.Get("X-Content-Type-Options") != "nosniff" {
			t.Errorf("headers: %v", h)
		}
	})

	t.Run("demo --keep prints a working console command", func(t *testing.T) {
		if !regexp.MustCompile(`(?m)^  go run ./cmd/ventderive review$`).MatchString(cs.demoOutput) {
			t.Fatalf("demo --keep does not print the console command:\n%s", cs.demoOutput)
		}
		// The printed command takes DATABASE_URL as exported by the line
		// above it; run it so (on a free port) as the reviewer role.
		var out lockedBuilder
		e := env{getenv: func(string) string { return "" }, stdin: strings.NewReader(""), stdout: &out, stderr: &out}
		sctx, stop := context.WithCancel(ctx)
		ready := make(chan string, 1)
		done := make(chan error, 1)
		go func() {
			done <- serveReview(sctx, reviewConfig{databaseURL: cs.reviewer, listen: "127.0.0.1:0"}, slog.New(slog.NewJSONHandler(&out, nil)), e, ready)
		}()
		var base string
		select {
		case base = <-ready:
		case err := <-done:
			t.Fatalf("review: %v\n%s", err, out.String())
		}
		resp, body := get(t, http.DefaultClient, base+"patients")
		stop()
		if err := <-done; err != nil {
			t.Errorf("review shut down with %v", err)
		}
		if resp.StatusCode != 200 || !strings.Contains(body, patient) {
			t.Errorf("the console over the kept store: status %d, patient %s listed: %v", resp.StatusCode, patient, strings.Contains(body, patient))
		}
	})

	t.Run("browser", func(t *testing.T) { reviewBrowserTest(t, ctx, cs, ts.URL, patient) })

	if strings.Contains(logs.String(), "Patient/") || strings.Contains(logs.String(), "lg-icu") {
		t.Errorf("a patient reference reached the console's log")
	}
	if !strings.Contains(logs.String(), `"route":"GET /patients/{id}"`) {
		t.Errorf("the console logs requests by route; log: %.300s", logs.String())
	}
}

func htmlUnescape(s string) string {
	return strings.NewReplacer("&amp;", "&", "&lt;", "<", "&gt;", ">", "&#34;", `"`, "&#39;", "'", "&#43;", "+").Replace(s)
}

func htmlEscape(s string) string {
	return strings.NewReplacer("&", "&amp;", "<", "&lt;", ">", "&gt;", `"`, "&#34;", "'", "&#39;", "+", "&#43;").Replace(s)
}

// TestReviewAccess: beyond loopback the console refuses to start without
// authentication and refuses requests without it.
func TestReviewAccess(t *testing.T) {
	if _, err := review.New(nil, review.Config{Loopback: false}); !errors.Is(err, review.ErrNoAuth) {
		t.Fatalf("New beyond loopback without auth: %v, want ErrNoAuth", err)
	}
	var out lockedBuilder
	e := env{getenv: func(k string) string {
		if k == "DATABASE_URL" {
			return "postgres://nobody@127.0.0.1:1/none"
		}
		return ""
	}, stdin: strings.NewReader(""), stdout: &out, stderr: &out}
	err := run(context.Background(), []string{"review", "--listen", "0.0.0.0:0"}, e)
	if !errors.Is(err, review.ErrNoAuth) {
		t.Fatalf("review --listen 0.0.0.0:0 without auth: %v, want a refusal to start", err)
	}
	if err := run(context.Background(), []string{"review", "--proxy-header", "X-Forwarded-User"}, e); !errors.Is(err, errUsage) {
		t.Errorf("a proxy header without trusted proxies: %v, want a usage error", err)
	}

	// The handler (no store needed: authentication comes first).
	for _, tc := range []struct {
		name   string
		cfg    review.Config
		header map[string]string
		user   string
		pass   string
		want   int
	}{
		{"password, none given", review.Config{Password: "s3cret", User: "reviewer"}, nil, "", "", 401},
		{"password on loopback, none given", review.Config{Loopback: true, Password: "s3cret", User: "reviewer"}, nil, "", "", 401},
		{"loopback without auth", review.Config{Loopback: true}, nil, "", "", 303},
		{"password, wrong", review.Config{Password: "s3cret", User: "reviewer"}, nil, "reviewer", "guess", 401},
		{"password, right", review.Config{Password: "s3cret", User: "reviewer"}, nil, "reviewer", "s3cret", 303},
		{"proxy header from a trusted proxy", review.Config{ProxyHeader: "X-Forwarded-User",
			TrustedProxies: []netip.Prefix{netip.MustParsePrefix("127.0.0.0/8")}}, map[string]string{"X-Forwarded-User": "a.reviewer"}, "", "", 303},
		{"proxy header from elsewhere", review.Config{ProxyHeader: "X-Forwarded-User",
			TrustedProxies: []netip.Prefix{netip.MustParsePrefix("10.9.8.7/32")}}, map[string]string{"X-Forwarded-User": "a.reviewer"}, "", "", 401},
		{"trusted proxy without the header", review.Config{ProxyHeader: "X-Forwarded-User",
			TrustedProxies: []netip.Prefix{netip.MustParsePrefix("127.0.0.0/8")}}, nil, "", "", 401},
	} {
		t.Run(tc.name, func(t *testing.T) {
			srv, err := review.New(nil, tc.cfg)
			if err != nil {
				t.Fatal(err)
			}
			ts := httptest.NewServer(srv)
			defer ts.Close()
			req, _ := http.NewRequest("GET", ts.URL+"/", nil)
			for k, v := range tc.header {
				req.Header.Set(k, v)
			}
			if tc.user != "" {
				req.SetBasicAuth(tc.user, tc.pass)
			}
			c := ts.Client()
			c.CheckRedirect = func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }
			resp, err := c.Do(req)
			if err != nil {
				t.Fatal(err)
			}
			resp.Body.Close()
			if resp.StatusCode != tc.want {
				t.Errorf("status %d, want %d", resp.StatusCode, tc.want)
			}
			if resp.Header.Get("Content-Security-Policy") == "" {
				t.Errorf("a refused request also carries the security headers")
			}
		})
	}
}

// TestReviewTLSBeyondLoopback: `review` bound beyond loopback with TLS and
// the built-in credential serves HTTPS, and refuses a request without the
// credential. The stylesheet needs no database, so none is reached.
func TestReviewTLSBeyondLoopback(t *testing.T) {
	dir := t.TempDir()
	certFile, keyFile, pool := selfSigned(t, dir)
	var out lockedBuilder
	e := env{getenv: func(string) string { return "" }, stdin: strings.NewReader(""), stdout: &out, stderr: &out}
	ctx, stop := context.WithCancel(context.Background())
	defer stop()
	ready := make(chan string, 1)
	done := make(chan error, 1)
	go func() {
		done <- serveReview(ctx, reviewConfig{databaseURL: "postgres://nobody@127.0.0.1:1/none", listen: "0.0.0.0:0",
			tlsCert: certFile, tlsKey: keyFile, user: "reviewer", password: "correct horse"}, slog.New(slog.NewJSONHandler(&out, nil)), e, ready)
	}()
	var base string
	select {
	case base = <-ready:
	case err := <-done:
		t.Fatalf("review: %v\n%s", err, out.String())
	}
	if !strings.HasPrefix(base, "https://") {
		t.Fatalf("console URL %s, want https", base)
	}
	u, _ := url.Parse(base)
	base = "https://127.0.0.1:" + u.Port() + "/"
	c := &http.Client{Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: pool}}}
	resp, _ := get(t, c, base+"static/style.css")
	if resp.StatusCode != 401 || resp.TLS == nil {
		t.Errorf("without the credential: status %d (TLS %v), want 401 over TLS", resp.StatusCode, resp.TLS != nil)
	}
	req, _ := http.NewRequest("GET", base+"static/style.css", nil)
	req.SetBasicAuth("reviewer", "correct horse")
	r2, err := c.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	r2.Body.Close()
	if r2.StatusCode != 200 {
		t.Errorf("with the credential: status %d, want 200", r2.StatusCode)
	}
	stop()
	if err := <-done; err != nil {
		t.Errorf("shutdown: %v", err)
	}
	if strings.Contains(out.String(), "correct horse") {
		t.Errorf("the password reached the output")
	}
}

// selfSigned writes a certificate for 127.0.0.1 and its key, and returns
// a pool that trusts it.
func selfSigned(t *testing.T, dir string) (certFile, keyFile string, pool *x509.CertPool) {
	t.Helper()
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "ventderive review test"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
		IPAddresses: []net.IP{net.ParseIP("127.0.0.1")}, KeyUsage: x509.KeyUsageDigitalSignature,
		ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	kb, err := x509.MarshalECPrivateKey(key)
	if err != nil {
		t.Fatal(err)
	}
	certFile, keyFile = filepath.Join(dir, "cert.pem"), filepath.Join(dir, "key.pem")
	if err := os.WriteFile(certFile, pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der}), 0o600); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(keyFile, pem.EncodeToMemory(&pem.Block{Type: "EC PRIVATE KEY", Bytes: kb}), 0o600); err != nil {
		t.Fatal(err)
	}
	cert, _ := x509.ParseCertificate(der)
	pool = x509.NewCertPool()
	pool.AddCert(cert)
	return certFile, keyFile, pool
}
