package main

import (
	"bytes"
	"context"
	"errors"
	"strings"
	"testing"
)

// TestRetainUsage: a horizon shorter than 24 h (which could remove the
// readings around a blood gas reported late) and a malformed --as-of are
// refused before any database is opened; so is a missing database.
func TestRetainUsage(t *testing.T) {
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"retain", "--database-url", "postgres://127.0.0.1:1/x", "--horizon", "1h"}, "shorter than 24h0m0s"},
		{[]string{"retain", "--database-url", "postgres://127.0.0.1:1/x", "--as-of", "yesterday"}, "--as-of"},
		{[]string{"retain"}, "usage: ventderive retain"},
	} {
		var stdout, stderr bytes.Buffer
		e := env{getenv: func(string) string { return "" }, stdout: &stdout, stderr: &stderr}
		err := run(context.Background(), c.args, e)
		if !errors.Is(err, errUsage) || !strings.Contains(stderr.String(), c.want) {
			t.Errorf("%v: err %v, stderr %q; want a usage error naming %q", c.args, err, stderr.String(), c.want)
		}
	}
}
