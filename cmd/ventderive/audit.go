package main

import (
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"slices"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/postgres"
	"github.com/ventderive/ventderive/physio"
)

func init() {
	register(command{name: "audit", summary: "answer reviewer questions from the provenance store (read-only)", run: runAudit})
}

const auditUsage = `usage: ventderive audit <question> [flags]
questions:
  show <observation-id or key>  one derived value: every version, its inputs, times, offsets,
                                constants, assumptions, basis, what superseded what, refusals
  list           derivation versions       [--patient REF] [--from T] [--to T] [--kind K] [--algorithm V]
  refusals       refusals by reason code   [--patient REF] [--from T] [--to T] [--kind K]
  discrepancies  measured minus predicted PaCO2 at or above --threshold mm[Hg] (default 5)
  changes        values changed by amendment, correction or retraction
  daily          derivations, retractions, refusals and dead letters per UTC day (by recording time)
  deadletters    poison messages (without their bytes)
flags common to all: --database-url URL (default $DATABASE_URL; normally the reviewer role)
  --format table|json|csv (default table) --limit N (default 1000)
times: RFC 3339 (2026-03-01T08:00:00Z) or a UTC date (2026-03-01); --to is exclusive.
The audit reads only the review_* views and opens read-only transactions.`

// auditQuestions are the questions runAudit answers.
var auditQuestions = []string{"show", "list", "refusals", "discrepancies", "changes", "daily", "deadletters"}

// runAudit answers one reviewer question. Queries live in
// consumer/postgres (Reviewer); this file parses flags and formats.
func runAudit(ctx context.Context, args []string, e env) error {
	if len(args) == 0 || args[0] == "-h" || args[0] == "--help" || args[0] == "help" {
		fmt.Fprintln(e.stderr, auditUsage)
		if len(args) == 0 {
			return errUsage
		}
		return nil
	}
	question, args := args[0], args[1:]
	fs := flag.NewFlagSet("audit "+question, flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	fs.Usage = func() { fmt.Fprintln(e.stderr, auditUsage) }
	dbURL := fs.String("database-url", e.getenv("DATABASE_URL"), "PostgreSQL URL (reviewer role)")
	format := fs.String("format", "table", "table, json or csv")
	var f postgres.Filter
	var from, to string
	fs.StringVar(&f.Patient, "patient", "", "patient reference, e.g. Patient/lg-icu-0001")
	fs.StringVar(&from, "from", "", "start time (inclusive)")
	fs.StringVar(&to, "to", "", "end time (exclusive)")
	fs.StringVar(&f.Kind, "kind", "", "derivation kind code")
	fs.StringVar(&f.Algorithm, "algorithm", "", "algorithm version")
	fs.IntVar(&f.Limit, "limit", 1000, "maximum rows")
	threshold := fs.Float64("threshold", 5, "discrepancies: minimum |measured - predicted| in mmHg")
	// Flags may follow the positional argument of show.
	var positional []string
	for {
		if err := fs.Parse(args); err != nil {
			if errors.Is(err, flag.ErrHelp) {
				return nil
			}
			return errUsage
		}
		if fs.NArg() == 0 {
			break
		}
		positional = append(positional, fs.Arg(0))
		args = fs.Args()[1:]
	}
	usageErr := func(msg string) error {
		fmt.Fprintf(e.stderr, "ventderive audit: %s\n", msg)
		return errUsage
	}
	if !slices.Contains(auditQuestions, question) {
		return usageErr(fmt.Sprintf("unknown question %q", question))
	}
	var err error
	if f.From, err = parseAuditTime(from); err != nil {
		return usageErr("--from: " + err.Error())
	}
	if f.To, err = parseAuditTime(to); err != nil {
		return usageErr("--to: " + err.Error())
	}
	switch *format {
	case "table", "json", "csv":
	default:
		return usageErr("--format must be table, json or csv")
	}
	if *dbURL == "" {
		return usageErr("no database: set --database-url or DATABASE_URL")
	}
	wantArgs := 0
	if question == "show" {
		wantArgs = 1
	}
	if len(positional) != wantArgs {
		return usageErr(fmt.Sprintf("%s takes %d argument(s)", question, wantArgs))
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
	case "list":
		vs, err := r.List(ctx, f)
		if err != nil {
			return fmt.Errorf("audit list: %w", err)
		}
		return writeRows(out, vs, []string{"RECORDED", "PATIENT", "BLOOD GAS", "EFFECTIVE", "KIND", "VERSION", "STATUS", "VALUE", "UNIT", "METHOD", "ALGORITHM", "CURRENT", "OBSERVATION"},
			func(v postgres.Version) []string {
				return []string{ts(v.Recorded), v.Patient, v.BloodGas, ts(v.Effective), v.Kind, strconv.Itoa(v.Version), v.Status,
					num(v.Value), v.Unit, v.Method + " v" + v.MethodVersion, v.Algorithm, yes(v.Current), v.ObservationID}
			})
	case "refusals":
		cs, err := r.Refusals(ctx, f)
		if err != nil {
			return fmt.Errorf("audit refusals: %w", err)
		}
		return writeRows(out, cs, []string{"REASON", "KIND", "COUNT", "CURRENT", "PATIENTS", "FIRST BLOOD GAS", "LAST BLOOD GAS"},
			func(c postgres.ReasonCount) []string {
				return []string{c.Reason, c.Kind, strconv.Itoa(c.Count), strconv.Itoa(c.Current), strconv.Itoa(c.Patients), ts(c.First), ts(c.Last)}
			})
	case "discrepancies":
		ds, err := r.Discrepancies(ctx, *threshold, f)
		if err != nil {
			return fmt.Errorf("audit discrepancies: %w", err)
		}
		return writeRows(out, ds, []string{"PATIENT", "BLOOD GAS", "EFFECTIVE", "MEASURED-PREDICTED mmHg", "MEASURED", "PREDICTED", "STATUS", "VERSION", "INTERPRETATION"},
			func(d postgres.Discrepancy) []string {
				return []string{d.Patient, d.BloodGas, ts(d.Effective), num(d.DifferenceMmHg), optNum(d.MeasuredMmHg), optNum(d.PredictedMmHg),
					d.Status, strconv.Itoa(d.Version), d.Interpretation}
			})
	case "changes":
		cs, err := r.Changes(ctx, f)
		if err != nil {
			return fmt.Errorf("audit changes: %w", err)
		}
		return writeRows(out, cs, []string{"RECORDED", "PATIENT", "BLOOD GAS", "KIND", "VERSIONS", "FROM", "TO", "UNIT", "STATUS", "RETRACTED"},
			func(c postgres.Change) []string {
				return []string{ts(c.Recorded), c.Patient, c.BloodGas, c.Kind, fmt.Sprintf("%d->%d", c.FromVersion, c.ToVersion),
					num(c.FromValue), num(c.ToValue), c.Unit, c.FromStatus + "->" + c.ToStatus, c.Retracted}
			})
	case "daily":
		ds, err := r.Daily(ctx, f)
		if err != nil {
			return fmt.Errorf("audit daily: %w", err)
		}
		return writeRows(out, ds, []string{"DAY (UTC)", "DERIVATIONS", "RETRACTIONS", "REFUSALS", "DEAD LETTERS"},
			func(d postgres.DayCount) []string {
				return []string{d.Day, strconv.Itoa(d.Derivations), strconv.Itoa(d.Retractions), strconv.Itoa(d.Refusals), strconv.Itoa(d.DeadLetters)}
			})
	case "deadletters":
		ds, err := r.DeadLetters(ctx, f)
		if err != nil {
			return fmt.Errorf("audit deadletters: %w", err)
		}
		return writeRows(out, ds, []string{"RECORDED", "SUBJECT", "STREAM SEQ", "BYTES", "REASON", "DETAIL", "INBOX KEY"},
			func(d postgres.DeadLetterRecord) []string {
				return []string{ts(d.Recorded), d.Subject, strconv.FormatInt(d.StreamSeq, 10), strconv.Itoa(d.SizeBytes), d.Reason, d.Detail, d.InboxKey}
			})
	}
	return usageErr(fmt.Sprintf("unknown question %q", question))
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
}

func (o auditOutput) json(v any) error {
	enc := json.NewEncoder(o.w)
	enc.SetIndent("", "  ")
	return enc.Encode(v)
}

// writeRows writes a list as a table, CSV or a JSON array.
func writeRows[T any](o auditOutput, items []T, header []string, cells func(T) []string) error {
	switch o.format {
	case "json":
		if items == nil {
			items = []T{}
		}
		return o.json(items)
	case "csv":
		w := csv.NewWriter(o.w)
		w.Write(header)
		for _, it := range items {
			w.Write(cells(it))
		}
		w.Flush()
		return w.Error()
	}
	tw := tabwriter.NewWriter(o.w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, strings.Join(header, "\t"))
	for _, it := range items {
		fmt.Fprintln(tw, strings.Join(clean(cells(it)), "\t"))
	}
	if len(items) == 0 {
		fmt.Fprintln(tw, "(none)")
	}
	return tw.Flush()
}

// clean keeps tabs and newlines of stored text from breaking a table.
func clean(cells []string) []string {
	for i, c := range cells {
		cells[i] = strings.NewReplacer("\t", " ", "\n", " ").Replace(c)
	}
	return cells
}

// show writes one derived value's history.
func (o auditOutput) show(h postgres.History) error {
	switch o.format {
	case "json":
		return o.json(h)
	case "csv":
		w := csv.NewWriter(o.w)
		w.Write([]string{"record", "version_or_refusal", "status_or_reason", "value", "unit", "recorded", "input", "role", "fact_key", "fact_digest", "resource", "quantity", "input_value", "input_unit", "input_status", "input_effective", "offset", "fallback"})
		for _, v := range h.Versions {
			base := []string{"version", strconv.Itoa(v.Version), v.Status, num(v.Value), v.Unit, ts(v.Recorded)}
			if len(v.Inputs) == 0 {
				w.Write(append(base, make([]string, 12)...))
			}
			for _, in := range v.Inputs {
				w.Write(append(append([]string{}, base...), inputCells(in)...))
			}
		}
		for _, r := range h.Refusals {
			base := []string{"refusal", strconv.FormatInt(r.ID, 10), r.Reason, "", "", ts(r.Recorded)}
			if len(r.Considered) == 0 {
				w.Write(append(base, make([]string, 12)...))
			}
			for _, in := range r.Considered {
				w.Write(append(append([]string{}, base...), inputCells(in)...))
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
		fmt.Fprintf(&b, "\n  recorded        %s\n", ts(v.Recorded))
		fmt.Fprintf(&b, "  observation     %s\n", v.ObservationID)
		fmt.Fprintf(&b, "  patient         %s %s\n", v.Patient, v.Encounter)
		fmt.Fprintf(&b, "  blood gas       %s at %s\n", v.BloodGas, ts(v.Effective))
		fmt.Fprintf(&b, "  value           %s %s\n", num(v.Value), physio.DisplayUnit(v.Unit))
		fmt.Fprintf(&b, "  method          %s (method version %s; algorithm %s)\n", v.Method, v.MethodVersion, v.Algorithm)
		fmt.Fprintf(&b, "  basis           %s\n", v.Basis)
		for _, c := range v.Constants {
			fmt.Fprintf(&b, "  constant        %s = %s %s (%s)\n", c.Name, num(c.Value), physio.DisplayUnit(c.Unit), c.Source)
		}
		for _, a := range v.Assumptions {
			fmt.Fprintf(&b, "  assumption      %s\n", a)
		}
		if v.Interpretation.Code != "" || v.Interpretation.Text != "" {
			fmt.Fprintf(&b, "  interpretation  %s %s (%s)\n", v.Interpretation.Code, v.Interpretation.Text, v.Interpretation.Source)
		}
		for _, f := range v.Flags {
			fmt.Fprintf(&b, "  flag            %s\n", f)
		}
		if v.Retracted != "" {
			fmt.Fprintf(&b, "  retracted       %s\n", v.Retracted)
		}
		fmt.Fprintf(&b, "  digest          %s\n", v.Digest)
		writeInputs(&b, "inputs", v.Inputs)
	}
	for _, r := range h.Refusals {
		fmt.Fprintf(&b, "\nrefusal %d  %s", r.ID, r.Reason)
		if r.Current {
			b.WriteString("  (current)")
		}
		fmt.Fprintf(&b, "\n  recorded        %s\n", ts(r.Recorded))
		fmt.Fprintf(&b, "  blood gas       %s at %s\n", r.BloodGas, ts(r.Effective))
		fmt.Fprintf(&b, "  detail          %s\n", r.Detail)
		writeInputs(&b, "considered", r.Considered)
	}
	_, err := io.WriteString(o.w, b.String())
	return err
}

func inputCells(in postgres.Input) []string {
	return []string{strconv.Itoa(in.Ordinal), in.Role, in.FactKey, in.FactDigest, in.Resource, in.Quantity,
		num(in.Value), in.Unit, in.Status, ts(in.Effective), in.Offset.String(), in.Fallback}
}

func writeInputs(b *strings.Builder, title string, ins []postgres.Input) {
	if len(ins) == 0 {
		return
	}
	fmt.Fprintf(b, "  %s:\n", title)
	tw := tabwriter.NewWriter(b, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "    ROLE\tFACT\tVALUE\tUNIT\tSTATUS\tEFFECTIVE\tOFFSET\tFALLBACK")
	for _, in := range ins {
		fmt.Fprintf(tw, "    %s\n", strings.Join(clean([]string{in.Role, in.FactKey, num(in.Value), physio.DisplayUnit(in.Unit), in.Status,
			ts(in.Effective), in.Offset.String(), in.Fallback}), "\t"))
	}
	tw.Flush()
}
