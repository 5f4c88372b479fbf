package consumer

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/fhirmap"
)

// TestSettingsSnapshot checks the stored form of the site settings: every
// exported field of fhirmap.Site is in it (so a setting added later is
// recorded without any change here), it parses back to the same Site, its
// digest is the SHA-256 of its bytes (FIPS 180-4, crypto/sha256), it names
// the algorithm and the alias file's digest, and a planner puts it on
// every plan that records something.
func TestSettingsSnapshot(t *testing.T) {
	site := fhirmap.DefaultSite()
	site.ApparatusDeadSpaceML, site.ApparatusDeadSpaceConfigured = 35, true
	site.TargetPaCO2mmHg = 42
	site.Window.Before = 20 * time.Minute
	alias := strings.Repeat("c", 64)
	p := Planner{Site: site, ObservationSub: "o", ProvenanceSub: "p", AliasDigest: alias}
	snap, err := p.Settings()
	if err != nil {
		t.Fatal(err)
	}
	sum := sha256.Sum256(snap.JSON)
	if snap.Digest != hex.EncodeToString(sum[:]) {
		t.Errorf("digest %s is not the SHA-256 of the bytes", snap.Digest)
	}
	var raw struct {
		Algorithm   string                     `json:"algorithm"`
		AliasDigest string                     `json:"aliasDigest"`
		Site        map[string]json.RawMessage `json:"site"`
	}
	if err := json.Unmarshal(snap.JSON, &raw); err != nil {
		t.Fatal(err)
	}
	if raw.Algorithm != fhirmap.Algorithm || raw.AliasDigest != alias {
		t.Errorf("snapshot names algorithm %q and alias %q", raw.Algorithm, raw.AliasDigest)
	}
	st := reflect.TypeOf(fhirmap.Site{})
	for i := range st.NumField() {
		if f := st.Field(i); f.IsExported() {
			if _, ok := raw.Site[f.Name]; !ok {
				t.Errorf("setting %s is not in the snapshot", f.Name)
			}
		}
	}
	back, err := ParseSettings(snap.JSON)
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(back.Site, site) || back.AliasDigest != alias {
		t.Errorf("snapshot parses to %+v, want %+v", back.Site, site)
	}
	// Another setting, another snapshot; the same settings, the same bytes.
	other := p
	other.Site.RQ = 0.85
	if o, _ := other.Settings(); o.Digest == snap.Digest {
		t.Error("a changed RQ gives the same snapshot digest")
	}
	if again, _ := p.Settings(); again.Digest != snap.Digest {
		t.Error("the same settings give another digest")
	}

	// A plan that records something carries the snapshot.
	bg := fhirmap.Fact{Key: "Observation/abg-s1", Resource: "Observation/abg-s1", VersionID: "1", Digest: strings.Repeat("d", 64),
		Patient: "Patient/lg-icu-0009", Quantity: fhirmap.QPCO2, Specimen: fhirmap.SpecimenVenous, Value: 50, Unit: "mm[Hg]",
		Status: fhirmap.StatusFinal, Effective: time.Date(2026, 3, 1, 8, 0, 0, 0, time.UTC)}
	ch, err := p.Plan(Snapshot{Patient: bg.Patient, Facts: []fhirmap.Fact{bg}, Affected: []string{bg.Key}}, bg.Effective)
	if err != nil {
		t.Fatal(err)
	}
	if len(ch.Refusals) == 0 || ch.Settings.Digest != snap.Digest {
		t.Errorf("plan of a venous gas: %d refusals, settings %q; want refusals under %s", len(ch.Refusals), ch.Settings.Digest, snap.Digest)
	}
}
