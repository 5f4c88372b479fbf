package review

import (
	"bytes"
	"encoding/csv"
	"errors"
	"fmt"
	"net/http"
	"net/url"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"time"

	"github.com/jackc/pgx/v5/pgconn"

	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/fhirmap"
)

// Table is one table of a page; the same rows are the page's CSV
// (?format=csv&table=ID).
type Table struct {
	ID      string
	Title   string
	Columns []string
	Rows    [][]Cell
	More    string // URL of the next page when rows follow
	CSV     string // URL of this table as CSV
}

// Cell is one table cell: its text (as in the CSV) and an optional link.
type Cell struct {
	Text string
	Href string
}

func (t *Table) add(cells ...Cell) { t.Rows = append(t.Rows, cells) }

func txt(s string) Cell       { return Cell{Text: s} }
func lnk(s, href string) Cell { return Cell{Text: s, Href: href} }
func num(n int) Cell          { return Cell{Text: strconv.Itoa(n)} }
func when(t time.Time) Cell   { return Cell{Text: fmtTime(t)} }
func fmtTime(t time.Time) string {
	if t.IsZero() {
		return ""
	}
	return t.UTC().Format("2006-01-02 15:04:05Z")
}

// page is what every template gets.
type page struct {
	Title   string
	Nav     string
	Query   url.Values
	Tables  []*Table
	Figures []Figure
	Data    any
	Now     string
}

func (p *page) table(id string) *Table {
	for _, t := range p.Tables {
		if t.ID == id {
			return t
		}
	}
	return nil
}

var patientIDRE = regexp.MustCompile(`^[A-Za-z0-9.-]{1,64}$`)

func patientHref(ref string) string {
	return "/patients/" + url.PathEscape(strings.TrimPrefix(ref, "Patient/"))
}

func valueHref(key string) string { return "/values?key=" + url.QueryEscape(key) }

// render writes p as HTML with the named template, or, with
// ?format=csv, the table the query names (the first by default).
func (s *Server) render(w http.ResponseWriter, r *http.Request, name string, p *page) {
	p.Query = r.URL.Query()
	p.Now = fmtTime(s.cfg.Now())
	for _, t := range p.Tables {
		q := r.URL.Query()
		q.Set("format", "csv")
		q.Set("table", t.ID)
		t.CSV = r.URL.Path + "?" + q.Encode()
	}
	if r.URL.Query().Get("format") == "csv" {
		id := r.URL.Query().Get("table")
		t := p.table(id)
		if id == "" && len(p.Tables) > 0 {
			t = p.Tables[0]
		}
		if t == nil {
			http.Error(w, "no such table on this page", http.StatusNotFound)
			return
		}
		writeCSV(w, t)
		return
	}
	var buf bytes.Buffer
	if err := s.pages.ExecuteTemplate(&buf, name, p); err != nil {
		s.fail(w, r, fmt.Errorf("render %s: %w", name, err))
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	_, _ = w.Write(buf.Bytes())
}

func writeCSV(w http.ResponseWriter, t *Table) {
	w.Header().Set("Content-Type", "text/csv; charset=utf-8")
	w.Header().Set("Content-Disposition", fmt.Sprintf(`attachment; filename="%s.csv"`, t.ID))
	cw := csv.NewWriter(w)
	_ = cw.Write(t.Columns)
	for _, row := range t.Rows {
		rec := make([]string, len(row))
		for i, c := range row {
			rec[i] = c.Text
		}
		_ = cw.Write(rec)
	}
	if t.More != "" {
		// A record of the table's width, so that a CSV reader that checks
		// the field count still reads the file.
		more := make([]string, max(len(t.Columns), 1))
		more[0] = "# more rows: " + t.More
		_ = cw.Write(more)
	}
	cw.Flush()
}

// fail logs an error by route and answers 500. A server error is logged
// by its SQLSTATE only: its message may quote a parameter, and parameters
// carry patient references.
func (s *Server) fail(w http.ResponseWriter, r *http.Request, err error) {
	if pe, ok := errors.AsType[*pgconn.PgError](err); ok {
		s.log.Error("page failed", "route", r.Pattern, "sqlstate", pe.Code)
	} else {
		s.log.Error("page failed", "route", r.Pattern, "err", err)
	}
	http.Error(w, "the store could not answer; see the service log", http.StatusInternalServerError)
}

func badRequest(w http.ResponseWriter, msg string) { http.Error(w, msg, http.StatusBadRequest) }

// period reads from and to: RFC 3339, a form's local date-time
// (2026-03-01T08:00, read as UTC) or a UTC date.
func period(q url.Values) (from, to time.Time, err error) {
	parse := func(name string) (time.Time, error) {
		v := strings.TrimSpace(q.Get(name))
		if v == "" {
			return time.Time{}, nil
		}
		for _, layout := range []string{time.RFC3339, "2006-01-02T15:04", "2006-01-02T15:04:05", "2006-01-02"} {
			if t, err := time.Parse(layout, v); err == nil {
				return t.UTC(), nil
			}
		}
		return time.Time{}, fmt.Errorf("%s: want a time such as 2026-03-01T08:00 (UTC) or a date", name)
	}
	if from, err = parse("from"); err != nil {
		return
	}
	if to, err = parse("to"); err != nil {
		return
	}
	if !from.IsZero() && !to.IsZero() && !from.Before(to) {
		err = errors.New("from must be before to")
	}
	return
}

// pageArgs reads limit and offset: 200 rows a page by default, and for a
// CSV export as many as one question may return (postgres.MaxLimit), so an
// export holds the whole table unless it is larger than that.
func pageArgs(q url.Values) (limit, offset int, err error) {
	limit, offset = 200, 0
	if q.Get("format") == "csv" {
		limit = postgres.MaxLimit
	}
	if v := q.Get("limit"); v != "" {
		if limit, err = strconv.Atoi(v); err != nil || limit < 1 || limit > postgres.MaxLimit {
			return 0, 0, fmt.Errorf("limit: want 1 to %d", postgres.MaxLimit)
		}
	}
	if v := q.Get("offset"); v != "" {
		if offset, err = strconv.Atoi(v); err != nil || offset < 0 {
			return 0, 0, errors.New("offset: want 0 or more")
		}
	}
	return limit, offset, nil
}

func nextHref(r *http.Request, next int) string {
	q := r.URL.Query()
	q.Set("offset", strconv.Itoa(next))
	q.Del("format")
	q.Del("table")
	return r.URL.Path + "?" + q.Encode()
}

func threshold(q url.Values) (float64, error) {
	v := q.Get("threshold")
	if v == "" {
		return 5, nil
	}
	t, err := strconv.ParseFloat(v, 64)
	if err != nil || t < 0 || t > 100 {
		return 0, errors.New("threshold: want a number of mmHg from 0 to 100")
	}
	return t, nil
}

// kinds is the catalogue for the kind filter.
func kinds() []fhirmap.KindInfo { return fhirmap.Catalogue }

func kindKnown(k string) bool {
	return k == "" || slices.ContainsFunc(fhirmap.Catalogue, func(i fhirmap.KindInfo) bool { return i.Code == k })
}

// patients: the patient list.
func (s *Server) patients(w http.ResponseWriter, r *http.Request) {
	q := r.URL.Query()
	from, to, err := period(q)
	if err != nil {
		badRequest(w, err.Error())
		return
	}
	th, err := threshold(q)
	if err != nil {
		badRequest(w, err.Error())
		return
	}
	limit, offset, err := pageArgs(q)
	if err != nil {
		badRequest(w, err.Error())
		return
	}
	kind := q.Get("kind")
	if !kindKnown(kind) {
		badRequest(w, "kind: not a derivation kind of the catalogue")
		return
	}
	has := q["has"]
	for _, h := range has {
		if h != "discrepancy" && h != "refusal" && h != "retraction" {
			badRequest(w, "has: want discrepancy, refusal or retraction")
			return
		}
	}
	f := PatientFilter{From: from, To: to, Kind: kind, ThresholdMmHg: th, Limit: limit, Offset: offset,
		HasDiscrepancy: slices.Contains(has, "discrepancy"), HasRefusal: slices.Contains(has, "refusal"),
		HasRetraction: slices.Contains(has, "retraction")}
	rows, more, err := s.store.Patients(r.Context(), f)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	t := &Table{ID: "patients", Title: "Patients",
		Columns: []string{"patient", "blood gases", "derived values", "refusals", "retractions", "amended or corrected",
			"largest |measured - predicted PaCO2| (mmHg)", "first blood gas", "last blood gas", "latest values"}}
	for _, p := range rows {
		disc := ""
		if p.MaxDiscMmHg != nil {
			disc = fhirmap.FormatValue(fhirmap.KindPaCO2Discrepancy, *p.MaxDiscMmHg)
		}
		var latest []string
		for _, l := range p.Latest {
			latest = append(latest, strings.TrimSpace(l.Kind+" "+l.Published+" "+l.DisplayUnit))
		}
		t.add(lnk(p.Patient, patientHref(p.Patient)+periodQuery(q)), num(p.BloodGases), num(p.Derived), num(p.Refusals),
			num(p.Retractions), num(p.Amended), txt(disc), when(p.First), when(p.Last), txt(strings.Join(latest, "; ")))
	}
	if more {
		t.More = nextHref(r, offset+limit)
	}
	s.render(w, r, "patients.html", &page{Title: "Patients", Nav: "patients", Tables: []*Table{t},
		Data: map[string]any{"Kinds": kinds(), "Threshold": strconv.FormatFloat(th, 'f', -1, 64), "Has": has}})
}

func periodQuery(q url.Values) string {
	p := url.Values{}
	for _, k := range []string{"from", "to"} {
		if v := q.Get(k); v != "" {
			p.Set(k, v)
		}
	}
	if len(p) == 0 {
		return ""
	}
	return "?" + p.Encode()
}

type patientData struct {
	Patient  string
	ID       string
	From, To string
	Zoom     []zoomLink
	Bucket   string
	Report   string
	Stays    []string
}

type zoomLink struct{ Label, Href string }

// timelinePage reads the timeline and values of one patient for the
// patient page and the report.
func (s *Server) timelinePage(w http.ResponseWriter, r *http.Request) (*page, bool) {
	id := r.PathValue("id")
	if !patientIDRE.MatchString(id) {
		badRequest(w, "not a patient id")
		return nil, false
	}
	ref := "Patient/" + id
	from, to, err := period(r.URL.Query())
	if err != nil {
		badRequest(w, err.Error())
		return nil, false
	}
	tl, ok, err := s.store.Timeline(r.Context(), ref, from, to)
	if err != nil {
		s.fail(w, r, err)
		return nil, false
	}
	if !ok && from.IsZero() && to.IsZero() {
		http.Error(w, "no derived values or refusals for this patient", http.StatusNotFound)
		return nil, false
	}
	figs, err := figures(tl, valueHref, func(p Point) string { return valueHref(p.ObservationID) })
	if err != nil {
		s.fail(w, r, err)
		return nil, false
	}
	versions, err := s.store.List(r.Context(), postgres.Filter{Patient: ref, From: tl.From, To: tl.To, Limit: postgres.MaxLimit})
	if err != nil {
		s.fail(w, r, err)
		return nil, false
	}
	vt := &Table{ID: "values", Title: "Current values with their basis",
		Columns: []string{"blood-gas time", "kind", "value as published", "unit", "status", "version", "interpretation", "basis", "observation id"}}
	for _, v := range versions.Rows {
		if !v.Current {
			continue
		}
		vt.add(when(v.Effective), lnk(v.Kind, valueHref(v.Key)), txt(v.Published), txt(v.DisplayUnit), txt(v.Status),
			num(v.Version), txt(v.Interpretation.Text), txt(v.Basis), txt(v.ObservationID))
	}
	if versions.More {
		vt.More = "more than " + strconv.Itoa(postgres.MaxLimit) + " versions: narrow the period"
	}
	mt := &Table{ID: "marks", Title: "Refusals and retractions",
		Columns: []string{"blood-gas time", "kind", "what", "reason"}}
	for _, m := range tl.Marks {
		mt.add(when(m.Effective), lnk(m.Kind, valueHref(m.Key)), txt(m.What), txt(m.Reason))
	}
	base := patientHref(ref)
	d := patientData{Patient: ref, ID: id, Bucket: spanText(tl.Bucket), Report: base + "/report" + periodQuery(r.URL.Query())}
	for _, e := range tl.Stays {
		if e == "" {
			e = "(no encounter sent)"
		}
		d.Stays = append(d.Stays, e)
	}
	if !tl.From.IsZero() {
		d.From, d.To = tl.From.Format("2006-01-02T15:04"), tl.To.Format("2006-01-02T15:04")
	}
	d.Zoom = append(d.Zoom, zoomLink{"whole stay", base})
	for _, span := range []time.Duration{24 * time.Hour, 6 * time.Hour} {
		if tl.To.Sub(tl.From) > span {
			q := url.Values{"from": {tl.To.Add(-span).Format(time.RFC3339)}, "to": {tl.To.Format(time.RFC3339)}}
			d.Zoom = append(d.Zoom, zoomLink{"last " + spanText(span), base + "?" + q.Encode()})
		}
	}
	return &page{Title: ref, Nav: "patients", Figures: figs, Tables: []*Table{vt, mt}, Data: d}, true
}

func (s *Server) patient(w http.ResponseWriter, r *http.Request) {
	if p, ok := s.timelinePage(w, r); ok {
		s.render(w, r, "patient.html", p)
	}
}

func (s *Server) report(w http.ResponseWriter, r *http.Request) {
	if p, ok := s.timelinePage(w, r); ok {
		p.Title = "Report: " + p.Title
		s.render(w, r, "report.html", p)
	}
}

// versionView is one version on the value page.
type versionView struct {
	V         postgres.Version
	Inputs    *Table
	Constants *Table
	Steps     *Table // nil when the version kept no intermediate step
	Settings  *settingsView
	Links     []zoomLink
}

func (s *Server) value(w http.ResponseWriter, r *http.Request) {
	key := r.URL.Query().Get("key")
	if key == "" || len(key) > 2000 {
		badRequest(w, "key: want a derivation key or an Observation id")
		return
	}
	h, err := s.store.Show(r.Context(), key)
	if errors.Is(err, postgres.ErrNotFound) {
		http.Error(w, "no derived value or refusal with that key or id", http.StatusNotFound)
		return
	}
	if err != nil {
		s.fail(w, r, err)
		return
	}
	vt := &Table{ID: "versions", Title: "Versions",
		Columns: []string{"version", "status", "value as published", "unit", "interpretation", "supersedes", "superseded by", "current", "recorded", "observation id"}}
	var views []versionView
	var tables = []*Table{vt}
	snapshots := map[string]*settingsView{}
	for _, v := range h.Versions {
		vt.add(num(v.Version), txt(v.Status), txt(v.Published), txt(v.DisplayUnit), txt(v.Interpretation.Text),
			txt(optVersion(v.Supersedes)), txt(optVersion(v.SupersededBy)), txt(strconv.FormatBool(v.Current)), when(v.Recorded), txt(v.ObservationID))
		in := inputsTable(fmt.Sprintf("inputs-v%d", v.Version), v.Inputs)
		ct := &Table{ID: fmt.Sprintf("constants-v%d", v.Version), Title: "Constants", Columns: []string{"name", "value", "unit", "source"}}
		for _, c := range v.Constants {
			ct.add(txt(c.Name), txt(strconv.FormatFloat(c.Value, 'g', -1, 64)), txt(postgres.DisplayUnit(c.Unit)), txt(c.Source))
		}
		vv := versionView{V: v, Inputs: in, Constants: ct}
		if vv.Settings, err = s.settingsFor(r, v.Settings, snapshots); err != nil {
			s.fail(w, r, err)
			return
		}
		if v.Record != nil && len(v.Record.Steps) > 0 {
			vv.Steps = stepsTable(fmt.Sprintf("steps-v%d", v.Version), v.Record.Steps)
			tables = append(tables, vv.Steps)
		}
		for _, m := range v.Messages {
			q := url.Values{"key": {h.Key}, "version": {strconv.Itoa(v.Version)}, "type": {m.ResourceType}}
			vv.Links = append(vv.Links, zoomLink{fmt.Sprintf("published %s (JSON, %d bytes, SHA-256 %s)", m.ResourceType, m.SizeBytes, m.Digest), "/published?" + q.Encode()})
		}
		views = append(views, vv)
		tables = append(tables, in, ct)
	}
	rt := &Table{ID: "refusals", Title: "Refusals",
		Columns: []string{"refusal id", "reason", "detail", "current", "recorded", "blood-gas time"}}
	type refusalView struct {
		R        postgres.Refusal
		Meaning  string
		Inputs   *Table
		Settings *settingsView
	}
	var refusals []refusalView
	for _, x := range h.Refusals {
		rt.add(txt(strconv.FormatInt(x.ID, 10)), txt(x.Reason), txt(x.Detail), txt(strconv.FormatBool(x.Current)), when(x.Recorded), when(x.Effective))
		in := inputsTable(fmt.Sprintf("considered-%d", x.ID), x.Considered)
		in.Title = "Inputs considered"
		sv, err := s.settingsFor(r, x.Settings, snapshots)
		if err != nil {
			s.fail(w, r, err)
			return
		}
		refusals = append(refusals, refusalView{R: x, Meaning: reasonMeaning(x.Reason), Inputs: in, Settings: sv})
		tables = append(tables, in)
	}
	tables = append(tables, rt)
	var who []string
	var used []*settingsView
	for _, v := range views {
		who, used = append(who, "version "+strconv.Itoa(v.V.Version)), append(used, v.Settings)
	}
	for _, x := range refusals {
		who, used = append(who, "refusal "+strconv.FormatInt(x.R.ID, 10)), append(used, x.Settings)
	}
	patient, gas, kind := splitKey(h.Key)
	info, _ := fhirmap.LookupKind(kind)
	s.render(w, r, "value.html", &page{Title: kind + " — " + patient, Nav: "patients", Tables: tables,
		Data: map[string]any{"Key": h.Key, "Patient": patient, "PatientHref": patientHref(patient), "BloodGas": gas,
			"Kind": info, "KindCode": kind, "Versions": views, "Refusals": refusals,
			"Settings": summarise(who, used)}})
}

// stepsTable lists the intermediate steps a version kept (its record; the
// rows of review_derivation_step), in order.
func stepsTable(id string, steps []fhirmap.RecordStep) *Table {
	t := &Table{ID: id, Title: "Intermediate steps",
		Columns: []string{"step", "method", "value", "unit", "formula with the numbers", "constants", "assumptions", "flags"}}
	for i, st := range steps {
		var cs []string
		for _, c := range st.Constants {
			cs = append(cs, strings.TrimSpace(fmt.Sprintf("%s %s %s (%s)", c.Name, shownNumber(c.Value), displayUnit(c.Unit), c.Source)))
		}
		t.add(num(i+1), txt(st.Method+" "+st.MethodVersion), txt(shownNumber(st.Value)), txt(displayUnit(st.Unit)), txt(st.Basis),
			txt(strings.Join(cs, "; ")), txt(strings.Join(st.Assumptions, "; ")), txt(strings.Join(st.Flags, "; ")))
	}
	return t
}

func optVersion(v int) string {
	if v == 0 {
		return ""
	}
	return strconv.Itoa(v)
}

func splitKey(key string) (patient, gas, kind string) {
	// The blood-gas key holds "|" itself (fact key: resource#system|code).
	first, last := strings.Index(key, "|"), strings.LastIndex(key, "|")
	if first < 0 || first == last {
		return key, "", ""
	}
	return key[:first], key[first+1 : last], key[last+1:]
}

func inputsTable(id string, ins []postgres.Input) *Table {
	t := &Table{ID: id, Title: "Inputs",
		Columns: []string{"role", "quantity", "value", "unit", "as sent", "time", "offset from blood gas", "source resource", "version", "status", "origin", "fallback"}}
	for _, in := range ins {
		sent := ""
		if in.SourceValue != nil {
			sent = strings.TrimSpace(shownNumber(*in.SourceValue) + " " + displayUnit(in.SourceUnit))
		}
		tm, off := "patient-level", ""
		if in.Effective != nil {
			tm, off = fmtTime(*in.Effective), in.OffsetText()
		}
		t.add(txt(in.Role), txt(in.Quantity), txt(in.Shown), txt(in.DisplayUnit), txt(sent), txt(tm), txt(off),
			txt(in.Resource), txt(in.VersionID), txt(in.Status), txt(in.Origin), txt(in.Fallback))
	}
	return t
}

// published answers the exact bytes published for one version.
func (s *Server) published(w http.ResponseWriter, r *http.Request) {
	q := r.URL.Query()
	version, err := strconv.Atoi(q.Get("version"))
	if err != nil || version < 1 {
		badRequest(w, "version: want 1 or more")
		return
	}
	typ := q.Get("type")
	if typ != "Observation" && typ != "Provenance" {
		badRequest(w, "type: want Observation or Provenance")
		return
	}
	h, err := s.store.Show(r.Context(), q.Get("key"))
	if errors.Is(err, postgres.ErrNotFound) {
		http.Error(w, "no derived value with that key", http.StatusNotFound)
		return
	}
	if err != nil {
		s.fail(w, r, err)
		return
	}
	for _, v := range h.Versions {
		if v.Version != version {
			continue
		}
		for _, m := range v.Messages {
			if m.ResourceType == typ {
				w.Header().Set("Content-Type", "application/fhir+json")
				w.Header().Set("X-Payload-Sha256", m.Digest)
				_, _ = w.Write(m.Payload)
				return
			}
		}
	}
	http.Error(w, "nothing published for that version and type", http.StatusNotFound)
}

// qualityFilter reads the common filters of the quality views.
func qualityFilter(w http.ResponseWriter, r *http.Request) (postgres.Filter, bool) {
	q := r.URL.Query()
	from, to, err := period(q)
	if err == nil && q.Get("patient") != "" && !strings.HasPrefix(q.Get("patient"), "Patient/") {
		err = errors.New("patient: want a reference such as Patient/lg-icu-0001")
	}
	if err == nil && !kindKnown(q.Get("kind")) {
		err = errors.New("kind: not a derivation kind of the catalogue")
	}
	limit, offset, perr := pageArgs(q)
	if err == nil {
		err = perr
	}
	if err != nil {
		badRequest(w, err.Error())
		return postgres.Filter{}, false
	}
	return postgres.Filter{Patient: q.Get("patient"), From: from, To: to, Kind: q.Get("kind"), Reason: q.Get("reason"),
		Limit: limit, Offset: offset}, true
}

func (s *Server) refusals(w http.ResponseWriter, r *http.Request) {
	f, ok := qualityFilter(w, r)
	if !ok {
		return
	}
	sum, err := s.store.Refusals(r.Context(), postgres.Filter{Patient: f.Patient, From: f.From, To: f.To, Kind: f.Kind, Reason: f.Reason, Limit: postgres.MaxLimit})
	if err != nil {
		s.fail(w, r, err)
		return
	}
	st := &Table{ID: "by-reason", Title: "Refusals by reason and kind",
		Columns: []string{"reason", "kind", "refusals", "still current", "patients", "first blood gas", "last blood gas"}}
	for _, c := range sum.Rows {
		q := url.Values{"reason": {c.Reason}, "kind": {c.Kind}}
		st.add(lnk(c.Reason, "/quality/refusals?"+q.Encode()), txt(c.Kind), num(c.Count), num(c.Current), num(c.Patients), when(c.First), when(c.Last))
	}
	list, err := s.store.Refused(r.Context(), f)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	lt := &Table{ID: "refusals", Title: "Refusals one by one",
		Columns: []string{"blood-gas time", "patient", "kind", "reason", "detail", "current", "nearest ventilator reading"}}
	for _, x := range list.Rows {
		near := ""
		if x.Nearest != nil {
			near = fmt.Sprintf("%s %s %s at %s from the blood gas", x.Nearest.Quantity, x.Nearest.Shown, x.Nearest.DisplayUnit, x.Nearest.Offset)
		}
		lt.add(lnk(fmtTime(x.Effective), valueHref(x.Key)), lnk(x.Patient, patientHref(x.Patient)), txt(x.Kind), txt(x.Reason),
			txt(x.Detail), txt(strconv.FormatBool(x.Current)), txt(near))
	}
	if list.More {
		lt.More = nextHref(r, list.NextOffset)
	}
	series, err := s.store.RefusalSeries(r.Context(), f)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	fig, err := refusalFigure(series)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	s.render(w, r, "quality.html", &page{Title: "Refusals by reason over time", Nav: "refusals", Tables: []*Table{st, lt},
		Figures: []Figure{fig}, Data: qualityData{Action: "/quality/refusals", Reason: true, Kind: true, Kinds: kinds()}})
}

type qualityData struct {
	Action       string
	Reason, Kind bool
	Threshold    string
	Kinds        []fhirmap.KindInfo
	Note         string
}

func (s *Server) deadLetters(w http.ResponseWriter, r *http.Request) {
	f, ok := qualityFilter(w, r)
	if !ok {
		return
	}
	if f.Patient != "" || f.Kind != "" {
		badRequest(w, "dead letters were never understood: they have no patient or kind to filter by")
		return
	}
	counts, err := s.store.DeadLetterReasons(r.Context(), f)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	ct := &Table{ID: "by-reason", Title: "Dead letters by reason", Columns: []string{"reason", "count", "first recorded", "last recorded"}}
	for _, c := range counts {
		ct.add(lnk(c.Reason, "/quality/deadletters?"+url.Values{"reason": {c.Reason}}.Encode()), num(c.Count), when(c.First), when(c.Last))
	}
	list, err := s.store.DeadLetters(r.Context(), f)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	lt := &Table{ID: "deadletters", Title: "Dead letters (without their payloads)",
		Columns: []string{"id", "recorded", "subject", "stream sequence", "size (bytes)", "reason", "detail"}}
	for _, d := range list.Rows {
		lt.add(txt(strconv.FormatInt(d.ID, 10)), when(d.Recorded), txt(d.Subject), txt(strconv.FormatInt(d.StreamSeq, 10)),
			num(d.SizeBytes), txt(d.Reason), txt(d.Detail))
	}
	if list.More {
		lt.More = nextHref(r, list.NextOffset)
	}
	s.render(w, r, "quality.html", &page{Title: "Dead letters by reason", Nav: "deadletters", Tables: []*Table{ct, lt},
		Data: qualityData{Action: "/quality/deadletters", Reason: true, Note: "Times are recording times: a dead letter was never understood, so it has no blood-gas time. Payloads are never shown."}})
}

func (s *Server) changes(w http.ResponseWriter, r *http.Request) {
	f, ok := qualityFilter(w, r)
	if !ok {
		return
	}
	list, err := s.store.Changes(r.Context(), f)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	t := &Table{ID: "changes", Title: "Values changed by amendment, correction, recomputation or retraction",
		Columns: []string{"blood-gas time", "patient", "kind", "from version", "to version", "from value", "to value", "unit", "from status", "to status", "retraction reason", "recorded"}}
	for _, c := range list.Rows {
		t.add(lnk(fmtTime(c.Effective), valueHref(c.Key)), lnk(c.Patient, patientHref(c.Patient)), txt(c.Kind), num(c.FromVersion), num(c.ToVersion),
			txt(c.FromPublished), txt(c.ToPublished), txt(c.DisplayUnit), txt(c.FromStatus), txt(c.ToStatus), txt(c.Retracted), when(c.Recorded))
	}
	if list.More {
		t.More = nextHref(r, list.NextOffset)
	}
	s.render(w, r, "quality.html", &page{Title: "Changed values", Nav: "changes", Tables: []*Table{t},
		Data: qualityData{Action: "/quality/changes", Kind: true, Kinds: kinds()}})
}

func (s *Server) discrepancies(w http.ResponseWriter, r *http.Request) {
	f, ok := qualityFilter(w, r)
	if !ok {
		return
	}
	th, err := threshold(r.URL.Query())
	if err != nil {
		badRequest(w, err.Error())
		return
	}
	f.Kind = ""
	list, err := s.store.Discrepancies(r.Context(), th, f)
	if err != nil {
		s.fail(w, r, err)
		return
	}
	t := &Table{ID: "discrepancies", Title: "Measured minus predicted PaCO2 at or beyond the threshold",
		Columns: []string{"blood-gas time", "patient", "measured - predicted (mmHg)", "measured PaCO2 (mmHg)", "predicted PaCO2 (mmHg)", "status", "version", "interpretation", "basis"}}
	for _, d := range list.Rows {
		t.add(lnk(fmtTime(d.Effective), valueHref(d.Key)), lnk(d.Patient, patientHref(d.Patient)), txt(d.Difference), txt(d.Measured),
			txt(d.Predicted), txt(d.Status), num(d.Version), txt(d.Interpretation), txt(d.Basis))
	}
	if list.More {
		t.More = nextHref(r, list.NextOffset)
	}
	s.render(w, r, "quality.html", &page{Title: "Discrepancies", Nav: "discrepancies", Tables: []*Table{t},
		Data: qualityData{Action: "/quality/discrepancies", Threshold: strconv.FormatFloat(th, 'f', -1, 64)}})
}

// spanText writes a whole number of minutes, hours or days for people.
func spanText(d time.Duration) string {
	switch {
	case d%(24*time.Hour) == 0:
		return plural(int(d/(24*time.Hour)), "day")
	case d%time.Hour == 0:
		return plural(int(d/time.Hour), "hour")
	case d%time.Minute == 0:
		return plural(int(d/time.Minute), "minute")
	}
	return d.String()
}

func plural(n int, unit string) string {
	if n == 1 {
		return unit
	}
	return strconv.Itoa(n) + " " + unit + "s"
}

// displayUnit is the unit as people read it; a UCUM annotation such as
// {breaths}/min reads as /min.
func displayUnit(ucum string) string {
	u := postgres.DisplayUnit(ucum)
	for {
		i, j := strings.Index(u, "{"), strings.Index(u, "}")
		if i < 0 || j < i {
			return u
		}
		u = u[:i] + u[j+1:]
	}
}

// reasonMeaning is the catalogue's meaning of a refusal reason code.
func reasonMeaning(code string) string {
	for _, r := range fhirmap.Reasons {
		if r.Code == code {
			return r.Meaning
		}
	}
	return ""
}
