package main

import (
	"bufio"
	"encoding/json"
	"fmt"
	"io"
	"net"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
)

// An asynchronous error of the NATS client (here a permissions violation
// on a subscription the server denies) reaches the service's JSON log and
// never stderr as a plain line: the client's default handler would write
// "nats: permissions violation ... on connection [n]" to os.Stderr.
// Not parallel: it replaces os.Stderr while it runs.
func TestServeNATSAsyncErrorsAreLogged(t *testing.T) {
	srv, err := server.NewServer(&server.Options{Host: "127.0.0.1", Port: -1, NoLog: true, NoSigs: true,
		Users: []*server.User{{Username: "svc", Password: "pw", Permissions: &server.Permissions{
			Subscribe: &server.SubjectPermission{Allow: []string{"ventderive.>", "_INBOX.>"}},
		}}}})
	if err != nil {
		t.Fatal(err)
	}
	srv.Start()
	t.Cleanup(srv.Shutdown)
	if !srv.ReadyForConnections(10 * time.Second) {
		t.Fatal("nats-server not ready")
	}

	// Whatever the client writes to the process's stderr is caught here.
	r, w, err := os.Pipe()
	if err != nil {
		t.Fatal(err)
	}
	realStderr := os.Stderr
	os.Stderr = w
	raw := make(chan string, 1)
	go func() { b, _ := io.ReadAll(r); raw <- string(b) }()
	var caught string
	restored := false
	restore := func() string {
		if !restored {
			restored = true
			os.Stderr = realStderr
			w.Close()
			caught = <-raw
		}
		return caught
	}
	defer restore()

	var logOut lockedBuilder
	log, err := newLogger(env{stderr: &logOut}, "info")
	if err != nil {
		t.Fatal(err)
	}
	c := serveConfig{natsURL: fmt.Sprintf("nats://svc:pw@127.0.0.1:%d", srv.Addr().(*net.TCPAddr).Port)}
	nc, err := connectNATS(t.Context(), c, log)
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	if _, err := nc.SubscribeSync("fhir.denied.subject"); err != nil {
		t.Fatal(err)
	}
	deadline := time.Now().Add(10 * time.Second)
	for !strings.Contains(logOut.String(), "nats async error") {
		if time.Now().After(deadline) {
			t.Fatalf("no async error logged within 10 s; log:\n%s", logOut.String())
		}
		_ = nc.Flush()
		time.Sleep(20 * time.Millisecond)
	}
	nc.Close()
	if got := restore(); got != "" {
		t.Errorf("the NATS client wrote to stderr directly: %q", got)
	}
	found := false
	sc := bufio.NewScanner(strings.NewReader(logOut.String()))
	for sc.Scan() {
		var rec map[string]any
		if err := json.Unmarshal(sc.Bytes(), &rec); err != nil {
			t.Errorf("log line is not JSON: %q", sc.Text())
			continue
		}
		if rec["msg"] == "nats async error" {
			found = true
			if e, _ := rec["err"].(string); !strings.Contains(e, `Permissions Violation for Subscription to "fhir.denied.subject"`) || rec["level"] != "WARN" {
				t.Errorf("async error record %v, want a WARN quoting the permissions violation", rec)
			}
		}
	}
	if !found {
		t.Errorf("no JSON record with msg \"nats async error\":\n%s", logOut.String())
	}
}
