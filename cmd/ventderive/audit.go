package main

import (
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/google/uuid"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
)

func init() {
	register(command{name: "audit", summary: "answer reviewer questions from the provenance store (read-only)", run: runAudit})
}

const auditUsage = `usage: ventderive audit <question> [flags]
questions (time basis: the blood gas's effective time, except deadletters):
  show <observation-id or key>  one derived value: every version, its inputs, times, offsets,
                                constants, assumptions, basis, what superseded what, refusals
  list           derivation versions       [--patient REF] [--from T] [--to T] [--kind K] [--algorithm V]
  refusals       refusals counted by reason and kind  [--patient] [--from] [--to] [--kind] [--reason R]
  refused        refusals one by one, per blood gas: reason, detail, inputs considered, and the
                 nearest ventilator reading for no-ventilator-data-in-window
                 [--patient] [--from] [--to] [--kind] [--reason R]
  published <observation-id or key> [--version-id N] [--type Observation|Provenance]
                 the exact bytes published for one version (default: the latest, Observation);
                 the digest is in show
  discrepancies  current measured minus predicted PaCO2 at or beyond --threshold mmHg (default 5)
                 [--patient] [--from] [--to] [--algorithm]
  changes        values changed by amendment, correction, recomputation or retraction
                 [--patient] [--from] [--to] [--kind] [--algorithm]
  daily          blood gases, derivation versions, retractions and refusals per UTC day of the
                 blood gas  [--patient] [--from] [--to] [--kind] [--algorithm]
  deadletters    poison messages (without their bytes), by RECORDING time  [--from] [--to] [--reason]
  settings [<digest>]  a site-settings snapshot (default: the latest recorded): every setting that
                 can change a value, the code alias file's SHA-256, the algorithm version
  verify [<observation-id or key>]  re-derive each stored version from its stored inputs and
                 settings snapshot with this build and report per version whether the published
                 value, interpretation, digest and Observation bytes reproduce, then each stored
                 refusal (STATUS refused) from the facts stored by its time and its snapshot:
                 whether its reason, detail and digest reproduce; a mismatch names both and the
                 command exits non-zero. Another algorithm or no snapshot: "not verifiable with
                 this build". --limit and --offset page versions and refusals each.
                 [--patient] [--from] [--to] [--kind]
  replay --algorithm current --from T --to T  recompute the period's blood gases with this build
                 and the latest recorded settings (--site JSON overrides settings by name, e.g.
                 '{"TargetPaCO2mmHg":38}') and report per kind how many values would change, the
                 distribution of the change, flipped interpretations and refusals that would
                 become values or the reverse, then each changed key. Writes and publishes
                 nothing.  [--patient] [--kind] [--site JSON]
  payloads       decode every stored inbox payload (zstd with a dictionary the database holds, or
                 plain from before migration 0015) and check that its SHA-256 is its inbox key;
                 a payload that does not decode or match is named and the command exits non-zero.
                 Needs a role that reads inbox.raw (the migrating role), not the reviewer role.
  outputs        re-verify every stored outbox payload (the published Observations and
                 Provenance): a zstd frame must decode with a dictionary the database stores
                 (review_dictionary, not the one this binary embeds) to bytes whose SHA-256
                 and size are the ones stored beside it; plain rows from before migration 0018
                 are counted apart. A frame, stored dictionary row or outbox row that fails
                 (or names no stored derivation version) is named and the command exits
                 non-zero. Runs as the reviewer role (review_published, review_outbox,
                 review_dictionary).
flags common to all: --database-url URL (default $DATABASE_URL; normally the reviewer role)
  --format table|json|csv (default table)
paging (all but show, published, settings and verify of one key; replay pages its changed keys): --limit N rows (default 1000, at most 10000) --offset N rows skipped;
  when more rows exist the table ends with a "more rows" line naming the next --offset, CSV with a
  "# more rows" comment line, JSON with "more": true and "nextOffset".
times: RFC 3339 (2026-03-01T08:00:00Z) or a UTC date (2026-03-01); --from inclusive, --to
  exclusive, --from before --to. Every row also shows its recording time in its own column.
values: as published (rounded to the kind's decimals, display units); JSON and CSV add the stored
  full precision. A retraction (entered-in-error) was published without a value and shows none.
The audit reads only the review_* views and opens read-only transactions.`

// auditQuestion says which filters a question takes: a filter given to a
// question that cannot apply it is a usage error, not silently ignored.
type auditQuestion struct {
	name  string
	flags []string // filter flags it accepts besides the common ones
}

var auditQuestions = []auditQuestion{
	{"show", nil},
	{"list", []string{"patient", "from", "to", "kind", "algorithm", "limit", "offset"}},
	{"refusals", []string{"patient", "from", "to", "kind", "reason", "limit", "offset"}},
	{"refused", []string{"patient", "from", "to", "kind", "reason", "limit", "offset"}},
	{"published", []string{"version-id", "type"}},
	{"discrepancies", []string{"patient", "from", "to", "algorithm", "threshold", "limit", "offset"}},
	{"changes", []string{"patient", "from", "to", "kind", "algorithm", "limit", "offset"}},
	{"daily", []string{"patient", "from", "to", "kind", "algorithm", "limit", "offset"}},
	{"deadletters", []string{"from", "to", "reason", "limit", "offset"}},
	{"settings", nil},
	{"verify", []string{"patient", "from", "to", "kind", "limit", "offset"}},
	{"replay", []string{"patient", "from", "to", "kind", "algorithm", "site", "limit", "offset"}},
	{"payloads", nil},
	{"outputs", nil},
}

var (
	// patientRefRE is the store's CHECK on patient references.
	patientRefRE = regexp.MustCompile(`^Patient/[A-Za-z0-9.-]{1,64}$`)
	// codeRE is the store's CHECK on reason codes.
	codeRE = regexp.MustCompile(`^[a-z0-9]+(-[a-z0-9]+)*$`)
	// digestRE is the store's CHECK on digests.
	digestRE = regexp.MustCompile(`^[0-9a-f]{64}$`)
)

// runAudit answers one reviewer question. Queries live in
// consumer/postgres (Reviewer); this file checks arguments and formats.
// Every argument is checked before connecting.
func runAudit(ctx context.Context, args []string, e env) error {
	if len(args) == 0 || args[0] == "-h" || args[0] == "--help" || args[0] == "help" {
		fmt.Fprintln(e.stderr, auditUsage)
		if len(args) == 0 {
			return errUsage
		}
		return nil
	}
	usageErr := func(msg string) error {
		fmt.Fprintf(e.stderr, "ventderive audit: %s\n", msg)
		return errUsage
	}
	question, args := args[0], args[1:]
	qi := slices.IndexFunc(auditQuestions, func(q auditQuestion) bool { return q.name == question })
	if qi < 0 {
		return usageErr(fmt.Sprintf("unknown question %q (want one of %s)", question, questionNames()))
	}
	q := auditQuestions[qi]
	fs := flag.NewFlagSet("audit "+question, flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	fs.Usage = func() { fmt.Fprintln(e.stderr, auditUsage) }
	dbURL := fs.String("database-url", e.getenv("DATABASE_URL"), "PostgreSQL URL (reviewer role)")
	format := fs.String("format", "table", "table, json or csv")
	var f postgres.Filter
	var from, to string
	fs.StringVar(&f.Patient, "patient", "", "patient reference, e.g. Patient/lg-icu-0001")
	fs.StringVar(&from, "from", "", "start of the period (inclusive)")
	fs.StringVar(&to, "to", "", "end of the period (exclusive)")
	fs.StringVar(&f.Kind, "kind", "", "derivation kind code")
	fs.StringVar(&f.Algorithm, "algorithm", "", "algorithm version")
	fs.StringVar(&f.Reason, "reason", "", "refusal or dead-letter reason code")
	fs.IntVar(&f.Limit, "limit", postgres.DefaultLimit, "rows per page")
	fs.IntVar(&f.Offset, "offset", 0, "rows to skip")
	threshold := fs.Float64("threshold", 5, "discrepancies: minimum |measured - predicted| in mmHg")
	version := fs.Int("version-id", 0, "published: derivation version, the Observation's meta.versionId (default the latest)")
	resourceType := fs.String("type", "Observation", "published: Observation or Provenance")
	siteJSON := fs.String("site", "", "replay: site settings to change, as JSON by setting name (fhirmap.Site), over the latest recorded")
	// Flags may follow the positional argument of show.
	var positional []string
	for {
		if done, err := parseFlags(fs, args); done {
			return err
		}
		if fs.NArg() == 0 {
			break
		}
		positional = append(positional, fs.Arg(0))
		args = fs.Args()[1:]
	}
	var bad []string
	fs.Visit(func(fl *flag.Flag) {
		if fl.Name != "database-url" && fl.Name != "format" && !slices.Contains(q.flags, fl.Name) {
			bad = append(bad, "--"+fl.Name)
		}
	})
	if len(bad) > 0 {
		return usageErr(fmt.Sprintf("%s does not apply to %s", strings.Join(bad, ", "), question))
	}
	if err := checkAuditArgs(q, &f, from, to, *format, *threshold, positional); err != nil {
		return usageErr(err.Error())
	}
	var siteChange map[string]json.RawMessage
	if question == "replay" {
		if f.Algorithm != "current" {
			return usageErr(fmt.Sprintf("replay: --algorithm %q: this build replays only under its own algorithm, --algorithm current (%s)", f.Algorithm, fhirmap.Algorithm))
		}
		f.Algorithm = ""
		if f.From.IsZero() || f.To.IsZero() {
			return usageErr("replay: --from and --to are required (the period whose blood gases are recomputed)")
		}
		if *siteJSON != "" {
			if err := json.Unmarshal([]byte(*siteJSON), &siteChange); err != nil || siteChange == nil {
				return usageErr("--site: want a JSON object of settings by name, e.g. '{\"TargetPaCO2mmHg\":38}'")
			}
			if err := checkSiteNames(siteChange); err != nil {
				return usageErr("--site: " + err.Error())
			}
		}
	}
	if *version < 0 {
		return usageErr(fmt.Sprintf("--version-id %d: want 1 or more", *version))
	}
	if *resourceType != "Observation" && *resourceType != "Provenance" {
		return usageErr(fmt.Sprintf("--type %q: want Observation or Provenance", *resourceType))
	}
	if *dbURL == "" {
		return usageErr("no database: set --database-url or DATABASE_URL")
	}
	cfg, err := pgxpool.ParseConfig(*dbURL)
	if err != nil {
		return usageErr("--database-url: cannot parse")
	}
	// Belt and braces: the reviewer role is read-only already.
	cfg.ConnConfig.RuntimeParams["default_transaction_read_only"] = "on"
	cfg.ConnConfig.RuntimeParams["application_name"] = "ventderive audit"
	cfg.MaxConns = 2
	pool, err := pgxpool.NewWithConfig(ctx, cfg)
	if err != nil {
		return fmt.Errorf("database: %w", err)
	}
	defer pool.Close()
	r := postgres.NewReviewer(pool)
	out := auditOutput{w: e.stdout, format: *format}

	switch question {
	case "show":
		h, err := r.Show(ctx, positional[0])
		if errors.Is(err, postgres.ErrNotFound) {
			return fmt.Errorf("audit show: no derivation or refusal with that id or key")
		}
		if err != nil {
			return fmt.Errorf("audit show: %w", err)
		}
		return out.show(h)
	case "published":
		h, err := r.Show(ctx, positional[0])
		if errors.Is(err, postgres.ErrNotFound) {
			return fmt.Errorf("audit published: no derivation with that id or key")
		}
		if err != nil {
			return fmt.Errorf("audit published: %w", err)
		}
		m, err := pickPublished(h, *version, *resourceType)
		if err != nil {
			return fmt.Errorf("audit published: %w", err)
		}
		_, err = e.stdout.Write(m.Payload)
		return err
	case "refused":
		p, err := r.Refused(ctx, f)
		if err != nil {
			return fmt.Errorf("audit refused: %w", err)
		}
		return writePage(out, p, refusedColumns)
	case "list":
		p, err := r.List(ctx, f)
		if err != nil {
			return fmt.Errorf("audit list: %w", err)
		}
		return writePage(out, p, listColumns)
	case "refusals":
		p, err := r.Refusals(ctx, f)
		if err != nil {
			return fmt.Errorf("audit refusals: %w", err)
		}
		return writePage(out, p, refusalCountColumns)
	case "discrepancies":
		p, err := r.Discrepancies(ctx, *threshold, f)
		if err != nil {
			return fmt.Errorf("audit discrepancies: %w", err)
		}
		return writePage(out, p, discrepancyColumns)
	case "changes":
		p, err := r.Changes(ctx, f)
		if err != nil {
			return fmt.Errorf("audit changes: %w", err)
		}
		return writePage(out, p, changeColumns)
	case "daily":
		p, err := r.Daily(ctx, f)
		if err != nil {
			return fmt.Errorf("audit daily: %w", err)
		}
		return writePage(out, p, dailyColumns)
	case "settings":
		var rec postgres.SettingsRecord
		if len(positional) == 1 {
			rec, err = r.Settings(ctx, positional[0])
		} else {
			rec, err = r.LatestSettings(ctx)
		}
		if errors.Is(err, postgres.ErrNotFound) {
			return fmt.Errorf("audit settings: no settings snapshot recorded with that digest")
		}
		if err != nil {
			return fmt.Errorf("audit settings: %w", err)
		}
		return out.settings(rec)
	case "verify":
		var vs []postgres.Verdict
		if len(positional) == 1 {
			vs, err = r.VerifyKey(ctx, positional[0])
			if errors.Is(err, postgres.ErrNotFound) {
				return fmt.Errorf("audit verify: no derivation or refusal with that id or key")
			}
			if err == nil {
				err = writePage(out, postgres.Page[postgres.Verdict]{Rows: vs, Limit: len(vs)}, verifyColumns)
			}
		} else {
			var p postgres.Page[postgres.Verdict]
			p, err = r.Verify(ctx, f)
			if err == nil {
				vs = p.Rows
				each := out
				each.pagedEach = true
				err = writePage(each, p, verifyColumns)
			}
		}
		if err != nil {
			return fmt.Errorf("audit verify: %w", err)
		}
		sum := postgres.Summarise(vs)
		if o := out.format; o == "table" {
			fmt.Fprintf(e.stdout, "verified (this page): %s\n", sum)
		}
		if sum.Mismatches > 0 {
			return fmt.Errorf("audit verify: %d mismatch(es): a stored value or refusal does not follow from its stored basis", sum.Mismatches)
		}
		return nil
	case "payloads":
		pc, err := postgres.CheckPayloads(ctx, pool, 1000)
		if err != nil {
			return fmt.Errorf("audit payloads: %w (this question needs a role that reads inbox.raw)", err)
		}
		if err := out.payloads(pc); err != nil {
			return err
		}
		if len(pc.Failed) > 0 {
			return fmt.Errorf("audit payloads: %d stored payload(s) refused: not the bytes received", len(pc.Failed))
		}
		return nil
	case "outputs":
		oc, err := postgres.CheckOutputs(ctx, pool, 1000)
		if err != nil {
			return fmt.Errorf("audit outputs: %w (this question reads review_published, review_outbox and review_dictionary: the reviewer role)", err)
		}
		if err := out.outputs(oc); err != nil {
			return err
		}
		if len(oc.Failed) > 0 {
			return fmt.Errorf("audit outputs: %d stored output(s) refused: not verifiably the bytes recorded", len(oc.Failed))
		}
		return nil
	case "replay":
		site := fhirmap.DefaultSite()
		base := "the defaults (no settings snapshot recorded)"
		if rec, err := r.LatestSettings(ctx); err == nil {
			st, err := consumer.ParseSettings([]byte(rec.Snapshot))
			if err != nil {
				return fmt.Errorf("audit replay: %w", err)
			}
			site, base = st.Site, "the latest recorded snapshot "+rec.Digest
		} else if !errors.Is(err, postgres.ErrNotFound) {
			return fmt.Errorf("audit replay: %w", err)
		}
		if siteChange != nil {
			b, _ := json.Marshal(siteChange)
			if err := json.Unmarshal(b, &site); err != nil {
				return usageErr("--site: " + err.Error())
			}
			base += ", changed by --site"
		}
		if err := site.Validate(); err != nil {
			return usageErr("replay settings: " + err.Error())
		}
		rep, err := r.Replay(ctx, f, site)
		if err != nil {
			return fmt.Errorf("audit replay: %w", err)
		}
		return out.replay(rep, site, base)
	case "deadletters":
		p, err := r.DeadLetters(ctx, f)
		if err != nil {
			return fmt.Errorf("audit deadletters: %w", err)
		}
		return writePage(out, p, deadLetterColumns)
	}
	return usageErr(fmt.Sprintf("unknown question %q", question))
}

func questionNames() string {
	names := make([]string, len(auditQuestions))
	for i, q := range auditQuestions {
		names[i] = q.name
	}
	return strings.Join(names, ", ")
}

// checkAuditArgs checks every argument of question q, naming the one at
// fault; it fills f.From and f.To.
func checkAuditArgs(q auditQuestion, f *postgres.Filter, from, to, format string, threshold float64, positional []string) error {
	switch format {
	case "table", "json", "csv":
	default:
		return fmt.Errorf("--format %q: want table, json or csv", format)
	}
	if f.Patient != "" && !patientRefRE.MatchString(f.Patient) {
		return fmt.Errorf("--patient %q: want a FHIR reference Patient/<id> (id: 1-64 of A-Z a-z 0-9 . -)", f.Patient)
	}
	if f.Kind != "" {
		if _, ok := fhirmap.LookupKind(f.Kind); !ok {
			return fmt.Errorf("--kind %q: not a kind of the catalogue (ventderive derive --help lists them)", f.Kind)
		}
	}
	if f.Reason != "" && !codeRE.MatchString(f.Reason) {
		return fmt.Errorf("--reason %q: want a reason code in lower-case-with-dashes", f.Reason)
	}
	if f.Algorithm != "" && strings.TrimSpace(f.Algorithm) != f.Algorithm {
		return fmt.Errorf("--algorithm %q: surrounding spaces", f.Algorithm)
	}
	var err error
	if f.From, err = parseAuditTime(from); err != nil {
		return fmt.Errorf("--from: %w", err)
	}
	if f.To, err = parseAuditTime(to); err != nil {
		return fmt.Errorf("--to: %w", err)
	}
	if !f.From.IsZero() && !f.To.IsZero() && !f.From.Before(f.To) {
		return fmt.Errorf("--from %s is not before --to %s (--to is exclusive)", from, to)
	}
	if f.Limit < 1 || f.Limit > postgres.MaxLimit {
		return fmt.Errorf("--limit %d: want 1 to %d", f.Limit, postgres.MaxLimit)
	}
	if f.Offset < 0 {
		return fmt.Errorf("--offset %d: want 0 or more", f.Offset)
	}
	if math.IsNaN(threshold) || math.IsInf(threshold, 0) || threshold < 0 {
		return fmt.Errorf("--threshold %g: want a finite number of mmHg, 0 or more", threshold)
	}
	want := 0
	switch q.name {
	case "show", "published":
		want = 1
	case "verify":
		if len(positional) == 1 {
			if f.Patient != "" || f.From != (time.Time{}) || f.To != (time.Time{}) || f.Kind != "" || f.Offset != 0 {
				return errors.New("verify of one value takes no --patient, --from, --to, --kind or --offset")
			}
			return checkShowArg(positional[0])
		}
	case "settings":
		if len(positional) == 1 {
			if !digestRE.MatchString(positional[0]) {
				return fmt.Errorf("settings %q: want a settings digest (64 lower-case hex digits)", positional[0])
			}
			return nil
		}
	}
	if len(positional) != want {
		if want == 1 {
			return fmt.Errorf("%s takes one argument, an Observation id or a key <Patient/id>|<blood-gas reference>|<kind>", q.name)
		}
		return fmt.Errorf("%s takes no argument, got %q", q.name, positional[0])
	}
	if want == 1 {
		return checkShowArg(positional[0])
	}
	return nil
}

// checkShowArg accepts an Observation id (a UUID) or a derivation key.
func checkShowArg(s string) error {
	if _, err := uuid.Parse(s); err == nil {
		return nil
	}
	parts := strings.Split(s, "|")
	if len(parts) != 3 {
		return fmt.Errorf("show %q: want an Observation id (UUID) or a key <Patient/id>|<blood-gas reference>|<kind>", s)
	}
	if !patientRefRE.MatchString(parts[0]) {
		return fmt.Errorf("show: the key's patient %q is not a reference Patient/<id>", parts[0])
	}
	if parts[1] == "" {
		return fmt.Errorf("show: the key has no blood-gas reference")
	}
	if _, ok := fhirmap.LookupKind(parts[2]); !ok {
		return fmt.Errorf("show: the key's kind %q is not a kind of the catalogue", parts[2])
	}
	return nil
}

// pickPublished finds the message of resourceType published for version
// (0: the latest version).
func pickPublished(h postgres.History, version int, resourceType string) (postgres.PublishedMessage, error) {
	if len(h.Versions) == 0 {
		return postgres.PublishedMessage{}, errors.New("the key was refused and never derived: nothing was published")
	}
	v := h.Versions[len(h.Versions)-1]
	if version > 0 {
		i := slices.IndexFunc(h.Versions, func(x postgres.Version) bool { return x.Version == version })
		if i < 0 {
			return postgres.PublishedMessage{}, fmt.Errorf("no version %d (the latest is %d)", version, v.Version)
		}
		v = h.Versions[i]
	}
	for _, m := range v.Messages {
		if m.ResourceType == resourceType {
			return m, nil
		}
	}
	return postgres.PublishedMessage{}, fmt.Errorf("version %d has no %s in the outbox", v.Version, resourceType)
}

// parseAuditTime reads RFC 3339 or a UTC date; "" is no bound.
func parseAuditTime(s string) (time.Time, error) {
	if s == "" {
		return time.Time{}, nil
	}
	if t, err := time.Parse(time.RFC3339Nano, s); err == nil {
		return t.UTC(), nil
	}
	t, err := time.Parse(time.DateOnly, s)
	if err != nil {
		return time.Time{}, fmt.Errorf("%q is neither RFC 3339 nor YYYY-MM-DD", s)
	}
	return t, nil
}

func ts(t time.Time) string {
	if t.IsZero() {
		return ""
	}
	return t.UTC().Format(time.RFC3339Nano)
}

func optTS(t *time.Time) string {
	if t == nil {
		return ""
	}
	return ts(*t)
}

func num(v float64) string { return strconv.FormatFloat(v, 'f', -1, 64) }

func optNum(v *float64) string {
	if v == nil {
		return ""
	}
	return num(*v)
}

func yes(b bool) string {
	if b {
		return "yes"
	}
	return "no"
}

type auditOutput struct {
	w      io.Writer
	format string
	// pagedEach: the page holds two lists paged each by the same --limit
	// and --offset (verify: versions, then refusals).
	pagedEach bool
}

// moreText says which rows a page holds and where the next starts.
func (o auditOutput) moreText(offset, rows, next int) string {
	if o.pagedEach {
		return fmt.Sprintf("versions and refusals are paged each: this page has those from row %d of each list; next page --offset %d", offset+1, next)
	}
	return fmt.Sprintf("this page has rows %d-%d; next page --offset %d", offset+1, offset+rows, next)
}

func (o auditOutput) json(v any) error {
	enc := json.NewEncoder(o.w)
	enc.SetIndent("", "  ")
	return enc.Encode(v)
}

// column is one column of a question's output: in the table (human, as
// published), in the CSV, or both.
type column[T any] struct {
	name  string // table header; the CSV header is its lower-case_with_underscores form unless csv is set
	csv   string
	where int // 0 both, tableOnly, csvOnly
	cell  func(T) string
}

const (
	both = iota
	tableOnly
	csvOnly
)

func (c column[T]) csvName() string {
	if c.csv != "" {
		return c.csv
	}
	return strings.ReplaceAll(strings.ToLower(c.name), " ", "_")
}

// writePage writes one page as a table, CSV or a JSON object (the page:
// rows, offset, limit, more, nextOffset). When more rows exist the table
// ends with a line and the CSV with a "#" comment line naming the next
// offset.
func writePage[T any](o auditOutput, p postgres.Page[T], cols []column[T]) error {
	switch o.format {
	case "json":
		return o.json(p)
	case "csv":
		w := csv.NewWriter(o.w)
		var header []string
		for _, c := range cols {
			if c.where != tableOnly {
				header = append(header, c.csvName())
			}
		}
		w.Write(header)
		for _, it := range p.Rows {
			var cells []string
			for _, c := range cols {
				if c.where != tableOnly {
					cells = append(cells, c.cell(it))
				}
			}
			w.Write(cells)
		}
		w.Flush()
		if err := w.Error(); err != nil {
			return err
		}
		if p.More {
			_, err := fmt.Fprintf(o.w, "# more rows: %s\n", o.moreText(p.Offset, len(p.Rows), p.NextOffset))
			return err
		}
		return nil
	}
	tw := tabwriter.NewWriter(o.w, 0, 0, 2, ' ', 0)
	var header []string
	for _, c := range cols {
		if c.where != csvOnly {
			header = append(header, c.name)
		}
	}
	fmt.Fprintln(tw, strings.Join(header, "\t"))
	for _, it := range p.Rows {
		var cells []string
		for _, c := range cols {
			if c.where != csvOnly {
				cells = append(cells, c.cell(it))
			}
		}
		fmt.Fprintln(tw, strings.Join(clean(cells), "\t"))
	}
	if len(p.Rows) == 0 {
		fmt.Fprintln(tw, "(none)")
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	if p.More {
		_, err := fmt.Fprintf(o.w, "more rows: %s\n", o.moreText(p.Offset, len(p.Rows), p.NextOffset))
		return err
	}
	return nil
}

// clean keeps tabs and newlines of stored text from breaking a table.
func clean(cells []string) []string {
	for i, c := range cells {
		cells[i] = strings.NewReplacer("\t", " ", "\n", " ").Replace(c)
	}
	return cells
}

// valueText is a published value for people: "none (retracted)" for a
// retraction.
func valueText(published string, status string) string {
	if status == string(fhirmap.StatusEnteredInError) {
		return "none (retracted)"
	}
	return published
}

var listColumns = []column[postgres.Version]{
	{name: "BLOOD GAS TIME", csv: "blood_gas_time", cell: func(v postgres.Version) string { return ts(v.Effective) }},
	{name: "PATIENT", cell: func(v postgres.Version) string { return v.Patient }},
	{name: "BLOOD GAS", cell: func(v postgres.Version) string { return v.BloodGas }},
	{name: "KIND", cell: func(v postgres.Version) string { return v.Kind }},
	{name: "VERSION", cell: func(v postgres.Version) string { return strconv.Itoa(v.Version) }},
	{name: "STATUS", cell: func(v postgres.Version) string { return v.Status }},
	{name: "VALUE", where: tableOnly, cell: func(v postgres.Version) string { return valueText(v.Published, v.Status) }},
	{name: "VALUE", where: csvOnly, csv: "value", cell: func(v postgres.Version) string { return v.Published }},
	{name: "UNROUNDED", csv: "value_unrounded", where: csvOnly, cell: func(v postgres.Version) string { return optNum(v.Value) }},
	{name: "UNIT", cell: func(v postgres.Version) string { return v.DisplayUnit }},
	{name: "UCUM", csv: "unit_ucum", where: csvOnly, cell: func(v postgres.Version) string { return v.Unit }},
	{name: "INTERP", csv: "interpretation_code", cell: func(v postgres.Version) string { return v.Interpretation.Code }},
	{name: "METHOD", cell: func(v postgres.Version) string { return v.Method + " v" + v.MethodVersion }},
	{name: "ALGORITHM", cell: func(v postgres.Version) string { return v.Algorithm }},
	{name: "CURRENT", cell: func(v postgres.Version) string { return yes(v.Current) }},
	{name: "RECORDED", cell: func(v postgres.Version) string { return ts(v.Recorded) }},
	{name: "OBSERVATION", csv: "observation_id", cell: func(v postgres.Version) string { return v.ObservationID }},
}

// inputsText is the inputs of a row in one cell: role value unit, ...
func inputsText(ins []postgres.Input) string {
	parts := make([]string, len(ins))
	for i, in := range ins {
		parts[i] = in.Role + " " + withUnit(in.Shown, in.DisplayUnit)
		if s := sentAs(in); s != "" {
			parts[i] += " (sent as " + s + ")"
		}
		if in.PatientLevel {
			parts[i] += " (patient-level)"
		} else {
			parts[i] += " at " + in.OffsetText()
		}
		parts[i] += " " + in.FactKey
	}
	return strings.Join(parts, "; ")
}

func nearestText(n *postgres.NearestReading) string {
	if n == nil {
		return ""
	}
	return fmt.Sprintf("%s %s at %s (%s)", n.Quantity, withUnit(n.Shown, n.DisplayUnit), n.Offset, n.FactKey)
}

func nearestCell(f func(n *postgres.NearestReading) string) func(postgres.RefusalRow) string {
	return func(r postgres.RefusalRow) string {
		if r.Nearest == nil {
			return ""
		}
		return f(r.Nearest)
	}
}

var refusedColumns = []column[postgres.RefusalRow]{
	{name: "BLOOD GAS TIME", csv: "blood_gas_time", cell: func(r postgres.RefusalRow) string { return ts(r.Effective) }},
	{name: "PATIENT", cell: func(r postgres.RefusalRow) string { return r.Patient }},
	{name: "BLOOD GAS", cell: func(r postgres.RefusalRow) string { return r.BloodGas }},
	{name: "KIND", cell: func(r postgres.RefusalRow) string { return r.Kind }},
	{name: "REASON", cell: func(r postgres.RefusalRow) string { return r.Reason }},
	{name: "DETAIL", cell: func(r postgres.RefusalRow) string { return r.Detail }},
	{name: "NEAREST VENTILATOR READING", where: tableOnly, cell: func(r postgres.RefusalRow) string { return nearestText(r.Nearest) }},
	{name: "NEAREST", csv: "nearest_fact", where: csvOnly, cell: nearestCell(func(n *postgres.NearestReading) string { return n.FactKey })},
	{name: "NEAREST", csv: "nearest_quantity", where: csvOnly, cell: nearestCell(func(n *postgres.NearestReading) string { return n.Quantity })},
	{name: "NEAREST", csv: "nearest_value", where: csvOnly, cell: nearestCell(func(n *postgres.NearestReading) string { return num(n.Value) })},
	{name: "NEAREST", csv: "nearest_unit", where: csvOnly, cell: nearestCell(func(n *postgres.NearestReading) string { return n.DisplayUnit })},
	{name: "NEAREST", csv: "nearest_effective", where: csvOnly, cell: nearestCell(func(n *postgres.NearestReading) string { return ts(n.Effective) })},
	{name: "NEAREST", csv: "nearest_offset", where: csvOnly, cell: nearestCell(func(n *postgres.NearestReading) string { return n.Offset.String() })},
	{name: "CONSIDERED", cell: func(r postgres.RefusalRow) string { return inputsText(r.Considered) }},
	{name: "CURRENT", cell: func(r postgres.RefusalRow) string { return yes(r.Current) }},
	{name: "RECORDED", cell: func(r postgres.RefusalRow) string { return ts(r.Recorded) }},
}

var refusalCountColumns = []column[postgres.ReasonCount]{
	{name: "REASON", cell: func(c postgres.ReasonCount) string { return c.Reason }},
	{name: "KIND", cell: func(c postgres.ReasonCount) string { return c.Kind }},
	{name: "COUNT", cell: func(c postgres.ReasonCount) string { return strconv.Itoa(c.Count) }},
	{name: "CURRENT", cell: func(c postgres.ReasonCount) string { return strconv.Itoa(c.Current) }},
	{name: "PATIENTS", cell: func(c postgres.ReasonCount) string { return strconv.Itoa(c.Patients) }},
	{name: "FIRST BLOOD GAS TIME", csv: "first_blood_gas_time", cell: func(c postgres.ReasonCount) string { return ts(c.First) }},
	{name: "LAST BLOOD GAS TIME", csv: "last_blood_gas_time", cell: func(c postgres.ReasonCount) string { return ts(c.Last) }},
}

var discrepancyColumns = []column[postgres.Discrepancy]{
	{name: "BLOOD GAS TIME", csv: "blood_gas_time", cell: func(d postgres.Discrepancy) string { return ts(d.Effective) }},
	{name: "PATIENT", cell: func(d postgres.Discrepancy) string { return d.Patient }},
	{name: "BLOOD GAS", cell: func(d postgres.Discrepancy) string { return d.BloodGas }},
	{name: "MEASURED-PREDICTED mmHg", csv: "difference_mmhg", cell: func(d postgres.Discrepancy) string { return d.Difference }},
	{name: "UNROUNDED", csv: "difference_mmhg_unrounded", where: csvOnly, cell: func(d postgres.Discrepancy) string { return num(d.DifferenceMmHg) }},
	{name: "MEASURED mmHg", csv: "measured_mmhg", cell: func(d postgres.Discrepancy) string { return d.Measured }},
	{name: "UNROUNDED", csv: "measured_mmhg_unrounded", where: csvOnly, cell: func(d postgres.Discrepancy) string { return optNum(d.MeasuredMmHg) }},
	{name: "PREDICTED mmHg", csv: "predicted_mmhg", cell: func(d postgres.Discrepancy) string { return d.Predicted }},
	{name: "UNROUNDED", csv: "predicted_mmhg_unrounded", where: csvOnly, cell: func(d postgres.Discrepancy) string { return optNum(d.PredictedMmHg) }},
	{name: "STATUS", cell: func(d postgres.Discrepancy) string { return d.Status }},
	{name: "VERSION", cell: func(d postgres.Discrepancy) string { return strconv.Itoa(d.Version) }},
	{name: "INTERP", csv: "interpretation_code", cell: func(d postgres.Discrepancy) string { return d.InterpCode }},
	{name: "INTERPRETATION", cell: func(d postgres.Discrepancy) string { return d.Interpretation }},
	{name: "RECORDED", cell: func(d postgres.Discrepancy) string { return ts(d.Recorded) }},
}

var changeColumns = []column[postgres.Change]{
	{name: "BLOOD GAS TIME", csv: "blood_gas_time", cell: func(c postgres.Change) string { return ts(c.Effective) }},
	{name: "PATIENT", cell: func(c postgres.Change) string { return c.Patient }},
	{name: "BLOOD GAS", cell: func(c postgres.Change) string { return c.BloodGas }},
	{name: "KIND", cell: func(c postgres.Change) string { return c.Kind }},
	{name: "VERSIONS", cell: func(c postgres.Change) string { return fmt.Sprintf("%d->%d", c.FromVersion, c.ToVersion) }},
	{name: "FROM", where: tableOnly, cell: func(c postgres.Change) string { return valueText(c.FromPublished, c.FromStatus) }},
	{name: "TO", where: tableOnly, cell: func(c postgres.Change) string { return valueText(c.ToPublished, c.ToStatus) }},
	{name: "FROM", csv: "from_value", where: csvOnly, cell: func(c postgres.Change) string { return c.FromPublished }},
	{name: "FROM", csv: "from_value_unrounded", where: csvOnly, cell: func(c postgres.Change) string { return optNum(c.FromValue) }},
	{name: "TO", csv: "to_value", where: csvOnly, cell: func(c postgres.Change) string { return c.ToPublished }},
	{name: "TO", csv: "to_value_unrounded", where: csvOnly, cell: func(c postgres.Change) string { return optNum(c.ToValue) }},
	{name: "UNIT", cell: func(c postgres.Change) string { return c.DisplayUnit }},
	{name: "UCUM", csv: "unit_ucum", where: csvOnly, cell: func(c postgres.Change) string { return c.Unit }},
	{name: "STATUS", cell: func(c postgres.Change) string { return c.FromStatus + "->" + c.ToStatus }},
	{name: "RETRACTED", csv: "retraction_reason", cell: func(c postgres.Change) string { return c.Retracted }},
	{name: "RECORDED", cell: func(c postgres.Change) string { return ts(c.Recorded) }},
}

var dailyColumns = []column[postgres.DayCount]{
	{name: "BLOOD GAS DAY (UTC)", csv: "blood_gas_day", cell: func(d postgres.DayCount) string { return d.Day }},
	{name: "BLOOD GASES", cell: func(d postgres.DayCount) string { return strconv.Itoa(d.BloodGases) }},
	{name: "DERIVATIONS", cell: func(d postgres.DayCount) string { return strconv.Itoa(d.Derivations) }},
	{name: "RETRACTIONS", cell: func(d postgres.DayCount) string { return strconv.Itoa(d.Retractions) }},
	{name: "REFUSALS", cell: func(d postgres.DayCount) string { return strconv.Itoa(d.Refusals) }},
}

var deadLetterColumns = []column[postgres.DeadLetterRecord]{
	{name: "RECORDED", cell: func(d postgres.DeadLetterRecord) string { return ts(d.Recorded) }},
	{name: "SUBJECT", cell: func(d postgres.DeadLetterRecord) string { return d.Subject }},
	{name: "STREAM SEQ", cell: func(d postgres.DeadLetterRecord) string { return strconv.FormatInt(d.StreamSeq, 10) }},
	{name: "BYTES", cell: func(d postgres.DeadLetterRecord) string { return strconv.Itoa(d.SizeBytes) }},
	{name: "REASON", cell: func(d postgres.DeadLetterRecord) string { return d.Reason }},
	{name: "DETAIL", cell: func(d postgres.DeadLetterRecord) string { return d.Detail }},
	{name: "INBOX KEY", cell: func(d postgres.DeadLetterRecord) string { return d.InboxKey }},
}

// withUnit joins a value and a display unit ("" for dimensionless).
func withUnit(v, unit string) string {
	if unit == "" || v == "" {
		return v
	}
	return v + " " + unit
}

// show writes one derived value's history.
func (o auditOutput) show(h postgres.History) error {
	switch o.format {
	case "json":
		return o.json(h)
	case "csv":
		w := csv.NewWriter(o.w)
		w.Write([]string{"record", "version_or_refusal", "status_or_reason", "value", "value_unrounded", "unit", "unit_ucum",
			"blood_gas_time", "recorded", "input", "role", "fact_key", "fact_digest", "resource", "quantity",
			"input_value", "input_value_unrounded", "input_unit", "input_unit_ucum", "input_sent_as", "input_status",
			"input_patient_level", "input_effective", "offset", "fallback"})
		for _, v := range h.Versions {
			base := []string{"version", strconv.Itoa(v.Version), v.Status, v.Published, optNum(v.Value), v.DisplayUnit, v.Unit,
				ts(v.Effective), ts(v.Recorded)}
			if len(v.Inputs) == 0 {
				w.Write(append(base, make([]string, 16)...))
			}
			for _, in := range v.Inputs {
				w.Write(append(slices.Clone(base), inputCells(in)...))
			}
		}
		for _, r := range h.Refusals {
			base := []string{"refusal", strconv.FormatInt(r.ID, 10), r.Reason, "", "", "", "", ts(r.Effective), ts(r.Recorded)}
			if len(r.Considered) == 0 {
				w.Write(append(base, make([]string, 16)...))
			}
			for _, in := range r.Considered {
				w.Write(append(slices.Clone(base), inputCells(in)...))
			}
		}
		w.Flush()
		return w.Error()
	}
	var b strings.Builder
	fmt.Fprintf(&b, "key %s\n", h.Key)
	fmt.Fprintln(&b, "Advisory values: not orders; verify at the bedside.")
	for _, v := range h.Versions {
		fmt.Fprintf(&b, "\nversion %d  %s", v.Version, v.Status)
		if v.Supersedes > 0 {
			fmt.Fprintf(&b, "  supersedes version %d", v.Supersedes)
		}
		if v.SupersededBy > 0 {
			fmt.Fprintf(&b, "  superseded by version %d", v.SupersededBy)
		}
		if v.Current {
			b.WriteString("  (current)")
		}
		fmt.Fprintf(&b, "\n  blood gas       %s at %s\n", v.BloodGas, ts(v.Effective))
		fmt.Fprintf(&b, "  recorded        %s\n", ts(v.Recorded))
		fmt.Fprintf(&b, "  observation     %s\n", v.ObservationID)
		fmt.Fprintf(&b, "  patient         %s", v.Patient)
		if v.Encounter != "" {
			fmt.Fprintf(&b, "  encounter %s", v.Encounter)
		}
		b.WriteString("\n")
		if v.Value == nil {
			fmt.Fprintf(&b, "  value           none: withdrawn (%s), published without a value\n", v.Retracted)
		} else {
			fmt.Fprintf(&b, "  value           %s  (stored unrounded: %s)\n", withUnit(v.Published, v.DisplayUnit), num(*v.Value))
		}
		fmt.Fprintf(&b, "  method          %s (method version %s; algorithm %s)\n", v.Method, v.MethodVersion, v.Algorithm)
		fmt.Fprintf(&b, "  basis           %s\n", v.Basis)
		if rec := v.Record; rec != nil {
			// The published basis as stored: every step, constant and
			// assumption the Observation's notes list.
			for _, st := range rec.Steps {
				fmt.Fprintf(&b, "  step            %s: %s\n", st.Method, st.Basis)
			}
			for _, c := range rec.Constants {
				fmt.Fprintf(&b, "  constant        %s = %s (%s)\n", c.Name, withUnit(physio.DisplayNumber(c.Value), physio.DisplayUnit(c.Unit)), c.Source)
			}
			for _, a := range rec.Assumptions {
				fmt.Fprintf(&b, "  assumption      %s\n", a)
			}
		} else {
			for _, c := range v.Constants {
				fmt.Fprintf(&b, "  constant        %s = %s (%s)\n", c.Name, withUnit(physio.DisplayNumber(c.Value), physio.DisplayUnit(c.Unit)), c.Source)
			}
			for _, a := range v.Assumptions {
				fmt.Fprintf(&b, "  assumption      %s\n", a)
			}
		}
		if v.Interpretation.Code != "" || v.Interpretation.Text != "" {
			fmt.Fprintf(&b, "  interpretation  %s %s (%s)\n", v.Interpretation.Code, v.Interpretation.Text, v.Interpretation.Source)
		}
		for _, f := range v.Flags {
			fmt.Fprintf(&b, "  flag            %s\n", f)
		}
		fmt.Fprintf(&b, "  digest          %s\n", v.Digest)
		fmt.Fprintf(&b, "  settings        %s\n", settingsText(v.Settings))
		for _, m := range v.Messages {
			state := "not yet published"
			if m.PublishedAt != nil {
				state = "published " + ts(*m.PublishedAt)
			}
			fmt.Fprintf(&b, "  published       %s, %d bytes, SHA-256 %s, %s\n", m.ResourceType, m.SizeBytes, m.Digest, state)
		}
		writeInputs(&b, "inputs", v.Inputs)
	}
	for _, r := range h.Refusals {
		fmt.Fprintf(&b, "\nrefusal %d  %s", r.ID, r.Reason)
		if r.Current {
			b.WriteString("  (current)")
		}
		fmt.Fprintf(&b, "\n  blood gas       %s at %s\n", r.BloodGas, ts(r.Effective))
		fmt.Fprintf(&b, "  recorded        %s\n", ts(r.Recorded))
		fmt.Fprintf(&b, "  detail          %s\n", r.Detail)
		fmt.Fprintf(&b, "  settings        %s\n", settingsText(r.Settings))
		writeInputs(&b, "considered", r.Considered)
	}
	_, err := io.WriteString(o.w, b.String())
	return err
}

// settingsText names a settings snapshot ("audit settings <digest>"
// shows it), or says that none was recorded.
func settingsText(digest string) string {
	if digest == "" {
		return "none recorded (made before the store kept settings snapshots, or by another planner)"
	}
	return digest
}

func sentAs(in postgres.Input) string {
	if in.SourceValue == nil {
		return ""
	}
	return withUnit(num(*in.SourceValue), postgres.DisplayUnit(in.SourceUnit))
}

func inputCells(in postgres.Input) []string {
	return []string{strconv.Itoa(in.Ordinal), in.Role, in.FactKey, in.FactDigest, in.Resource, in.Quantity,
		in.Shown, optNum(in.Value), in.DisplayUnit, in.Unit, sentAs(in), in.Status, yes(in.PatientLevel),
		optTS(in.Effective), in.OffsetText(), in.Fallback}
}

func writeInputs(b *strings.Builder, title string, ins []postgres.Input) {
	if len(ins) == 0 {
		return
	}
	fmt.Fprintf(b, "  %s:\n", title)
	tw := tabwriter.NewWriter(b, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "    ROLE\tFACT\tVALUE\tUNIT\tSENT AS\tSTATUS\tEFFECTIVE\tOFFSET\tFALLBACK")
	for _, in := range ins {
		when, offset := optTS(in.Effective), in.OffsetText()
		if in.PatientLevel {
			when, offset = "patient-level (no time)", "-"
		}
		fmt.Fprintf(tw, "    %s\n", strings.Join(clean([]string{in.Role, in.FactKey, in.Shown, in.DisplayUnit, sentAs(in), in.Status,
			when, offset, in.Fallback}), "\t"))
	}
	tw.Flush()
}

// checkSiteNames refuses a --site setting that fhirmap.Site does not have
// (a misspelt name would otherwise be ignored silently).
func checkSiteNames(change map[string]json.RawMessage) error {
	b, err := json.Marshal(fhirmap.DefaultSite())
	if err != nil {
		return err
	}
	var known map[string]json.RawMessage
	if err := json.Unmarshal(b, &known); err != nil {
		return err
	}
	for name := range change {
		if _, ok := known[name]; !ok {
			names := make([]string, 0, len(known))
			for n := range known {
				names = append(names, n)
			}
			slices.Sort(names)
			return fmt.Errorf("%q is not a site setting (settings: %s)", name, strings.Join(names, ", "))
		}
	}
	return nil
}

var verifyColumns = []column[postgres.Verdict]{
	{name: "BLOOD GAS TIME", csv: "blood_gas_time", cell: func(v postgres.Verdict) string { return ts(v.Effective) }},
	{name: "PATIENT", cell: func(v postgres.Verdict) string { return v.Patient }},
	{name: "BLOOD GAS", cell: func(v postgres.Verdict) string { return v.BloodGas }},
	{name: "KIND", cell: func(v postgres.Verdict) string { return v.Kind }},
	{name: "VERSION", cell: func(v postgres.Verdict) string {
		if v.Status == postgres.StatusRefused {
			return ""
		}
		return strconv.Itoa(v.Version)
	}},
	{name: "STATUS", cell: func(v postgres.Verdict) string { return v.Status }},
	{name: "OUTCOME", cell: func(v postgres.Verdict) string { return v.Outcome }},
	{name: "PUBLISHED", where: tableOnly, cell: func(v postgres.Verdict) string { return withUnit(valueText(v.Published, v.Status), v.DisplayUnit) }},
	{name: "RE-DERIVED", where: tableOnly, cell: func(v postgres.Verdict) string { return withUnit(v.Rederived, v.DisplayUnit) }},
	{name: "PUBLISHED", csv: "published_value", where: csvOnly, cell: func(v postgres.Verdict) string { return v.Published }},
	{name: "PUBLISHED", csv: "published_value_unrounded", where: csvOnly, cell: func(v postgres.Verdict) string { return optNum(v.PublishedValue) }},
	{name: "RE-DERIVED", csv: "rederived_value", where: csvOnly, cell: func(v postgres.Verdict) string { return v.Rederived }},
	{name: "RE-DERIVED", csv: "rederived_value_unrounded", where: csvOnly, cell: func(v postgres.Verdict) string { return optNum(v.RederivedValue) }},
	{name: "UNIT", csv: "unit", where: csvOnly, cell: func(v postgres.Verdict) string { return v.DisplayUnit }},
	{name: "INTERP", csv: "interpretation", cell: func(v postgres.Verdict) string { return arrow(v.Interpretation, v.RederivedInterp, v.Rederived != "") }},
	{name: "DIGEST", csv: "digest_reproduced", cell: func(v postgres.Verdict) string { return same(v.Digest, v.RederivedDigest) }},
	{name: "OBSERVATION BYTES", csv: "observation_bytes_reproduced", cell: func(v postgres.Verdict) string { return same(v.ObservationDigest, v.RederivedObservation) }},
	{name: "SETTINGS", csv: "settings_digest", cell: func(v postgres.Verdict) string { return short(v.Settings) }},
	{name: "REASON", csv: "reason", where: csvOnly, cell: func(v postgres.Verdict) string { return v.Reason }},
	{name: "DETAIL", csv: "detail", where: csvOnly, cell: func(v postgres.Verdict) string { return v.Detail }},
	{name: "RE-DERIVED REASON", csv: "rederived_reason", where: csvOnly, cell: func(v postgres.Verdict) string { return v.RederivedReason }},
	{name: "RE-DERIVED DETAIL", csv: "rederived_detail", where: csvOnly, cell: func(v postgres.Verdict) string { return v.RederivedDetail }},
	{name: "FINDINGS", csv: "findings", cell: func(v postgres.Verdict) string {
		if v.Why != "" {
			return strings.Join(append([]string{v.Why}, v.Findings...), "; ")
		}
		return strings.Join(v.Findings, "; ")
	}},
}

// arrow shows a stored and a re-derived code: "H" when equal, "H->N" when
// not, the stored one alone when nothing was re-derived.
func arrow(from, to string, rederived bool) string {
	if !rederived {
		return from
	}
	if from == to {
		return from
	}
	return orDash(from) + "->" + orDash(to)
}

func orDash(s string) string {
	if s == "" {
		return "-"
	}
	return s
}

// same says whether a re-derived digest equals the stored one; "" when
// nothing was re-derived.
func same(stored, rederived string) string {
	switch {
	case rederived == "":
		return ""
	case stored == rederived:
		return "reproduced"
	}
	return "differs"
}

// short abbreviates a digest for the table (the full one is in CSV and JSON
// through "audit settings").
func short(d string) string {
	if len(d) > 12 {
		return d[:12]
	}
	return d
}

// settings writes one settings snapshot.
func (o auditOutput) settings(rec postgres.SettingsRecord) error {
	switch o.format {
	case "json":
		return o.json(rec)
	case "csv":
		var site map[string]json.RawMessage
		if err := json.Unmarshal(rec.Site, &site); err != nil {
			return err
		}
		w := csv.NewWriter(o.w)
		w.Write([]string{"digest", "algorithm", "alias_digest", "recorded", "setting", "value"})
		names := make([]string, 0, len(site))
		for n := range site {
			names = append(names, n)
		}
		slices.Sort(names)
		for _, n := range names {
			w.Write([]string{rec.Digest, rec.Algorithm, rec.AliasDigest, ts(rec.Recorded), n, string(site[n])})
		}
		w.Flush()
		return w.Error()
	}
	var b strings.Builder
	fmt.Fprintf(&b, "settings snapshot %s\n", rec.Digest)
	fmt.Fprintf(&b, "  algorithm       %s\n", rec.Algorithm)
	alias := rec.AliasDigest
	if alias == "" {
		alias = "none (no code alias file)"
	}
	fmt.Fprintf(&b, "  alias file      SHA-256 %s\n", alias)
	fmt.Fprintf(&b, "  first recorded  %s\n", ts(rec.Recorded))
	var site map[string]json.RawMessage
	if err := json.Unmarshal(rec.Site, &site); err != nil {
		return err
	}
	names := make([]string, 0, len(site))
	for n := range site {
		names = append(names, n)
	}
	slices.Sort(names)
	for _, n := range names {
		fmt.Fprintf(&b, "  %-28s %s\n", n, site[n])
	}
	fmt.Fprintf(&b, "  (durations in nanoseconds; the stored bytes, whose SHA-256 is the digest, are in --format json)\n")
	_, err := io.WriteString(o.w, b.String())
	return err
}

func optDelta(v *float64) string {
	if v == nil {
		return ""
	}
	return physio.DisplayNumber(*v)
}

var replayKindColumns = []column[postgres.ReplayKind]{
	{name: "KIND", cell: func(k postgres.ReplayKind) string { return k.Kind }},
	{name: "COMPARED", cell: func(k postgres.ReplayKind) string { return strconv.Itoa(k.Compared) }},
	{name: "UNCHANGED", cell: func(k postgres.ReplayKind) string { return strconv.Itoa(k.Unchanged) }},
	{name: "VALUES CHANGED", cell: func(k postgres.ReplayKind) string { return strconv.Itoa(k.ValuesChanged) }},
	{name: "CHANGE MIN", csv: "change_min", cell: func(k postgres.ReplayKind) string { return optDelta(k.DeltaMin) }},
	{name: "Q1", csv: "change_q1", cell: func(k postgres.ReplayKind) string { return optDelta(k.DeltaQ1) }},
	{name: "MEDIAN", csv: "change_median", cell: func(k postgres.ReplayKind) string { return optDelta(k.DeltaMedian) }},
	{name: "Q3", csv: "change_q3", cell: func(k postgres.ReplayKind) string { return optDelta(k.DeltaQ3) }},
	{name: "MAX", csv: "change_max", cell: func(k postgres.ReplayKind) string { return optDelta(k.DeltaMax) }},
	{name: "UNIT", cell: func(k postgres.ReplayKind) string { return k.DisplayUnit }},
	{name: "INTERP FLIPS", csv: "interpretations_flipped", cell: func(k postgres.ReplayKind) string { return strconv.Itoa(k.InterpretationsFlipped) }},
	{name: "REFUSED->VALUE", csv: "refusals_to_values", cell: func(k postgres.ReplayKind) string { return strconv.Itoa(k.RefusalsToValues) }},
	{name: "VALUE->REFUSED", csv: "values_to_refusals", cell: func(k postgres.ReplayKind) string { return strconv.Itoa(k.ValuesToRefusals) }},
	{name: "REASON CHANGED", csv: "reasons_changed", cell: func(k postgres.ReplayKind) string { return strconv.Itoa(k.ReasonsChanged) }},
	{name: "OTHER", csv: "other", cell: func(k postgres.ReplayKind) string { return strconv.Itoa(k.Other) }},
}

var replayChangeColumns = []column[postgres.ReplayChange]{
	{name: "BLOOD GAS TIME", csv: "blood_gas_time", cell: func(c postgres.ReplayChange) string { return ts(c.Effective) }},
	{name: "PATIENT", cell: func(c postgres.ReplayChange) string { return c.Patient }},
	{name: "BLOOD GAS", cell: func(c postgres.ReplayChange) string { return c.BloodGas }},
	{name: "KIND", cell: func(c postgres.ReplayChange) string { return c.Kind }},
	{name: "CHANGE", cell: func(c postgres.ReplayChange) string { return c.Change }},
	{name: "STORED", cell: func(c postgres.ReplayChange) string { return c.From }},
	{name: "REPLAYED", cell: func(c postgres.ReplayChange) string { return c.To }},
	{name: "DIFFERENCE", cell: func(c postgres.ReplayChange) string { return optDelta(c.Delta) }},
	{name: "DIFFERENCE", csv: "difference_unrounded", where: csvOnly, cell: func(c postgres.ReplayChange) string { return optNum(c.Delta) }},
	{name: "INTERP", csv: "interpretation", cell: func(c postgres.ReplayChange) string {
		if c.FromInterp == c.ToInterp {
			return c.FromInterp
		}
		return orDash(c.FromInterp) + "->" + orDash(c.ToInterp)
	}},
}

// replay writes a replay report: the settings, the summary per kind, then
// the page of changed keys.
func (o auditOutput) replay(rep postgres.ReplayReport, site fhirmap.Site, base string) error {
	if o.format == "json" {
		return o.json(struct {
			postgres.ReplayReport
			Settings     fhirmap.Site `json:"settings"`
			SettingsFrom string       `json:"settingsFrom"`
		}{rep, site, base})
	}
	if o.format == "csv" {
		// Two tables in one stream: the summary, a blank line, the changes.
		if err := writePage(o, postgres.Page[postgres.ReplayKind]{Rows: rep.Kinds, Limit: len(rep.Kinds)}, replayKindColumns); err != nil {
			return err
		}
		fmt.Fprintln(o.w)
		return writePage(o, rep.Changes, replayChangeColumns)
	}
	fmt.Fprintf(o.w, "replay under %s (this build) of the blood gases from %s to %s: %d blood gas(es); nothing written or published\n",
		rep.Algorithm, ts(rep.From), ts(rep.To), rep.BloodGases)
	fmt.Fprintf(o.w, "settings: %s\n", base)
	fmt.Fprintln(o.w, "compared with each key's latest stored state; changes are replayed minus stored, in the kind's display unit")
	fmt.Fprintln(o.w)
	if err := writePage(o, postgres.Page[postgres.ReplayKind]{Rows: rep.Kinds, Limit: len(rep.Kinds)}, replayKindColumns); err != nil {
		return err
	}
	fmt.Fprintln(o.w)
	fmt.Fprintln(o.w, "changed keys:")
	return writePage(o, rep.Changes, replayChangeColumns)
}

// payloads writes what audit payloads found: counts, bytes stored against
// bytes received, and each refused payload by inbox key.
func (o auditOutput) payloads(pc postgres.PayloadCheck) error {
	switch o.format {
	case "json":
		return o.json(pc)
	case "csv":
		w := csv.NewWriter(o.w)
		w.Write([]string{"compressed", "plain", "stored_bytes", "payload_bytes", "refused"})
		w.Write([]string{strconv.FormatInt(pc.Compressed, 10), strconv.FormatInt(pc.Plain, 10),
			strconv.FormatInt(pc.StoredBytes, 10), strconv.FormatInt(pc.PayloadBytes, 10), strings.Join(pc.Failed, "; ")})
		w.Flush()
		return w.Error()
	}
	var b strings.Builder
	n := pc.Compressed + pc.Plain
	fmt.Fprintf(&b, "stored payloads that are the bytes received: %d (%d compressed, %d plain from before migration 0015)\n", n, pc.Compressed, pc.Plain)
	if pc.StoredBytes > 0 {
		fmt.Fprintf(&b, "  %d bytes stored for %d received (%.1f to 1)\n", pc.StoredBytes, pc.PayloadBytes, float64(pc.PayloadBytes)/float64(pc.StoredBytes))
	}
	fmt.Fprintf(&b, "refused: %d\n", len(pc.Failed))
	for _, f := range pc.Failed {
		fmt.Fprintf(&b, "  %s\n", f)
	}
	_, err := io.WriteString(o.w, b.String())
	return err
}

// outputs writes what audit outputs found: counts, bytes stored against
// exact bytes, and each refused row.
func (o auditOutput) outputs(oc postgres.OutputCheck) error {
	switch o.format {
	case "json":
		return o.json(oc)
	case "csv":
		w := csv.NewWriter(o.w)
		w.Write([]string{"compressed", "plain", "stored_bytes", "payload_bytes", "refused"})
		w.Write([]string{strconv.FormatInt(oc.Compressed, 10), strconv.FormatInt(oc.Plain, 10),
			strconv.FormatInt(oc.StoredBytes, 10), strconv.FormatInt(oc.PayloadBytes, 10), strings.Join(oc.Failed, "; ")})
		w.Flush()
		return w.Error()
	}
	var b strings.Builder
	n := oc.Compressed + oc.Plain
	fmt.Fprintf(&b, "stored outputs that are the bytes recorded: %d (%d compressed, %d plain from before migration 0018)\n", n, oc.Compressed, oc.Plain)
	if oc.Plain > 0 {
		// The view computes a plain row's digest from the same bytes.
		fmt.Fprintf(&b, "  %d plain (no stored digest: not independently verifiable)\n", oc.Plain)
	}
	if oc.StoredBytes > 0 {
		fmt.Fprintf(&b, "  %d bytes stored for %d published (%.1f to 1)\n", oc.StoredBytes, oc.PayloadBytes, float64(oc.PayloadBytes)/float64(oc.StoredBytes))
	}
	fmt.Fprintf(&b, "refused: %d\n", len(oc.Failed))
	for _, f := range oc.Failed {
		fmt.Fprintf(&b, "  %s\n", f)
	}
	_, err := io.WriteString(o.w, b.String())
	return err
}
