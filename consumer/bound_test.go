package consumer

import (
	"strings"
	"testing"

	"github.com/ventderive/ventderive/fhirmap"
)

// Dead-letter details go into a NATS header, a log line and the
// dead-letter table: bounded, one line, printable ASCII.
func TestBoundText(t *testing.T) {
	for _, tc := range []struct {
		name, in string
		n        int
		want     string
	}{
		{"short kept", "Observation.valueQuantity.code", 64, "Observation.valueQuantity.code"},
		{"line breaks cannot split a header", "a\r\nNats-Msg-Id: x", 64, "a??Nats-Msg-Id: x"},
		{"non-ASCII replaced byte for byte", "é", 64, "??"},
		{"long cut with ellipsis", strings.Repeat("x", 100), 10, "xxxxxxx..."},
		{"exactly n kept", strings.Repeat("x", 10), 10, strings.Repeat("x", 10)},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if got := boundText(tc.in, tc.n); got != tc.want || len(got) > tc.n {
				t.Errorf("boundText(%q, %d) = %q, want %q", tc.in, tc.n, got, tc.want)
			}
		})
	}
}

// A malformed-json dead letter says where the JSON broke (the decoder knows
// the byte offset), and every detail is bounded.
func TestDecodeReasonDetail(t *testing.T) {
	_, err := fhirmap.Decode([]byte(`{"resourceType":"Observation","id":"x",`), nil)
	reason, detail := decodeReason(err)
	if reason != "malformed-json" || !strings.Contains(detail, "byte") {
		t.Errorf("got %s %q, want malformed-json with the byte offset", reason, detail)
	}
	_, err = fhirmap.Decode([]byte(`{"resourceType":"Observation","`+strings.Repeat("k", 5000)+`":1}`), nil)
	reason, detail = decodeReason(err)
	if reason != "unknown-field" || len(detail) > MaxDetailBytes || strings.Contains(detail, strings.Repeat("k", 100)) {
		t.Errorf("got %s %q (%d bytes): want unknown-field, bounded, without the whole key", reason, detail, len(detail))
	}
}
