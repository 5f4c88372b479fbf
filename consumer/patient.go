package consumer

import (
	"crypto/hmac"
	"crypto/sha256"
	"encoding/hex"
)

// PatientHash is the keyed hash of a patient reference used in logs, metrics
// labels never, and store lookups: HMAC-SHA256 with the site's secret key,
// hex, first 32 characters (128 bits). Without the key the hash cannot be
// reversed by trying known identifiers.
func PatientHash(key []byte, patientRef string) string {
	m := hmac.New(sha256.New, key)
	m.Write([]byte(patientRef))
	return hex.EncodeToString(m.Sum(nil))[:32]
}
