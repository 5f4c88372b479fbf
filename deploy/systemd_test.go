package deploy

import (
	"bufio"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

// unit is a systemd unit file read as INI: section -> key -> values in order
// (systemd keys may repeat). Comments (# or ;) and blank lines are skipped;
// continuation lines are not used in these files and are refused.
type unit map[string]map[string][]string

func readUnit(t *testing.T, path string) unit {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatalf("open: %v", err)
	}
	defer f.Close()
	u := unit{}
	section := ""
	sc := bufio.NewScanner(f)
	for n := 1; sc.Scan(); n++ {
		line := strings.TrimSpace(sc.Text())
		switch {
		case line == "" || line[0] == '#' || line[0] == ';':
		case strings.HasSuffix(line, "\\"):
			t.Fatalf("%s:%d: continuation lines are not supported by this check", path, n)
		case line[0] == '[' && line[len(line)-1] == ']':
			section = line[1 : len(line)-1]
			if u[section] == nil {
				u[section] = map[string][]string{}
			}
		default:
			k, v, ok := strings.Cut(line, "=")
			if !ok || section == "" {
				t.Fatalf("%s:%d: not key=value inside a section: %q", path, n, line)
			}
			u[section][strings.TrimSpace(k)] = append(u[section][strings.TrimSpace(k)], strings.TrimSpace(v))
		}
	}
	if err := sc.Err(); err != nil {
		t.Fatalf("read: %v", err)
	}
	return u
}

// one returns the only value of key in section.
func (u unit) one(t *testing.T, section, key string) string {
	t.Helper()
	v := u[section][key]
	if len(v) != 1 {
		t.Fatalf("[%s] %s: %d values, want 1", section, key, len(v))
	}
	return v[0]
}

// envFileNames reads KEY=value lines of an environment file, commented-out
// "#KEY=" examples included.
func envFileNames(t *testing.T, path string) (set, commented []string) {
	t.Helper()
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("read: %v", err)
	}
	for _, line := range strings.Split(string(raw), "\n") {
		line = strings.TrimSpace(line)
		target := &set
		if strings.HasPrefix(line, "#") {
			line, target = strings.TrimPrefix(line, "#"), &commented
		}
		k, _, ok := strings.Cut(line, "=")
		if ok && k != "" && !strings.ContainsAny(k, " \t") && strings.ToUpper(k) == k {
			*target = append(*target, k)
		}
	}
	return set, commented
}

func TestSystemdUnits(t *testing.T) {
	tests := []struct {
		file, args, envFile string
		restart             bool
	}{
		{"ventderive.service", "serve", "/etc/ventderive/ventderive.env", true},
		{"ventderive-migrate.service", "migrate", "/etc/ventderive/migrate.env", false},
	}
	for _, tt := range tests {
		t.Run(tt.file, func(t *testing.T) {
			u := readUnit(t, filepath.Join("systemd", tt.file))
			exec := strings.Fields(u.one(t, "Service", "ExecStart"))
			if len(exec) < 2 || filepath.Base(exec[0]) != "ventderive" || strings.Join(exec[1:], " ") != tt.args {
				t.Errorf("ExecStart %q, want ventderive %s", exec, tt.args)
			}
			if got := u.one(t, "Service", "EnvironmentFile"); got != tt.envFile {
				t.Errorf("EnvironmentFile %q", got)
			}
			for _, kv := range u["Service"]["Environment"] {
				name, _, _ := strings.Cut(kv, "=")
				if !slices.Contains(KnownEnv, name) {
					t.Errorf("Environment %s is not a setting of serve", name)
				}
				if slices.Contains(SecretEnv, name) {
					t.Errorf("secret %s set in the unit, not in the environment file", name)
				}
			}
			// Hardening the task asks for; DynamicUser or a dedicated User.
			for k, v := range map[string]string{"NoNewPrivileges": "yes", "ProtectSystem": "strict", "ProtectHome": "yes", "PrivateTmp": "yes"} {
				if got := u.one(t, "Service", k); got != v {
					t.Errorf("%s=%s, want %s", k, got, v)
				}
			}
			if u["Service"]["DynamicUser"] == nil && u["Service"]["User"] == nil {
				t.Error("neither DynamicUser nor User")
			}
			if tt.restart && u.one(t, "Service", "Restart") != "on-failure" {
				t.Error("Restart is not on-failure")
			}
			if u.one(t, "Install", "WantedBy") != "multi-user.target" {
				t.Error("not wanted by multi-user.target")
			}
		})
	}
	t.Run("serve_runs_after_migrate", func(t *testing.T) {
		u := readUnit(t, filepath.Join("systemd", "ventderive.service"))
		if !slices.Contains(u["Unit"]["After"], "ventderive-migrate.service") {
			t.Error("serve does not start after the migration unit")
		}
	})
	t.Run("environment_files_use_known_names", func(t *testing.T) {
		for _, f := range []string{"ventderive.env.example", "migrate.env.example"} {
			set, commented := envFileNames(t, filepath.Join("systemd", f))
			if len(set) == 0 {
				t.Errorf("%s: no settings", f)
			}
			for _, name := range append(set, commented...) {
				if !slices.Contains(KnownEnv, name) {
					t.Errorf("%s: %s is not a setting of serve", f, name)
				}
			}
		}
		set, _ := envFileNames(t, filepath.Join("systemd", "ventderive.env.example"))
		for _, need := range SecretEnv {
			if !slices.Contains(set, need) {
				t.Errorf("ventderive.env.example does not set %s", need)
			}
		}
	})
}
