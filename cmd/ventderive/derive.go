package main

import (
	"bytes"
	"cmp"
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"slices"
	"strings"
	"time"

	"github.com/ventderive/ventderive/fhirmap"
	"github.com/ventderive/ventderive/physio"
)

func init() {
	register(command{
		name:    "derive",
		summary: "derive from FHIR JSON/NDJSON files offline; print a FHIR Bundle (or a table with --explain)",
		run:     runDerive,
	})
}

// deriveConfig is the resolved configuration of derive.
type deriveConfig struct {
	explain  bool
	aliases  string
	recorded time.Time
	site     fhirmap.Site
	files    []string
}

// parseDerive reads the flags of derive. Every setting is a flag: the
// offline command reads no environment variable.
func parseDerive(args []string, stderr io.Writer, now time.Time) (deriveConfig, error) {
	c := deriveConfig{site: fhirmap.DefaultSite()}
	fs := flag.NewFlagSet("derive", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: ventderive derive [flags] FILE... ('-' reads standard input)")
		fmt.Fprintln(stderr, "Reads FHIR R4 JSON (a resource or a Bundle) or NDJSON, pairs every blood gas with the")
		fmt.Fprintln(stderr, "ventilator and patient data around it and writes one FHIR collection Bundle: the derived")
		fmt.Fprintln(stderr, "Observations (advisory, not orders), their Provenance, and an OperationOutcome listing")
		fmt.Fprintln(stderr, "every refusal with its reason.")
		fs.PrintDefaults()
	}
	var apparatus float64
	var recorded string
	fs.BoolVar(&c.explain, "explain", false, "print a readable table (values with their basis, refusals with reasons) instead of the Bundle")
	fs.StringVar(&c.aliases, "aliases", "", "site code alias file (see the README) added to the standard code table")
	fs.Float64Var(&apparatus, "apparatus-dead-space-ml", 0, "the site's apparatus dead space beyond the Y-piece in mL (HME, closed suction); a value recorded for the patient's circuit (aliased Observation) is preferred; unset and none recorded: predicted PaCO2 is refused, never computed with zero")
	fs.DurationVar(&c.site.Window.Before, "window-before", c.site.Window.Before, "pairing window before the blood gas")
	fs.DurationVar(&c.site.Window.After, "window-after", c.site.Window.After, "pairing window after the blood gas")
	fs.DurationVar(&c.site.TemperatureWindow.Before, "temperature-window-before", c.site.TemperatureWindow.Before, "pair a body temperature up to this long before the blood gas")
	fs.DurationVar(&c.site.TemperatureWindow.After, "temperature-window-after", c.site.TemperatureWindow.After, "pair a body temperature up to this long after the blood gas")
	anatomic := fs.String("anatomic-dead-space", c.site.AnatomicDeadSpace.String(), "anatomic dead space model of predicted PaCO2: artificial-airway (tracheal tube or tracheostomy, 0.948 mL/kg PBW) or whole-airway (2.2 mL/kg PBW); a patient's airway recorded by an aliased Observation is preferred")
	fs.Float64Var(&c.site.TargetPaCO2mmHg, "target-paco2", 0, "the site's target PaCO2 in mmHg for the ventilation-for-target advice; a patient's PaCO2 Goal in force overrides it; 0 or unset: not configured, and without a Goal the for-target values are refused (40 is the usual suggestion)")
	fs.StringVar(&c.site.CodeSystemURL, "codesystem-url", c.site.CodeSystemURL, "canonical URL of the service CodeSystem")
	fs.StringVar(&recorded, "recorded", "", "RFC 3339 time written as Provenance.recorded and Bundle.timestamp (default: now)")
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return c, flag.ErrHelp
		}
		return c, errUsage
	}
	fs.Visit(func(f *flag.Flag) {
		if f.Name == "apparatus-dead-space-ml" {
			c.site.ApparatusDeadSpaceML, c.site.ApparatusDeadSpaceConfigured = apparatus, true
		}
	})
	m, err := anatomicModel(*anatomic)
	if err != nil {
		fmt.Fprintf(stderr, "ventderive derive: --%v\n", err)
		return c, errUsage
	}
	c.site.AnatomicDeadSpace = m
	c.recorded = now
	if recorded != "" {
		t, err := time.Parse(time.RFC3339Nano, recorded)
		if err != nil {
			fmt.Fprintf(stderr, "ventderive derive: --recorded %q: not an RFC 3339 time\n", recorded)
			return c, errUsage
		}
		c.recorded = t
	}
	if err := c.site.Validate(); err != nil {
		fmt.Fprintf(stderr, "ventderive derive: %v\n", err)
		return c, errUsage
	}
	c.files = fs.Args()
	if len(c.files) == 0 {
		fs.Usage()
		return c, errUsage
	}
	return c, nil
}

func runDerive(ctx context.Context, args []string, e env) error {
	c, err := parseDerive(args, e.stderr, time.Now())
	if errors.Is(err, flag.ErrHelp) {
		return nil
	}
	if err != nil {
		return err
	}
	codes, _, err := loadCodes(c.aliases)
	if err != nil {
		return err
	}
	codes = codes.WithCodeSystemURL(c.site.CodeSystemURL)
	var facts []fhirmap.Fact
	for _, name := range c.files {
		if err := ctx.Err(); err != nil {
			return err
		}
		raw, err := readInput(name, e.stdin)
		if err != nil {
			return err
		}
		d, err := fhirmap.DecodeFile(displayName(name), raw, codes)
		if err != nil {
			return err // names the file, the entry or line, and the field
		}
		facts = append(facts, d.Facts...)
	}
	ds, rs := fhirmap.DeriveAll(facts, c.site)
	if c.explain {
		return explain(e.stdout, c, ds, rs)
	}
	b, err := fhirmap.EncodeBundle(ds, nil, rs, c.recorded, c.site)
	if err != nil {
		return fmt.Errorf("encode bundle: %w", err)
	}
	var out bytes.Buffer
	if err := json.Indent(&out, b, "", "  "); err != nil {
		return fmt.Errorf("indent bundle: %w", err)
	}
	out.WriteByte('\n')
	if _, err := e.stdout.Write(out.Bytes()); err != nil {
		return fmt.Errorf("write bundle: %w", err)
	}
	return nil
}

// maxInput bounds one input file (an NDJSON file holds many messages; the
// service bounds one message at fhirmap.MaxResourceBytes).
const maxInput = 64 << 20

func readInput(name string, stdin io.Reader) ([]byte, error) {
	var r io.Reader = stdin
	if name != "-" {
		f, err := os.Open(name)
		if err != nil {
			return nil, fmt.Errorf("open input: %w", err)
		}
		defer f.Close()
		r = f
	}
	raw, err := io.ReadAll(io.LimitReader(r, maxInput+1))
	if err != nil {
		return nil, fmt.Errorf("read %s: %w", displayName(name), err)
	}
	if len(raw) > maxInput {
		return nil, fmt.Errorf("read %s: larger than %d MiB", displayName(name), maxInput>>20)
	}
	return raw, nil
}

func displayName(name string) string {
	if name == "-" {
		return "<stdin>"
	}
	return name
}

// explain prints the derivations with their basis and the refusals with
// their reasons as a readable table.
func explain(w io.Writer, c deriveConfig, ds []fhirmap.Derivation, rs []fhirmap.Refusal) error {
	var b strings.Builder
	site := c.site
	apparatus := "not configured (predicted PaCO2 refused unless recorded for the patient's circuit)"
	if site.ApparatusDeadSpaceConfigured {
		apparatus = fmt.Sprintf("%g mL (a value recorded for the patient's circuit is preferred)", site.ApparatusDeadSpaceML)
	}
	fmt.Fprintf(&b, "ventderive derive, %s. ADVISORY values: not orders; verify at the bedside.\n", fhirmap.Algorithm)
	target := "not configured (for-target advice refused unless the patient has a PaCO2 Goal in force)"
	if site.TargetPaCO2mmHg != 0 {
		target = fmt.Sprintf("%g mmHg (the site's; a patient's PaCO2 Goal in force overrides it)", site.TargetPaCO2mmHg)
	}
	fmt.Fprintf(&b, "Site: window %s before to %s after the blood gas (body temperature %s before to %s after); apparatus dead space %s; anatomic dead space %s (a patient's recorded airway is preferred); target PaCO2 %s; %s, RQ %g.\n\n",
		shortDuration(site.Window.Before), shortDuration(site.Window.After), shortDuration(site.TemperatureWindow.Before),
		shortDuration(site.TemperatureWindow.After), apparatus, site.AnatomicDeadSpace, target, site.Energy, site.RQ)
	// Read by patient, then blood-gas time, then kind.
	ds = slices.Clone(ds)
	slices.SortStableFunc(ds, func(x, y fhirmap.Derivation) int {
		return cmp.Or(cmp.Compare(x.Patient, y.Patient), x.Effective.Compare(y.Effective), cmp.Compare(x.Kind, y.Kind))
	})
	rs = slices.Clone(rs)
	slices.SortStableFunc(rs, func(x, y fhirmap.Refusal) int {
		return cmp.Or(cmp.Compare(x.Patient, y.Patient), x.Effective.Compare(y.Effective), cmp.Compare(x.BloodGas, y.BloodGas), cmp.Compare(x.Kind, y.Kind))
	})

	// INTERP is the HL7 v3 interpretation code: "-" when the kind has a
	// reading but no published threshold gives a code, "" when it has none.
	rows := [][]string{{"PATIENT", "BLOOD GAS (UTC)", "KIND", "VALUE", "UNIT", "STATUS", "INTERP"}}
	for _, d := range ds {
		code := d.Result.Interpretation.Code
		if code == "" && d.Result.Interpretation.Text != "" {
			code = "-"
		}
		rows = append(rows, []string{d.Patient, d.Effective.UTC().Format(time.RFC3339), d.Kind,
			fhirmap.FormatValue(d.Kind, d.Result.Value), tableUnit(d.Result.Unit), string(d.Status), code})
	}
	widths := columnWidths(rows)
	fmt.Fprintf(&b, "DERIVED (%d)\n", len(ds))
	for i, row := range rows {
		writeRow(&b, row, widths)
		if i == 0 {
			continue
		}
		if line := fhirmap.InterpretationLine(ds[i-1]); line != "" {
			fmt.Fprintf(&b, "    Interpretation: %s\n", line)
		}
		for _, note := range fhirmap.BasisNotes(ds[i-1])[1:] { // the advisory line is in the header
			fmt.Fprintf(&b, "    %s\n", note)
		}
	}
	rows = [][]string{{"PATIENT", "BLOOD GAS (UTC)", "KIND", "REASON", "DETAIL"}}
	for i := 0; i < len(rs); {
		r := rs[i]
		// A blood gas refused as a whole (its specimen, status or value)
		// is one row: every kind has the same reason and detail.
		j := i
		for j < len(rs) && rs[j].BloodGas == r.BloodGas && rs[j].Patient == r.Patient && rs[j].Reason == r.Reason && rs[j].Detail == r.Detail {
			j++
		}
		kind := r.Kind
		if j-i == len(fhirmap.Catalogue) {
			kind = "(every kind)"
		} else {
			j = i + 1
		}
		rows = append(rows, []string{r.Patient, r.Effective.UTC().Format(time.RFC3339), kind, r.Reason, r.Detail})
		i = j
	}
	fmt.Fprintf(&b, "\nREFUSED (%d)\n", len(rs))
	widths = columnWidths(rows)
	for _, row := range rows {
		writeRow(&b, row, widths)
	}
	_, err := io.WriteString(w, b.String())
	if err != nil {
		return fmt.Errorf("write explanation: %w", err)
	}
	return nil
}

// shortDuration renders 30m0s as 30m and 1h30m0s as 1h30m.
func shortDuration(d time.Duration) string {
	s := d.String()
	if strings.HasSuffix(s, "m0s") {
		s = strings.TrimSuffix(s, "0s")
	}
	if strings.HasSuffix(s, "h0m") {
		s = strings.TrimSuffix(s, "0m")
	}
	return s
}

func columnWidths(rows [][]string) []int {
	w := make([]int, len(rows[0]))
	for _, row := range rows {
		for i, cell := range row {
			w[i] = max(w[i], len(cell))
		}
	}
	return w
}

func writeRow(b *strings.Builder, row []string, widths []int) {
	var line strings.Builder
	for i, cell := range row {
		if i == len(row)-1 {
			line.WriteString(cell)
			break
		}
		fmt.Fprintf(&line, "%-*s  ", widths[i], cell)
	}
	b.WriteString(strings.TrimRight(line.String(), " ")) // an empty last cell leaves no trailing blanks
	b.WriteByte('\n')
}

// tableUnit is the unit column of the explain table: the display unit
// (mmHg, not mm[Hg]), and "1" for a ratio so that the column is never blank.
func tableUnit(ucum string) string {
	if u := physio.DisplayUnit(ucum); u != "" {
		return u
	}
	return "1"
}
