package consumer

import "testing"

func TestCheckServerVersion(t *testing.T) {
	for _, tc := range []struct {
		v  string
		ok bool
	}{
		{"2.9.10", false}, // Debian bookworm's package
		{"2.9.99", false},
		{"1.99.0", false},
		{"2.10.0", true},
		{"2.10.0-beta.3", true},
		{"2.15.2", true},
		{"3.0.0", true},
		{"", false},
		{"2.10", false},
		{"two.ten.zero", false},
	} {
		t.Run(tc.v, func(t *testing.T) {
			if err := CheckServerVersion(tc.v); (err == nil) != tc.ok {
				t.Errorf("CheckServerVersion(%q) = %v, want ok=%v", tc.v, err, tc.ok)
			}
		})
	}
}
