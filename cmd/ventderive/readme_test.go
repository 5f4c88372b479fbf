package main

import (
	"flag"
	"os"
	"strings"
	"testing"

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
