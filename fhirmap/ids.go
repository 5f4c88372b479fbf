package fhirmap

import (
	"crypto/sha256"
	"encoding/hex"
	"hash"
	"math"
	"strconv"

	"github.com/google/uuid"
)

// Algorithm is the version of the selection and derivation rules of this
// package. It is recorded on every Derivation, in Observation.method and as
// the Provenance policy. Raise it when a rule changes the value or the
// inputs a derivation uses, so that a reviewer can tell results apart.
const Algorithm = "ventderive-derive/3"

// IDNamespace is the UUID namespace of the service's resource ids. It was
// generated once at random for this service and must never change: it makes
// Observation and Provenance ids stable across runs and replicas
// (RFC 9562 name-based UUID, version 5, SHA-1).
var IDNamespace = uuid.MustParse("eddb89a8-78c1-4d8d-bdb6-4a7b77357bf9")

// DerivationID returns the Observation id of a derivation key: the version 5
// UUID of the key in IDNamespace. The same key always gives the same id, so
// a recomputation updates the same Observation.
func DerivationID(key string) string {
	return uuid.NewSHA1(IDNamespace, []byte(key)).String()
}

// ProvenanceID returns the Provenance id of one version of a derivation: the
// version 5 UUID of "provenance|<key>|<version>" in IDNamespace.
func ProvenanceID(key string, version int) string {
	return uuid.NewSHA1(IDNamespace, []byte("provenance|"+key+"|"+strconv.Itoa(version))).String()
}

// uuidOf returns the version 5 UUID of name in IDNamespace.
func uuidOf(name string) string { return uuid.NewSHA1(IDNamespace, []byte(name)).String() }

// DerivationKey returns "<patient>|<bloodGasKey>|<kind>", the identity of a
// derivation (and of the refusal that stands in its place).
func DerivationKey(patient, bloodGasKey, kind string) string {
	return patient + "|" + bloodGasKey + "|" + kind
}

// Seal fills d.Digest: the hex SHA-256 over the kind, the value rounded to
// the kind's output precision (Catalogue, KindInfo.Decimals), the unit, the
// status and each input's role, key and digest, in order. Call it again
// after changing any of these (the service does, after setting an amended
// or corrected status). Each field is length-prefixed so that no two
// different contents hash alike.
func (d *Derivation) Seal() {
	h := sha256.New()
	field(h, "derivation")
	field(h, d.Kind)
	field(h, FormatValue(d.Kind, d.Result.Value))
	field(h, d.Result.Unit)
	field(h, string(d.Status))
	writeInputs(h, d.Inputs)
	d.Digest = hex.EncodeToString(h.Sum(nil))
}

// Seal fills r.Digest: the hex SHA-256 over the kind, the reason and each
// considered input's role, key and digest. The detail text is not part of
// it: it is rendered from the same inputs.
func (r *Refusal) Seal() {
	h := sha256.New()
	field(h, "refusal")
	field(h, r.Kind)
	field(h, r.Reason)
	writeInputs(h, r.Considered)
	r.Digest = hex.EncodeToString(h.Sum(nil))
}

func writeInputs(h hash.Hash, in []Input) {
	field(h, strconv.Itoa(len(in)))
	for _, i := range in {
		field(h, string(i.Role))
		field(h, i.Fact.Key)
		field(h, i.Fact.Digest)
	}
}

func field(h hash.Hash, s string) {
	h.Write([]byte(strconv.Itoa(len(s))))
	h.Write([]byte{':'})
	h.Write([]byte(s))
}

// FormatValue renders v with the output precision of kind (KindInfo.Decimals;
// 4 decimals for an unknown kind), as written to valueQuantity.value and
// hashed into the digest. Negative zero is written as 0.
func FormatValue(kind string, v float64) string {
	dec := 4
	if k, ok := LookupKind(kind); ok {
		dec = k.Decimals
	}
	p := math.Pow10(dec)
	r := math.Round(v*p) / p
	if r == 0 {
		r = 0 // drop the sign of -0
	}
	return strconv.FormatFloat(r, 'f', dec, 64)
}
