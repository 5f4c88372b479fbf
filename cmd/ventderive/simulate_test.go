package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/cmd/ventderive/internal/scenario"
	"github.com/ventderive/ventderive/consumer"
)

// startJetStream runs an in-process nats-server with JetStream on a free
// port and a throwaway store, and stops it when the test ends.
func startJetStream(t *testing.T) *server.Server {
	t.Helper()
	s, err := server.NewServer(&server.Options{
		Host: "127.0.0.1", Port: -1, JetStream: true, StoreDir: t.TempDir(), NoLog: true, NoSigs: true,
	})
	if err != nil {
		t.Fatalf("nats server: %v", err)
	}
	go s.Start()
	if !s.ReadyForConnections(10 * time.Second) {
		s.Shutdown()
		t.Fatal("nats server not ready in 10s")
	}
	t.Cleanup(func() { s.Shutdown(); s.WaitForShutdown() })
	return s
}

func testEnv(stdout, stderr *bytes.Buffer) env {
	return env{getenv: func(string) string { return "" }, stdin: strings.NewReader(""), stdout: stdout, stderr: stderr}
}

// A short scenario keeps the test quick on two cores: 6 h, a reading every 5 min.
var simArgs = []string{"--seed", "7", "--duration", "6h", "--vent-every", "5m"}

func TestSimulatePublishesEveryMessageOnce(t *testing.T) {
	s := startJetStream(t)
	nc, err := nats.Connect(s.ClientURL())
	if err != nil {
		t.Fatalf("connect: %v", err)
	}
	defer nc.Close()
	js, err := jetstream.New(nc)
	if err != nil {
		t.Fatalf("jetstream: %v", err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	stream, err := js.CreateStream(ctx, consumer.InputStreamConfig(""))
	if err != nil {
		t.Fatalf("create stream: %v", err)
	}

	want := scenario.Generate(scenario.Options{Seed: 7, Duration: 6 * time.Hour, VentEvery: 5 * time.Minute})
	args := append([]string{"simulate", "--nats-url", s.ClientURL()}, simArgs...)

	// The second run republishes the same message ids inside the stream's
	// duplicate window: the server must drop every one of them.
	for i, name := range []string{"first run stores all", "second run only duplicates"} {
		var out, errOut bytes.Buffer
		if err := run(ctx, args, testEnv(&out, &errOut)); err != nil {
			t.Fatalf("%s: %v\n%s", name, err, errOut.String())
		}
		n := len(want.Messages)
		var stored, dups int
		if i == 0 {
			stored = n
		} else {
			dups = n
		}
		line := strings.SplitN(out.String(), "\n", 2)[0]
		if !strings.Contains(line, strconv.Itoa(stored)+" stored, "+strconv.Itoa(dups)+" duplicates, 0 failed") {
			t.Errorf("%s: report %q", name, line)
		}
	}

	info, err := stream.Info(ctx)
	if err != nil {
		t.Fatalf("stream info: %v", err)
	}
	if info.State.Msgs != uint64(len(want.Messages)) {
		t.Fatalf("stream holds %d messages, scenario has %d", info.State.Msgs, len(want.Messages))
	}
	byID := map[string]scenario.Message{}
	for _, m := range want.Messages {
		byID[m.MsgID] = m
	}
	seen := map[string]bool{}
	for seq := uint64(1); seq <= info.State.LastSeq; seq++ {
		raw, err := stream.GetMsg(ctx, seq)
		if err != nil {
			t.Fatalf("get %d: %v", seq, err)
		}
		id := raw.Header.Get(jetstream.MsgIDHeader)
		m, ok := byID[id]
		if !ok || seen[id] {
			t.Fatalf("seq %d: message id %q unknown or seen twice", seq, id)
		}
		seen[id] = true
		if raw.Subject != m.Subject || !bytes.Equal(raw.Data, m.Payload) {
			t.Fatalf("seq %d: subject %s, payload differs from the scenario's", seq, raw.Subject)
		}
		if ct := raw.Header.Get(consumer.HeaderContentType); ct != consumer.FHIRContentType {
			t.Fatalf("seq %d: content type %q", seq, ct)
		}
	}
	if len(seen) != len(want.Messages) {
		t.Fatalf("%d distinct messages, want %d", len(seen), len(want.Messages))
	}
}

func TestSimulateDryRun(t *testing.T) {
	var out, errOut bytes.Buffer
	args := append([]string{"simulate", "--dry-run", "--subject-prefix", "site.a.in", "--nats-url", "nats://127.0.0.1:1"}, simArgs...)
	if err := run(context.Background(), args, testEnv(&out, &errOut)); err != nil {
		t.Fatalf("dry run: %v\n%s", err, errOut.String())
	}
	want := scenario.Generate(scenario.Options{Seed: 7, Duration: 6 * time.Hour, VentEvery: 5 * time.Minute})
	sc := bufio.NewScanner(&out)
	sc.Buffer(make([]byte, 0, 1<<20), 1<<22)
	i := 0
	for sc.Scan() {
		var l dryRunLine
		if err := json.Unmarshal(sc.Bytes(), &l); err != nil {
			t.Fatalf("line %d: %v", i+1, err)
		}
		m := want.Messages[i]
		payload := []byte(l.PayloadText)
		if l.Payload != nil {
			payload = l.Payload
		}
		if l.At != m.At.Format(time.RFC3339) || l.MsgID != m.MsgID || l.Malformed != m.Malformed ||
			l.Subject != "site.a.in"+strings.TrimPrefix(m.Subject, scenario.DefaultSubjectPrefix) || !bytes.Equal(payload, m.Payload) {
			t.Fatalf("line %d: %s %s %s does not match message %s %s", i+1, l.At, l.Subject, l.MsgID, m.Subject, m.MsgID)
		}
		i++
	}
	if i != len(want.Messages) {
		t.Fatalf("%d lines, want %d", i, len(want.Messages))
	}
}

// With --speed the simulated span is stretched over real time.
func TestSimulateSpeedPaces(t *testing.T) {
	s := startJetStream(t)
	nc, err := nats.Connect(s.ClientURL())
	if err != nil {
		t.Fatalf("connect: %v", err)
	}
	defer nc.Close()
	js, _ := jetstream.New(nc)
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	if _, err := js.CreateStream(ctx, consumer.InputStreamConfig("")); err != nil {
		t.Fatalf("create stream: %v", err)
	}
	sc := scenario.Generate(scenario.Options{Seed: 7, Duration: 6 * time.Hour, VentEvery: 10 * time.Minute})
	span := sc.Messages[len(sc.Messages)-1].At.Sub(sc.Start)
	const speed = 36000 // 10 simulated hours per real second
	var out, errOut bytes.Buffer
	began := time.Now()
	args := []string{"simulate", "--nats-url", s.ClientURL(), "--seed", "7", "--duration", "6h", "--vent-every", "10m", "--speed", "36000"}
	if err := run(ctx, args, testEnv(&out, &errOut)); err != nil {
		t.Fatalf("simulate: %v\n%s", err, errOut.String())
	}
	if min := time.Duration(float64(span) / speed); time.Since(began) < min {
		t.Errorf("took %v, the last message is due after %v", time.Since(began), min)
	}
}

func TestSimulateRefusesBadFlags(t *testing.T) {
	tests := []struct {
		name string
		args []string
	}{
		{"prefix_wildcard", []string{"--subject-prefix", "fhir.*"}},
		{"prefix_trailing_dot", []string{"--subject-prefix", "fhir."}},
		{"duration_1h_below_6h", []string{"--duration", "1h"}},
		{"vent_every_1h_above_10min", []string{"--vent-every", "1h"}},
		{"speed_negative", []string{"--speed", "-1"}},
		{"start_without_zone", []string{"--start", "2026-03-02T07:00:00"}},
		{"unknown_flag", []string{"--bogus"}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			var out, errOut bytes.Buffer
			err := run(context.Background(), append([]string{"simulate", "--dry-run"}, tt.args...), testEnv(&out, &errOut))
			if !errors.Is(err, errUsage) || out.Len() != 0 {
				t.Errorf("err %v, %d bytes out; want a usage error and no output", err, out.Len())
			}
		})
	}
}

// Without a stream for the subjects, simulate fails with a clear message
// instead of reporting success.
func TestSimulateWithoutStreamFails(t *testing.T) {
	s := startJetStream(t)
	var out, errOut bytes.Buffer
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	err := run(ctx, []string{"simulate", "--nats-url", s.ClientURL(), "--duration", "6h", "--vent-every", "10m"}, testEnv(&out, &errOut))
	if err == nil || !strings.Contains(err.Error(), "no stream captures") {
		t.Fatalf("err %v, want a missing-stream error", err)
	}
}
