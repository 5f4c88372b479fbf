package deploy

import (
	"debug/elf"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
)

// The Containerfile builds a static binary onto an empty base and runs it
// as the non-root user the Kubernetes manifests require; the manifests
// name it. No container engine is needed: the test builds the binary with
// the Containerfile's own build command and checks that it is static.
func TestContainerfile(t *testing.T) {
	raw, err := os.ReadFile("container/Containerfile")
	if err != nil {
		t.Fatal(err)
	}
	cf := string(raw)
	stages := regexp.MustCompile(`(?m)^FROM\s+(\S+)`).FindAllStringSubmatch(cf, -1)
	if len(stages) < 2 || stages[len(stages)-1][1] != "scratch" {
		t.Errorf("final stage %v, want FROM scratch", stages)
	}
	user := regexp.MustCompile(`(?m)^USER\s+(\d+):(\d+)\s*$`).FindStringSubmatch(cf)
	if user == nil || user[1] == "0" {
		t.Fatalf("USER %v: want a numeric non-root uid:gid", user)
	}
	for _, m := range []string{"kubernetes/deployment.yaml", "kubernetes/migrate-job.yaml"} {
		b, err := os.ReadFile(m)
		if err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(string(b), "deploy/container/Containerfile") {
			t.Errorf("%s does not name the Containerfile it runs", m)
		}
		if strings.Contains(m, "deployment") && !strings.Contains(string(b), "runAsUser: "+user[1]) {
			t.Errorf("%s: runAsUser is not the image's user %s", m, user[1])
		}
	}

	// The build command of the Containerfile, run here.
	run := regexp.MustCompile(`(?s)RUN (CGO_ENABLED=0 go build .*?) \\\n\s+-ldflags "([^"]*)" \\\n\s+-o \S+ (\S+)`).FindStringSubmatch(cf)
	if run == nil {
		t.Fatal("no CGO_ENABLED=0 go build line in the Containerfile")
	}
	if testing.Short() {
		t.Skip("building the binary takes a while")
	}
	out := filepath.Join(t.TempDir(), "ventderive")
	args := append(strings.Fields(strings.TrimPrefix(run[1], "CGO_ENABLED=0 go ")),
		"-ldflags", strings.NewReplacer("${VERSION}", "0.0.0-test", "${COMMIT}", "test").Replace(run[2]), "-o", out, run[3])
	cmd := exec.Command("go", args...)
	cmd.Dir = ".."
	cmd.Env = append(os.Environ(), "CGO_ENABLED=0")
	if b, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("go %v: %v\n%s", args, err, b)
	}
	f, err := elf.Open(out)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	for _, p := range f.Progs {
		if p.Type == elf.PT_INTERP {
			t.Error("the binary needs a dynamic loader: not static")
		}
	}
	if libs, _ := f.ImportedLibraries(); len(libs) > 0 {
		t.Errorf("the binary links %v: not static", libs)
	}
	v, err := exec.Command(out, "--version").Output()
	if err != nil || !strings.Contains(string(v), "0.0.0-test") || !strings.Contains(string(v), "commit    test") {
		t.Errorf("--version of the built binary: %q, %v", v, err)
	}
}
