package main

import (
	"bytes"
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"net/http"
	"net/http/httptest"
	"net/netip"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/cdproto/cdp"
	"github.com/chromedp/cdproto/emulation"
	"github.com/chromedp/cdproto/page"
	"github.com/chromedp/chromedp"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/review"
	"github.com/ventderive/ventderive/consumer/rawcodec"
)

var updateScreens = flag.Bool("update-screens", false, "copy the browser test's screenshots to internal/review/testdata/screens")

// chromium finds Debian's chromium. Missing, the test skips on a
// developer's machine and FAILS under CI (.ci/run installs it).
func chromium(t *testing.T) string {
	t.Helper()
	for _, name := range []string{"chromium", "chromium-browser", "/usr/bin/chromium"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	if os.Getenv("CI") != "" {
		t.Fatal("chromium is not installed; CI must have it (.ci/run installs the Debian package chromium)")
	}
	t.Skip("chromium is not installed (apt-get install chromium); under CI this fails")
	return ""
}

func browser(t *testing.T, ctx context.Context) context.Context {
	t.Helper()
	opts := []chromedp.ExecAllocatorOption{
		chromedp.ExecPath(chromium(t)),
		chromedp.Flag("headless", true),
		chromedp.NoSandbox,
		chromedp.DisableGPU,
		chromedp.Flag("disable-background-networking", true),
		chromedp.NoFirstRun,
		chromedp.NoDefaultBrowserCheck,
		chromedp.UserDataDir(t.TempDir()),
		chromedp.WindowSize(1280, 900),
	}
	actx, cancel := chromedp.NewExecAllocator(ctx, opts...)
	t.Cleanup(cancel)
	bctx, cancel2 := chromedp.NewContext(actx)
	t.Cleanup(cancel2)
	if err := chromedp.Do(bctx); err != nil {
		t.Fatalf("start chromium: %v", err)
	}
	return bctx
}

// screenshot writes the full page (PNG) to the test's screens folder and,
// with -update-screens, the top of the page as the browser shows it (the
// viewport, PNG, small enough to commit) to the committed examples.
func screenshot(t *testing.T, bctx context.Context, dir, name string) {
	t.Helper()
	full, err := chromedp.Run(bctx, chromedp.FullScreenshot(100))
	if err != nil {
		t.Fatalf("screenshot %s: %v", name, err)
	}
	if err := os.WriteFile(filepath.Join(dir, name+".png"), full, 0o644); err != nil {
		t.Fatal(err)
	}
	if !*updateScreens {
		return
	}
	if _, err := chromedp.Run(bctx, chromedp.Evaluate[bool](`window.scrollTo(0, 0) === undefined`)); err != nil {
		t.Fatal(err)
	}
	view, err := chromedp.Run(bctx, chromedp.CaptureScreenshot())
	if err != nil {
		t.Fatalf("screenshot %s: %v", name, err)
	}
	to := filepath.Join("internal", "review", "testdata", "screens")
	if err := os.MkdirAll(to, 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(to, name+".png"), view, 0o644); err != nil {
		t.Fatal(err)
	}
}

// pointOnPage is the page position of a plot's area (its image's box plus
// the area's coordinates) and where it leads.
type pointOnPage struct {
	X, Y  float64
	Href  string
	Title string
}

func plotPoint(t *testing.T, bctx context.Context, fig string, index int) pointOnPage {
	t.Helper()
	js := fmt.Sprintf(`(() => {
		const img = document.querySelector('#fig-%[1]s img');
		const a = document.querySelectorAll('#fig-%[1]s area')[%[2]d];
		const r = img.getBoundingClientRect();
		const c = a.coords.split(',').map(Number);
		return {X: r.left + c[0], Y: r.top + c[1], Href: a.href, Title: a.title};
	})()`, fig, index)
	if err := chromedp.Do(bctx, chromedp.ScrollIntoView(`#fig-`+fig+` img`)); err != nil {
		t.Fatalf("point %d of %s: %v", index, fig, err)
	}
	p, err := chromedp.Run(bctx, chromedp.Evaluate[pointOnPage](js))
	if err != nil {
		t.Fatalf("point %d of %s: %v", index, fig, err)
	}
	return p
}

func reviewBrowserTest(t *testing.T, ctx context.Context, cs consoleStore, base, patient string) {
	bctx := browser(t, ctx)
	screens := filepath.Join(t.TempDir(), "screens")
	if err := os.MkdirAll(screens, 0o755); err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshots in %s", screens)
	pid := strings.TrimPrefix(patient, "Patient/")

	// The patient list, then a click on the patient.
	do := func(what string, steps ...chromedp.Action[chromedp.Void]) {
		t.Helper()
		if err := chromedp.Do(bctx, steps...); err != nil {
			t.Fatalf("%s: %v", what, err)
		}
	}
	text := func(sel string) string {
		t.Helper()
		s, err := chromedp.Run(bctx, chromedp.Text(sel))
		if err != nil {
			t.Fatalf("text of %s: %v", sel, err)
		}
		return s
	}
	location := func() string {
		t.Helper()
		s, err := chromedp.Run(bctx, chromedp.Location())
		if err != nil {
			t.Fatal(err)
		}
		return s
	}
	do("open the patient list", chromedp.Navigate(base+"/patients"), chromedp.WaitVisible(`#table-patients`))
	if banner := text(`#advisory`); !strings.Contains(banner, "Not a medical device") || !strings.Contains(banner, "bedside") {
		t.Errorf("advisory banner %q", banner)
	}
	screenshot(t, bctx, screens, "patients")
	do("open the patient", chromedp.Click(fmt.Sprintf(`#table-patients a[href="/patients/%s"]`, pid)),
		chromedp.WaitVisible(`#fig-deadspace img`))
	// The plot rendered (the browser decoded the SVG) with the store's
	// number of points.
	rendered, err := chromedp.Run(bctx, chromedp.Evaluate[bool](`(() => { const i = document.querySelector('#fig-deadspace img'); return i.complete && i.naturalWidth > 0; })()`))
	if err != nil {
		t.Fatal(err)
	}
	areas, err := chromedp.Run(bctx, chromedp.Evaluate[int](`document.querySelectorAll('#fig-deadspace area').length`))
	if err != nil {
		t.Fatal(err)
	}
	want := cs.scalar(t, ctx, currentValuesSQL, patient, deadSpaceKinds)
	if !rendered || areas != want || want == 0 {
		t.Fatalf("dead-space plot: rendered %v with %d points; the store has %d current values", rendered, areas, want)
	}
	screenshot(t, bctx, screens, "patient")

	// Click the last point of the plot: a real mouse click on the image.
	pt := plotPoint(t, bctx, "deadspace", areas-1)
	do("click the point", chromedp.MouseClickXY(pt.X, pt.Y), chromedp.WaitVisible(`section.version`))
	loc := location()
	if loc != pt.Href {
		t.Fatalf("clicked %q, landed on %s, want %s", pt.Title, loc, pt.Href)
	}
	u, _ := url.Parse(loc)
	key := u.Query().Get("key")
	var version int
	var published *string
	var basis, unit string
	var stored []byte
	if err := cs.adminPool.QueryRow(ctx, `SELECT d.version, d.basis, d.unit, o.stored_payload
		FROM head h JOIN derivation d ON d.id = h.derivation_id
		JOIN outbox o ON o.msg_id = 'Observation/' || d.observation_id || '/_history/' || d.version
		WHERE d.observation_id::text = $1 OR h.key = $1`, key).Scan(&version, &basis, &unit, &stored); err != nil {
		t.Fatal(err)
	}
	// Stored compressed since migration 0018 (the embedded outbox
	// dictionary decodes it); the published value is in valueQuantity.
	if raw, err := rawcodec.Outbox().Decode(stored); err != nil {
		t.Fatal(err)
	} else {
		var obs struct {
			ValueQuantity *struct {
				Value json.Number `json:"value"`
			} `json:"valueQuantity"`
		}
		d := json.NewDecoder(bytes.NewReader(raw))
		d.UseNumber()
		if err := d.Decode(&obs); err != nil {
			t.Fatal(err)
		}
		if obs.ValueQuantity != nil {
			v := obs.ValueQuantity.Value.String()
			published = &v
		}
	}
	shownValue := text(`#value-` + strconv.Itoa(version))
	shownBasis := text(`#basis-` + strconv.Itoa(version))
	if published == nil || strings.Fields(shownValue)[0] != *published {
		t.Errorf("value page shows %q, the published Observation %v", shownValue, published)
	}
	if strings.TrimSpace(shownBasis) != basis {
		t.Errorf("value page basis %q, stored %q", shownBasis, basis)
	}
	if !strings.Contains(pt.Title, strings.Fields(shownValue)[0]) {
		t.Errorf("the point's title %q does not carry the value %q it opens", pt.Title, shownValue)
	}
	screenshot(t, bctx, screens, "value")

	// The site settings in force, as the browser shows them for this
	// version, against the snapshot the store holds for it: the display
	// units are the test's own reading of the stored JSON (mL, mmHg, the
	// window's nanoseconds in minutes).
	var digest, siteJSON string
	if err := cs.adminPool.QueryRow(ctx, `SELECT s.digest, (s.snapshot::jsonb -> 'site')::text FROM derivation d
		JOIN site_settings s ON s.digest = d.settings_digest WHERE d.key = $1 AND d.version = $2`,
		cs.text(t, ctx, `SELECT key FROM derivation WHERE observation_id::text = $1 OR key = $1 LIMIT 1`, key), version).Scan(&digest, &siteJSON); err != nil {
		t.Fatal(err)
	}
	var site struct {
		ApparatusDeadSpaceML float64
		TargetPaCO2mmHg      float64
		Window               struct{ Before, After int64 }
	}
	if err := json.Unmarshal([]byte(siteJSON), &site); err != nil {
		t.Fatal(err)
	}
	leaves := settingLeaves(t, []byte(siteJSON))
	shown, err := chromedp.Run(bctx, chromedp.Evaluate[map[string]string](fmt.Sprintf(`Object.fromEntries(Array.from(
		document.querySelectorAll('#version-%d dd.setting')).map(d => [d.dataset.setting, d.textContent]))`, version)))
	if err != nil {
		t.Fatal(err)
	}
	wantSettings := map[string]string{
		"ApparatusDeadSpaceML": strconv.FormatFloat(site.ApparatusDeadSpaceML, 'f', -1, 64) + " mL",
		"TargetPaCO2mmHg":      strconv.FormatFloat(site.TargetPaCO2mmHg, 'f', -1, 64) + " mmHg",
		"Window.Before":        strconv.FormatInt(site.Window.Before/int64(time.Minute), 10) + " min",
		"Window.After":         strconv.FormatInt(site.Window.After/int64(time.Minute), 10) + " min",
	}
	for name, want := range wantSettings {
		if shown[name] != want {
			t.Errorf("value page setting %s: %q, the store's snapshot gives %q", name, shown[name], want)
		}
	}
	// Every stored setting is shown (an object such as the window as its
	// members).
	if len(shown) != leaves {
		t.Errorf("value page shows %d settings, the snapshot holds %d", len(shown), leaves)
	}
	do("open the settings snapshot", chromedp.Click(fmt.Sprintf(`#version-%d a.settings-link`, version)), chromedp.WaitVisible(`#settings-digest`))
	if got := text(`#settings-digest`); got != digest {
		t.Errorf("the settings link opened snapshot %q, the version's is %q", got, digest)
	}
	rowsShown, err := chromedp.Run(bctx, chromedp.Evaluate[int](`document.querySelectorAll('#table-settings tbody tr').length`))
	if err != nil {
		t.Fatal(err)
	}
	if rowsShown != leaves {
		t.Errorf("settings page lists %d settings, the snapshot holds %d", rowsShown, leaves)
	}
	screenshot(t, bctx, screens, "settings")

	// Refusal and retraction marks: as many as the store's current ones;
	// a retraction mark opens a page that shows the retraction.
	do("open the patient again", chromedp.Navigate(base+"/patients/"+pid), chromedp.WaitVisible(`#fig-marks img`))
	marks, err := chromedp.Run(bctx, chromedp.Evaluate[[]string](`Array.from(document.querySelectorAll('#fig-marks area')).map(a => a.dataset.series)`))
	if err != nil {
		t.Fatal(err)
	}
	refused, retracted := 0, -1
	for i, m := range marks {
		switch m {
		case "refused":
			refused++
		case "retracted":
			if retracted < 0 {
				retracted = i
			}
		}
	}
	if wantR := cs.scalar(t, ctx, currentRefusalsSQL, patient); refused != wantR {
		t.Errorf("%d refusal marks, the store has %d current refusals", refused, wantR)
	}
	if retracted < 0 {
		t.Fatalf("no retraction mark for %s, which has %d retracted values", patient, cs.scalar(t, ctx, currentRetractionsSQL, patient))
	}
	pt = plotPoint(t, bctx, "marks", retracted)
	do("click the retraction mark", chromedp.MouseClickXY(pt.X, pt.Y), chromedp.WaitVisible(`section.version`))
	loc = location()
	retractedText := text(`main`)
	if loc != pt.Href || !strings.Contains(retractedText, "entered-in-error") || !strings.Contains(retractedText, "retracted: published without a value") {
		t.Errorf("the retraction mark led to %s, which does not show the retraction", loc)
	}

	// A refusal page.
	refusalKey := cs.text(t, ctx, `SELECT key FROM head WHERE refused AND patient_ref = $1 ORDER BY key LIMIT 1`, patient)
	do("open a refusal", chromedp.Navigate(base+"/values?key="+url.QueryEscape(refusalKey)), chromedp.WaitVisible(`section.refusal`))
	if reason, want := text(`section.refusal .reason`), cs.text(t, ctx, `SELECT r.reason FROM head h JOIN refusal r ON r.id = h.refusal_id WHERE h.key = $1`, refusalKey); reason != want {
		t.Errorf("refusal page reason %q, stored %q", reason, want)
	}
	screenshot(t, bctx, screens, "refusal")

	// Quality pages, the report, and the CSV link of a table.
	for _, p := range []struct{ path, name, wait string }{
		{"/quality/refusals", "quality-refusals", `#fig-refusals img`},
		{"/quality/deadletters", "quality-deadletters", `#table-deadletters`},
		{"/quality/changes", "quality-changes", `#table-changes`},
		{"/quality/discrepancies?threshold=3", "quality-discrepancies", `#table-discrepancies`},
		{"/patients/" + pid + "/report", "report", `#fig-deadspace img`},
	} {
		do(p.path, chromedp.Navigate(base+p.path), chromedp.WaitVisible(p.wait))
		screenshot(t, bctx, screens, p.name)
	}
	// The report prints: under print media the navigation and forms are
	// gone, the banner, plots and values stay; Chromium makes a PDF of it.
	media := func(m string) chromedp.Action[chromedp.Void] {
		return chromedp.Func(func(ctx context.Context, tg *chromedp.Target) error {
			_, err := cdp.Call(ctx, tg, emulation.SetEmulatedMedia, emulation.SetEmulatedMediaParams{Media: m})
			return err
		})
	}
	do("print media", media("print"))
	printed, err := chromedp.Run(bctx, chromedp.Evaluate[[]string](`[getComputedStyle(document.querySelector('header')).display,
		getComputedStyle(document.querySelector('#advisory')).display,
		getComputedStyle(document.querySelector('#fig-deadspace')).display,
		getComputedStyle(document.querySelector('#table-values')).display]`))
	if err != nil {
		t.Fatal(err)
	}
	if printed[0] != "none" || printed[1] == "none" || printed[2] == "none" || printed[3] == "none" {
		t.Errorf("printed report: header, banner, plot, values displayed as %v; want the header alone hidden", printed)
	}
	pdf, err := chromedp.Run(bctx, func(ctx context.Context, tg *chromedp.Target) ([]byte, error) {
		r, err := cdp.Call(ctx, tg, page.PrintToPDF, page.PrintToPDFParams{})
		if err != nil {
			return nil, err
		}
		return r.Data, nil
	})
	if err != nil || !bytes.HasPrefix(pdf, []byte("%PDF")) {
		t.Errorf("report as PDF: %v (%d bytes)", err, len(pdf))
	} else if err := os.WriteFile(filepath.Join(screens, "report.pdf"), pdf, 0o644); err != nil {
		t.Fatal(err)
	}
	do("screen media", media(""))

	do("open the changes", chromedp.Navigate(base+"/quality/changes"), chromedp.WaitVisible(`#csv-changes`))
	csvHref, err := chromedp.Run(bctx, chromedp.Evaluate[string](`document.querySelector('#csv-changes').href`))
	if err != nil {
		t.Fatal(err)
	}
	resp, body := get(t, http.DefaultClient, csvHref)
	if resp.StatusCode != 200 || !strings.HasPrefix(body, "blood-gas time,patient,kind") {
		t.Errorf("the page's CSV link %s: status %d, %.80q", csvHref, resp.StatusCode, body)
	}
	if n := strings.Count(body, "\n") - 1; n != cs.scalar(t, ctx, `SELECT count(*) FROM derivation d JOIN derivation p ON p.id = d.supersedes_id
		WHERE d.status IN ('amended','corrected','entered-in-error') OR d.value <> p.value OR d.status <> p.status`) {
		t.Errorf("the CSV has %d changes, the store another number", n)
	}

	// Beyond loopback, a request without authentication is refused.
	srv, err := review.New(nil, review.Config{Loopback: false, ProxyHeader: "X-Forwarded-User",
		TrustedProxies: []netip.Prefix{netip.MustParsePrefix("127.0.0.0/8")}})
	if err != nil {
		t.Fatal(err)
	}
	guarded := httptest.NewServer(srv)
	defer guarded.Close()
	r, err := chromedp.RunResponse(bctx, chromedp.Navigate(guarded.URL+"/patients"))
	if err != nil {
		t.Fatal(err)
	}
	if page := text(`body`); r == nil || r.Status != 401 || !strings.Contains(page, "authentication required") {
		t.Errorf("unauthenticated request beyond loopback: response %v, page %q", r, page)
	}
}

// settingLeaves counts the settings of a snapshot's site JSON, an object's
// members counted one by one.
func settingLeaves(t *testing.T, raw []byte) int {
	t.Helper()
	var m map[string]json.RawMessage
	if err := json.Unmarshal(raw, &m); err != nil {
		t.Fatal(err)
	}
	n := 0
	for _, v := range m {
		if bytes.HasPrefix(bytes.TrimSpace(v), []byte("{")) {
			n += settingLeaves(t, v)
		} else {
			n++
		}
	}
	return n
}
