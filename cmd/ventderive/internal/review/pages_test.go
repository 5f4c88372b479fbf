package review

import (
	"net/url"
	"testing"
	"time"
)

func TestPeriod(t *testing.T) {
	at := func(s string) time.Time { v, _ := time.Parse(time.RFC3339, s); return v }
	for _, tc := range []struct {
		name     string
		from, to string
		wantFrom time.Time
		wantTo   time.Time
		bad      bool
	}{
		{name: "open"},
		{name: "RFC 3339 with offset, read as UTC", from: "2026-03-02T08:00:00+01:00", wantFrom: at("2026-03-02T07:00:00Z")},
		{name: "form local time is UTC", from: "2026-03-02T06:00", to: "2026-03-02T12:00", wantFrom: at("2026-03-02T06:00:00Z"), wantTo: at("2026-03-02T12:00:00Z")},
		{name: "date", to: "2026-03-03", wantTo: at("2026-03-03T00:00:00Z")},
		{name: "from after to", from: "2026-03-03", to: "2026-03-02", bad: true},
		{name: "from equal to", from: "2026-03-02", to: "2026-03-02", bad: true},
		{name: "words", from: "yesterday", bad: true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			from, to, err := period(url.Values{"from": {tc.from}, "to": {tc.to}})
			if tc.bad {
				if err == nil {
					t.Fatalf("period(%q, %q): no error", tc.from, tc.to)
				}
				return
			}
			if err != nil || !from.Equal(tc.wantFrom) || !to.Equal(tc.wantTo) {
				t.Errorf("period(%q, %q) = %v, %v, %v", tc.from, tc.to, from, to, err)
			}
		})
	}
}

func TestDisplayUnit(t *testing.T) {
	// Human text uses display units, never UCUM codes (common practice of
	// this project: README "Patient safety").
	for ucum, want := range map[string]string{"mm[Hg]": "mmHg", "{breaths}/min": "/min", "1": "", "L/min": "L/min"} {
		if got := displayUnit(ucum); got != want {
			t.Errorf("displayUnit(%q) = %q, want %q", ucum, got, want)
		}
	}
}
