package fhirmap

import (
	"testing"
	"time"
)

// TestParseZonedTime follows the FHIR R4 dateTime and instant formats
// (hl7.org/fhir/R4/datatypes.html#dateTime): when a time is given it has
// seconds and a zone; this service also requires the time.
func TestParseZonedTime(t *testing.T) {
	cases := []struct {
		in   string
		want string // RFC 3339 in UTC, "" when refused
	}{
		{"2026-11-20T08:15:00Z", "2026-11-20T08:15:00Z"},
		{"2026-11-20T08:15:00+01:00", "2026-11-20T07:15:00Z"},
		{"2026-11-20T08:15:00-05:30", "2026-11-20T13:45:00Z"},
		{"2026-11-20T08:15:00.123Z", "2026-11-20T08:15:00.123Z"},
		{"2026-11-20T23:30:00-02:00", "2026-11-21T01:30:00Z"},
		{"2026-11-20T08:15:00", ""},  // no zone
		{"2026-11-20T08:15Z", ""},    // no seconds
		{"2026-11-20", ""},           // date only
		{"2026-11", ""},              // month only
		{"2026", ""},                 // year only
		{"2026-13-20T08:15:00Z", ""}, // no month 13
		{"2026-11-20T24:00:00Z", ""}, // no hour 24
		{"2026-11-20 08:15:00Z", ""}, // space instead of T
		{"20261120T081500Z", ""},     // basic ISO 8601 format is not FHIR
		{"2026-11-20T08:15:60Z", ""}, // leap second: FHIR allows it, refused (rare, and Go cannot represent it)
		{"", ""},
	}
	for _, c := range cases {
		t.Run(c.in, func(t *testing.T) {
			got, err := parseZonedTime(c.in)
			if c.want == "" {
				if err == nil {
					t.Fatalf("accepted as %v", got)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if got.Location() != time.UTC || got.Format(time.RFC3339Nano) != c.want {
				t.Fatalf("got %v", got)
			}
		})
	}
}

func TestParseDate(t *testing.T) {
	for in, ok := range map[string]bool{"1961": true, "1961-04": true, "1961-04-30": true, "1961-04-31": false,
		"1961-4-3": false, "61": false, "1961-04-30T00:00:00Z": false, "": false} {
		t.Run(in, func(t *testing.T) {
			if _, err := parseDate(in); (err == nil) != ok {
				t.Fatalf("err %v, want ok=%v", err, ok)
			}
		})
	}
}

// Times out of any plausible range and zone offsets no place on Earth uses
// are refused (offsets: IANA time zone database, -12:00 to +14:00).
func TestTimeBounds(t *testing.T) {
	for _, c := range []struct {
		in string
		ok bool
	}{
		{"9999-12-31T23:59:59Z", false},
		{"2100-01-01T00:00:00Z", false},
		{"2099-12-31T23:59:59Z", true},
		{"1900-01-01T00:00:00Z", true},
		{"1899-12-31T23:59:59Z", false},
		{"0001-01-01T00:00:00Z", false},
		{"2026-11-20T08:15:00+14:00", true},
		{"2026-11-20T08:15:00+14:59", false},
		{"2026-11-20T08:15:00-12:00", true},
		{"2026-11-20T08:15:00-12:30", false},
		{"2026-11-20T08:15:00+05:45", true},
		{"2026-11-20T08:15:00+23:59", false},
	} {
		t.Run(c.in, func(t *testing.T) {
			if _, err := parseZonedTime(c.in); (err == nil) != c.ok {
				t.Fatalf("err %v, want ok=%v", err, c.ok)
			}
		})
	}
	for in, ok := range map[string]bool{"1899": false, "1900": true, "2099-12-31": true, "2100": false, "9999-12-31": false} {
		t.Run("date "+in, func(t *testing.T) {
			if _, err := parseDate(in); (err == nil) != ok {
				t.Fatalf("err %v, want ok=%v", err, ok)
			}
		})
	}
}
