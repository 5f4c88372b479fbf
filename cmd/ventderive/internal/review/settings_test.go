package review

import (
	"encoding/json"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// TestSiteSettings reads a snapshot made by the service's own encoder
// (consumer.Settings.Snapshot) and checks each setting's display unit: mL
// for the apparatus dead space, mmHg for the target, minutes for the
// window's members (Go durations, stored in ns), the energy equation by
// its published name; a setting the page does not know stays as stored.
func TestSiteSettings(t *testing.T) {
	site := fhirmap.DefaultSite()
	site.ApparatusDeadSpaceML, site.ApparatusDeadSpaceConfigured = 75.5, true
	site.TargetPaCO2mmHg = 42
	site.Window = fhirmap.Window{Before: 45 * time.Minute, After: 90 * time.Second}
	snap, err := consumer.Settings{Algorithm: fhirmap.Algorithm, Site: site}.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	var whole struct{ Site json.RawMessage }
	if err := json.Unmarshal(snap.JSON, &whole); err != nil {
		t.Fatal(err)
	}
	lines, err := siteSettings(whole.Site)
	if err != nil {
		t.Fatal(err)
	}
	got := map[string]string{}
	for _, l := range lines {
		got[l.Name] = l.Value
	}
	for name, want := range map[string]string{
		"ApparatusDeadSpaceML":         "75.5 mL",
		"ApparatusDeadSpaceConfigured": "true",
		"TargetPaCO2mmHg":              "42 mmHg",
		"Window.Before":                "45 min",
		"Window.After":                 "1.5 min",
		"Energy":                       "Harris-Benedict 1919 (1)",
		"RQ":                           "0.8",
		"Device":                       fhirmap.DefaultDevice,
	} {
		if got[name] != want {
			t.Errorf("%s: %q, want %q", name, got[name], want)
		}
	}

	site.TargetPaCO2mmHg = 0
	snap, err = consumer.Settings{Algorithm: fhirmap.Algorithm, Site: site}.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(snap.JSON, &whole); err != nil {
		t.Fatal(err)
	}
	lines, _ = siteSettings(whole.Site)
	for _, l := range lines {
		if l.Name == "TargetPaCO2mmHg" && l.Value != "not configured (0)" {
			t.Errorf("target 0: %q, want it said not configured", l.Value)
		}
	}

	unknown, err := siteSettings(json.RawMessage(`{"NewSettingX":[1,2],"Nested":{"Depth":{"Leaf":"a"}}}`))
	if err != nil {
		t.Fatal(err)
	}
	if len(unknown) != 2 || unknown[0] != (settingLine{"Nested.Depth.Leaf", "a"}) || unknown[1] != (settingLine{"NewSettingX", "[1,2]"}) {
		t.Errorf("unknown settings shown as %+v; want them as stored, by their full name", unknown)
	}
}
