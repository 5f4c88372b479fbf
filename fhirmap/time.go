package fhirmap

import (
	"strings"
	"time"
)

// timeError is a refusal from time parsing; the caller adds the field.
type timeError struct{ detail string }

func (e *timeError) Error() string { return "bad-time: " + e.detail }

// parseZonedTime parses a FHIR dateTime or instant that must name a moment:
// date, time to the second (fractions allowed) and a zone ("Z" or ±hh:mm).
// A date alone, a dateTime without a zone or a malformed value is refused,
// because a blood gas or ventilator reading placed in the wrong hour would
// be paired with the wrong data. The result is in UTC.
func parseZonedTime(s string) (time.Time, error) {
	if s == "" {
		return time.Time{}, &timeError{"empty time"}
	}
	if !strings.Contains(s, "T") {
		if _, err := parseDate(s); err == nil {
			return time.Time{}, &timeError{"a date without a time of day"}
		}
		return time.Time{}, &timeError{"not a FHIR dateTime"}
	}
	t, err := time.Parse(time.RFC3339Nano, s)
	if err != nil {
		if !hasZone(s) {
			return time.Time{}, &timeError{"a dateTime without a time zone"}
		}
		return time.Time{}, &timeError{"not a FHIR dateTime"}
	}
	// RFC 3339 allows a lower-case "t"/"z" and "-00:00"; FHIR does not
	// allow the former and Go accepts neither, but guard the year range
	// FHIR allows (0001-9999) explicitly.
	if t.Year() < 1 || t.Year() > 9999 {
		return time.Time{}, &timeError{"year out of range"}
	}
	if _, off := t.Zone(); off > maxZoneOffset || off < minZoneOffset {
		return time.Time{}, &timeError{"time zone offset beyond -12:00..+14:00"}
	}
	if t.Before(EarliestTime) || !t.Before(LatestTime) {
		return time.Time{}, &timeError{"time outside 1900-01-01 .. 2100-01-01"}
	}
	return t.UTC(), nil
}

// EarliestTime and LatestTime bound every time the decoder accepts
// (effective, issued, meta.lastUpdated; birth dates from EarliestTime):
// a clinical reading outside them is a broken clock or a placeholder such
// as 9999-12-31, and letting one in would place it, and what the store
// computes around it (the pairing window, the recomputation horizon), far
// outside anything real. The bounds are fixed rather than relative to the
// clock so that the service and the offline derive agree on every input.
var (
	EarliestTime = time.Date(1900, 1, 1, 0, 0, 0, 0, time.UTC)
	LatestTime   = time.Date(2100, 1, 1, 0, 0, 0, 0, time.UTC)
)

// The zone offsets in use on Earth run from -12:00 to +14:00 (the IANA
// time zone database).
const (
	minZoneOffset = -12 * 3600
	maxZoneOffset = 14 * 3600
)

// hasZone reports whether the time part of a dateTime carries a zone.
func hasZone(s string) bool {
	i := strings.IndexByte(s, 'T')
	if i < 0 {
		return false
	}
	tail := s[i+1:]
	return strings.HasSuffix(tail, "Z") || strings.ContainsAny(tail, "+-")
}

// parseDate validates a FHIR date: YYYY, YYYY-MM or YYYY-MM-DD (partial
// dates are legal for a birth date). It returns the first instant of the
// date in UTC.
func parseDate(s string) (time.Time, error) {
	var layout string
	switch len(s) {
	case 4:
		layout = "2006"
	case 7:
		layout = "2006-01"
	case 10:
		layout = "2006-01-02"
	default:
		return time.Time{}, &timeError{"not a FHIR date"}
	}
	t, err := time.Parse(layout, s)
	if err != nil || t.Year() < 1 {
		return time.Time{}, &timeError{"not a FHIR date"}
	}
	if t.Before(EarliestTime) || !t.Before(LatestTime) {
		return time.Time{}, &timeError{"date outside 1900-01-01 .. 2100-01-01"}
	}
	return t, nil
}
