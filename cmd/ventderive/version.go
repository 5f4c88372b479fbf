package main

import (
	"fmt"
	"io"
	"runtime"
	"runtime/debug"

	"github.com/ventderive/ventderive/fhirmap"
)

// version is the release, set at build time:
//
//	go build -ldflags "-X main.version=1.4.0" ./cmd/ventderive
//
// Without it the module version from the build information is used
// ("(devel)" for a build from a work tree).
var version = ""

// commit is the VCS revision, set at build time (-X main.commit=...) where
// the build has no VCS data (a container build context without .git).
var commit = ""

// buildInfo is what --version prints and the start log carries.
type buildInfo struct {
	Version   string // release or module version
	Commit    string // VCS revision, with "+dirty" for uncommitted changes; "unknown" without VCS data
	Algorithm string // fhirmap.Algorithm: stored with every derivation
	Go        string // Go toolchain version
}

func readBuildInfo() buildInfo {
	b := buildInfo{Version: version, Commit: "unknown", Algorithm: fhirmap.Algorithm, Go: runtime.Version()}
	info, ok := debug.ReadBuildInfo()
	if !ok {
		if b.Version == "" {
			b.Version = "unknown"
		}
		if commit != "" {
			b.Commit = commit
		}
		return b
	}
	if b.Version == "" {
		b.Version = info.Main.Version
	}
	dirty := false
	for _, s := range info.Settings {
		switch s.Key {
		case "vcs.revision":
			b.Commit = s.Value
		case "vcs.modified":
			dirty = s.Value == "true"
		}
	}
	if dirty && b.Commit != "unknown" {
		b.Commit += "+dirty"
	}
	if commit != "" {
		b.Commit = commit
	}
	return b
}

// attrs are the build's fields for a log line.
func (b buildInfo) attrs() []any {
	return []any{"version", b.Version, "commit", b.Commit, "algorithm", b.Algorithm, "go", b.Go}
}

func (b buildInfo) print(w io.Writer) {
	fmt.Fprintf(w, "ventderive %s\ncommit    %s\nalgorithm %s\ngo        %s\n", b.Version, b.Commit, b.Algorithm, b.Go)
}

// wantsVersion reports whether the command line asks for the version:
// --version (or -version) as the command, or among a command's flags
// (before a "--" that ends them).
func wantsVersion(args []string) bool {
	for _, a := range args {
		switch a {
		case "--":
			return false
		case "--version", "-version":
			return true
		}
	}
	return false
}
