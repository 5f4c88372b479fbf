package consumer

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"

	"github.com/ventderive/ventderive/fhirmap"
)

// Settings is the site-settings snapshot a derivation or refusal was made
// under: every setting that can change a value (the whole fhirmap.Site
// that selection, derivation and encoding read), the SHA-256 of the code
// alias file that mapped the inputs ("" for none) and the algorithm
// version. The provenance store keeps each distinct snapshot once, keyed
// by Digest, and every derivation version and refusal names its snapshot.
//
// The Site is encoded whole with encoding/json (exported fields by name,
// in declaration order, durations in nanoseconds), so a setting added to
// fhirmap.Site later is part of the snapshot without any change here or
// in the schema.
type Settings struct {
	Algorithm   string       `json:"algorithm"`
	AliasDigest string       `json:"aliasDigest"`
	Site        fhirmap.Site `json:"site"`
}

// SettingsSnapshot is a Settings in its stored form: the exact bytes and
// their hex SHA-256.
type SettingsSnapshot struct {
	JSON   []byte
	Digest string
}

// Snapshot encodes s canonically: encoding/json output, which is
// deterministic for a struct (map keys, were a setting to become a map,
// are sorted).
func (s Settings) Snapshot() (SettingsSnapshot, error) {
	b, err := json.Marshal(s)
	if err != nil {
		return SettingsSnapshot{}, fmt.Errorf("encode settings: %w", err)
	}
	sum := sha256.Sum256(b)
	return SettingsSnapshot{JSON: b, Digest: hex.EncodeToString(sum[:])}, nil
}

// ParseSettings reads a stored snapshot. The site starts from
// fhirmap.DefaultSite, so a setting the snapshot predates takes its
// default; the algorithm version says whether this build may re-derive
// under it at all.
func ParseSettings(b []byte) (Settings, error) {
	s := Settings{Site: fhirmap.DefaultSite()}
	if err := json.Unmarshal(b, &s); err != nil {
		return Settings{}, fmt.Errorf("parse settings snapshot: %w", err)
	}
	return s, nil
}
