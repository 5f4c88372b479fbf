package review

import (
	"encoding/csv"
	"net/http/httptest"
	"net/url"
	"strings"
	"testing"
	"time"

	"github.com/ventderive/ventderive/consumer/postgres"
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

// TestCSVExportWholeAndReadable: a CSV export asks for every row one
// question may return (not the 200 of a page), and the "more rows" notice,
// when a table is larger still, is a record of the table's width, so that
// a reader that checks the field count (RFC 4180, encoding/csv's default)
// reads the whole file.
func TestCSVExportWholeAndReadable(t *testing.T) {
	if limit, _, err := pageArgs(url.Values{"format": {"csv"}}); err != nil || limit != postgres.MaxLimit {
		t.Errorf("CSV export limit %d (%v), want %d", limit, err, postgres.MaxLimit)
	}
	if limit, _, err := pageArgs(url.Values{}); err != nil || limit != 200 {
		t.Errorf("page limit %d (%v), want 200", limit, err)
	}
	tb := &Table{ID: "changes", Columns: []string{"a", "b", "c"}, More: "/quality/changes?offset=2"}
	tb.add(Cell{Text: "1"}, Cell{Text: "2"}, Cell{Text: "3"})
	rec := httptest.NewRecorder()
	writeCSV(rec, tb)
	recs, err := csv.NewReader(strings.NewReader(rec.Body.String())).ReadAll()
	if err != nil {
		t.Fatalf("the CSV with a more-rows notice does not read: %v\n%s", err, rec.Body.String())
	}
	if len(recs) != 3 || !strings.HasPrefix(recs[2][0], "# more rows: ") {
		t.Errorf("records %q, want header, row and the notice", recs)
	}
}
