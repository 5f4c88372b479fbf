package main

import (
	"context"
	"os/exec"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/ventderive/ventderive/consumer/postgres/pgtest"
)

// demo --keep without DATABASE_URL: the printed start command brings the
// kept cluster back, and the printed DATABASE_URL then reaches the demo's
// data (what the printed audit commands need).
func TestDemoKeepPrintsWorkingStartCommand(t *testing.T) {
	if _, err := pgtest.ServerBin(); err != nil {
		pgtest.NoServer(t, err)
	}
	dir := t.TempDir()
	var out lockedBuilder
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	e := env{getenv: func(string) string { return "" }, stdin: strings.NewReader(""), stdout: &out, stderr: &out}
	if err := run(ctx, []string{"demo", "--keep", "--speed", "0", "--duration", "6h", "--dir", dir}, e); err != nil {
		t.Fatalf("demo: %v\n%s", err, out.String())
	}
	text := out.String()
	start := regexp.MustCompile(`(?m)^Start it again with:\n  (.+)$`).FindStringSubmatch(text)
	stop := regexp.MustCompile(`\(stop it with: (.+); remove`).FindStringSubmatch(text)
	dbURL := regexp.MustCompile(`export DATABASE_URL='([^']+)'`).FindStringSubmatch(text)
	if start == nil || stop == nil || dbURL == nil {
		t.Fatalf("demo output lacks the start, stop or DATABASE_URL line:\n%s", text)
	}
	if b, err := exec.Command("sh", "-c", start[1]).CombinedOutput(); err != nil {
		t.Fatalf("%s: %v\n%s", start[1], err, b)
	}
	t.Cleanup(func() { _ = exec.Command("sh", "-c", stop[1]).Run() })
	conn, err := pgx.Connect(ctx, dbURL[1])
	if err != nil {
		t.Fatalf("connect to the kept database: %v", err)
	}
	defer conn.Close(ctx)
	var n int
	if err := conn.QueryRow(ctx, `SELECT count(*) FROM inbox`).Scan(&n); err != nil || n == 0 {
		t.Fatalf("kept database: %d inputs, %v; want the demo's", n, err)
	}
}
