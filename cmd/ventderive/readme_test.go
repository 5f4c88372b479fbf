package main

import (
	"flag"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/ventderive/ventderive/consumer"
	"github.com/ventderive/ventderive/fhirmap"
)

// The README is the contract integration teams read: every derived-value
// code, refusal reason, input code and serve setting must be in it.
func TestREADMEDocumentsContract(t *testing.T) {
	b, err := os.ReadFile("../../README.md")
	if err != nil {
		t.Fatal(err)
	}
	readme := string(b)
	for _, k := range fhirmap.Catalogue {
		if !strings.Contains(readme, "`"+k.Code+"`") {
			t.Errorf("README lacks derived-value code %s", k.Code)
		}
	}
	for _, r := range fhirmap.Reasons {
		if !strings.Contains(readme, "`"+r.Code+"`") {
			t.Errorf("README lacks refusal reason %s", r.Code)
		}
	}
	for _, e := range fhirmap.DefaultCodes().Entries() {
		if !strings.Contains(readme, "`"+e.Code+"`") {
			t.Errorf("README lacks input code %s|%s", e.System, e.Code)
		}
	}
	fs := flag.NewFlagSet("serve", flag.ContinueOnError)
	var c serveConfig
	s, err := bindServe(fs, func(string) string { return "" }, &c)
	if err != nil {
		t.Fatal(err)
	}
	fs.VisitAll(func(f *flag.Flag) {
		if !strings.Contains(readme, "`--"+f.Name+"`") && !strings.Contains(readme, "--"+f.Name+"`") {
			t.Errorf("README configuration lacks --%s", f.Name)
		}
	})
	for _, name := range s.order {
		env := s.env(name)
		short := env[strings.LastIndex(env, "_"):]
		if !strings.Contains(readme, env) && !strings.Contains(readme, "`"+short+"`") {
			t.Errorf("README configuration lacks %s", env)
		}
	}
}

// TestREADMEDeriveExampleIsCurrent: the README's `ventderive derive
// --explain` example is an excerpt of a real run of the documented command
// (the golden file of TestDeriveCommandGolden/explain): every line of it,
// except the command and the "..." elisions, is a line of that output.
func TestREADMEDeriveExampleIsCurrent(t *testing.T) {
	b, err := os.ReadFile("../../README.md")
	if err != nil {
		t.Fatal(err)
	}
	const cmd = "$ ventderive derive --explain --apparatus-dead-space-ml 50 --target-paco2 40 --recorded 2026-11-20T15:00:00Z \\\n    icu-morning.json ward-feed.ndjson\n"
	_, rest, ok := strings.Cut(string(b), cmd)
	if !ok {
		t.Fatal("README lacks the derive example command")
	}
	excerpt, _, ok := strings.Cut(rest, "\n```")
	if !ok {
		t.Fatal("derive example not closed")
	}
	golden, err := os.ReadFile(filepath.Join(deriveDir, "example.explain.golden.txt"))
	if err != nil {
		t.Fatal(err)
	}
	lines := map[string]bool{}
	for _, l := range strings.Split(string(golden), "\n") {
		lines[l] = true
	}
	n := 0
	for _, l := range strings.Split(excerpt, "\n") {
		if l == "..." {
			continue
		}
		n++
		if !lines[l] {
			t.Errorf("README example line not in the output of the command:\n%s", l)
		}
	}
	if n < 5 {
		t.Errorf("README example has %d lines of output", n)
	}
}

// captureRegisterer keeps the collectors registered with it.
type captureRegisterer struct{ cs []prometheus.Collector }

func (c *captureRegisterer) Register(x prometheus.Collector) error {
	c.cs = append(c.cs, x)
	return nil
}
func (c *captureRegisterer) MustRegister(xs ...prometheus.Collector) { c.cs = append(c.cs, xs...) }
func (c *captureRegisterer) Unregister(prometheus.Collector) bool    { return false }

// Every metric the service registers is in the README's metrics table
// ("Health and metrics"), as a row `| `name` |`.
func TestREADMEDocumentsMetrics(t *testing.T) {
	b, err := os.ReadFile("../../README.md")
	if err != nil {
		t.Fatal(err)
	}
	var reg captureRegisterer
	consumer.NewMetrics(&reg)
	fq := regexp.MustCompile(`fqName: "([^"]+)"`)
	n := 0
	for _, c := range reg.cs {
		ch := make(chan *prometheus.Desc, 4)
		go func() { c.Describe(ch); close(ch) }()
		for d := range ch {
			m := fq.FindStringSubmatch(d.String())
			if m == nil {
				t.Fatalf("no name in %s", d)
			}
			n++
			if !strings.Contains(string(b), "| `"+m[1]+"` |") {
				t.Errorf("README's metrics table lacks %s", m[1])
			}
		}
	}
	if n < 20 {
		t.Fatalf("only %d metrics described", n)
	}
}
