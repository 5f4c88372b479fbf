package review

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"net/http"
	"net/url"
	"regexp"
	"slices"
	"strconv"
	"strings"

	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/physio"
)

// settingLine is one site setting of a snapshot as a person reads it.
type settingLine struct {
	Name  string // the setting's name in the snapshot (fhirmap.Site), "Window.Before" for a member
	Value string // with its display unit
}

// settingsView is the snapshot a version or refusal was made under, as the
// value page shows it; None says why there is none.
type settingsView struct {
	Digest      string
	Algorithm   string
	AliasDigest string
	Href        string
	Settings    []settingLine
	None        string
}

// noSnapshot is what the page says of a version or refusal without one.
const noSnapshot = "none recorded: made before the store kept settings snapshots (migration 0006) or by another planner; its settings are only in the basis and inputs below"

func settingsHref(digest string) string {
	return "/settings?" + url.Values{"digest": {digest}}.Encode()
}

// settingsFor reads the snapshot digest names (once per page: cache).
func (s *Server) settingsFor(r *http.Request, digest string, cache map[string]*settingsView) (*settingsView, error) {
	if digest == "" {
		return &settingsView{None: noSnapshot}, nil
	}
	if v, ok := cache[digest]; ok {
		return v, nil
	}
	rec, err := s.store.Settings(r.Context(), digest)
	if errors.Is(err, postgres.ErrNotFound) {
		v := &settingsView{Digest: digest, None: "the snapshot " + digest + " is not in the store"}
		cache[digest] = v
		return v, nil
	}
	if err != nil {
		return nil, err
	}
	lines, err := siteSettings(rec.Site)
	if err != nil {
		return nil, fmt.Errorf("settings %s: %w", digest, err)
	}
	v := &settingsView{Digest: rec.Digest, Algorithm: rec.Algorithm, AliasDigest: rec.AliasDigest,
		Href: settingsHref(rec.Digest), Settings: lines}
	cache[digest] = v
	return v, nil
}

// siteSettings lists every setting of a snapshot's site, by name, in
// display units: the names end in their unit (ApparatusDeadSpaceML in mL,
// TargetPaCO2mmHg in mmHg), and the members of a window (Go durations,
// stored in nanoseconds) are shown in minutes. A setting this page does not
// know is shown as stored, so a setting added later is never hidden.
func siteSettings(site json.RawMessage) ([]settingLine, error) {
	var out []settingLine
	var walk func(prefix string, raw json.RawMessage, window bool) error
	walk = func(prefix string, raw json.RawMessage, window bool) error {
		var m map[string]json.RawMessage
		if err := json.Unmarshal(raw, &m); err != nil {
			return err
		}
		names := make([]string, 0, len(m))
		for n := range m {
			names = append(names, n)
		}
		slices.Sort(names)
		for _, n := range names {
			v := m[n]
			name := prefix + n
			if strings.HasPrefix(strings.TrimSpace(string(v)), "{") {
				if err := walk(name+".", v, window || strings.Contains(n, "Window")); err != nil {
					return err
				}
				continue
			}
			out = append(out, settingLine{Name: name, Value: settingValue(n, v, window)})
		}
		return nil
	}
	if err := walk("", site, false); err != nil {
		return nil, err
	}
	return out, nil
}

var unitSuffix = regexp.MustCompile(`(ML|mmHg)$`)

func settingValue(name string, raw json.RawMessage, window bool) string {
	var s string
	if json.Unmarshal(raw, &s) == nil {
		if s == "" {
			return "(empty)"
		}
		return s
	}
	f, err := strconv.ParseFloat(strings.TrimSpace(string(raw)), 64)
	if err != nil {
		return string(raw)
	}
	switch {
	case window:
		return shownNumber(f/6e10) + " min"
	case name == "TargetPaCO2mmHg" && f == 0:
		return "not configured (0)"
	case name == "Energy" && f == math.Trunc(f) && f >= 0 && f < 256:
		return physio.EnergyEquation(f).String() + " (" + shownNumber(f) + ")"
	}
	switch unitSuffix.FindString(name) {
	case "ML":
		return shownNumber(f) + " mL"
	case "mmHg":
		return shownNumber(f) + " mmHg"
	}
	return shownNumber(f)
}

// settings lists one whole snapshot: GET /settings?digest=<sha-256>.
func (s *Server) settings(w http.ResponseWriter, r *http.Request) {
	digest := r.URL.Query().Get("digest")
	if len(digest) != 64 || strings.Trim(digest, "0123456789abcdef") != "" {
		badRequest(w, "digest: want a settings digest (64 lower-case hex digits)")
		return
	}
	rec, err := s.store.Settings(r.Context(), digest)
	if errors.Is(err, postgres.ErrNotFound) {
		http.Error(w, "no settings snapshot with that digest", http.StatusNotFound)
		return
	}
	if err != nil {
		s.fail(w, r, err)
		return
	}
	lines, err := siteSettings(rec.Site)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	t := &Table{ID: "settings", Title: "Site settings", Columns: []string{"setting", "value"}}
	for _, l := range lines {
		t.add(txt(l.Name), txt(l.Value))
	}
	s.render(w, r, "settings.html", &page{Title: "Settings snapshot " + digest[:12], Nav: "patients", Tables: []*Table{t},
		Data: map[string]any{"Record": rec}})
}

// settingsSummary is one line of the value page's heading: a snapshot and
// the versions and refusals made under it.
type settingsSummary struct {
	Who    string // "version 1, version 2, refusal 7"
	Digest string // "" when none was recorded
	Href   string
	Text   string // the settings that change values most, or why there is none
}

// summarise groups the snapshots of a page by digest, in order of first use.
func summarise(who []string, views []*settingsView) []settingsSummary {
	var out []settingsSummary
	at := map[string]int{}
	for i, v := range views {
		k := v.Digest
		if j, ok := at[k]; ok {
			out[j].Who += ", " + who[i]
			continue
		}
		at[k] = len(out)
		sum := settingsSummary{Who: who[i], Digest: v.Digest, Href: v.Href, Text: v.None}
		if v.None == "" {
			sum.Text = v.short()
		}
		out = append(out, sum)
	}
	return out
}

// short names the apparatus dead space, the target and the window.
func (v *settingsView) short() string {
	get := map[string]string{}
	for _, l := range v.Settings {
		get[l.Name] = l.Value
	}
	var parts []string
	if get["ApparatusDeadSpaceConfigured"] == "false" {
		parts = append(parts, "apparatus dead space not configured")
	} else if x, ok := get["ApparatusDeadSpaceML"]; ok {
		parts = append(parts, "apparatus dead space "+x)
	}
	if x, ok := get["TargetPaCO2mmHg"]; ok {
		parts = append(parts, "target PaCO2 "+x)
	}
	if b, ok := get["Window.Before"]; ok {
		parts = append(parts, "window "+b+" before to "+get["Window.After"]+" after the blood gas")
	}
	return strings.Join(parts, "; ") + " (" + v.Algorithm + ")"
}
