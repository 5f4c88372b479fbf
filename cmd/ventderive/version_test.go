package main

import (
	"bytes"
	"context"
	"runtime"
	"strings"
	"testing"

	"github.com/ventderive/ventderive/fhirmap"
)

// --version works on its own and on every command, without touching
// anything a command needs (no database, no NATS).
func TestVersionOnEveryCommand(t *testing.T) {
	lines := [][]string{{"--version"}, {"version"}, {"-version"}}
	for _, c := range commands {
		lines = append(lines, []string{c.name, "--version"})
	}
	lines = append(lines, []string{"serve", "--log-level", "debug", "--version"})
	for _, args := range lines {
		t.Run(strings.Join(args, " "), func(t *testing.T) {
			var out, errOut bytes.Buffer
			e := env{getenv: func(string) string { return "" }, stdin: strings.NewReader(""), stdout: &out, stderr: &errOut}
			if err := run(context.Background(), args, e); err != nil {
				t.Fatalf("run: %v (stderr %s)", err, errOut.String())
			}
			for _, want := range []string{"ventderive ", "commit ", fhirmap.Algorithm, runtime.Version()} {
				if !strings.Contains(out.String(), want) {
					t.Errorf("output %q lacks %q", out.String(), want)
				}
			}
		})
	}
	if wantsVersion([]string{"derive", "--", "--version"}) {
		t.Error("--version after -- is an argument, not the flag")
	}
}
