package main

import (
	"context"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/consumer"
)

// bus check reports what is missing or different; bus apply creates the
// streams and both consumers (main and fresh lane) from the service's
// definitions.
func TestBusCheckAndApply(t *testing.T) {
	ns, err := startEmbeddedNATS(t.TempDir())
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { ns.Shutdown(); ns.WaitForShutdown() })
	bus := func(verb string) (string, error) {
		var out strings.Builder
		e := env{getenv: func(string) string { return "" }, stdin: strings.NewReader(""), stdout: &out, stderr: &out}
		err := run(context.Background(), []string{"bus", "--nats-url", ns.ClientURL(), verb}, e)
		return out.String(), err
	}
	out, err := bus("check")
	if err == nil || !strings.Contains(out, "stream "+consumer.DefaultInputStream) || !strings.Contains(out, "consumer "+consumer.DefaultDurable+" ") ||
		!strings.Contains(out, "consumer "+consumer.DefaultFreshDurable+" ") {
		t.Fatalf("check on an empty server: %v\n%s", err, out)
	}
	if out, err := bus("apply"); err != nil || !strings.Contains(out, "match") {
		t.Fatalf("apply: %v\n%s", err, out)
	}
	if out, err := bus("check"); err != nil {
		t.Fatalf("check after apply: %v\n%s", err, out)
	}
	// An operator changes the output stream by hand.
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, _ := jetstream.New(nc)
	sc := consumer.OutputStreamConfig()
	sc.MaxAge = time.Hour
	if _, err := js.UpdateStream(context.Background(), sc); err != nil {
		t.Fatal(err)
	}
	out, err = bus("check")
	if err == nil || !strings.Contains(out, "stream "+consumer.DefaultOutputStream+": max_age is 1h0m0s, want 720h0m0s") {
		t.Fatalf("check after a change by hand: %v\n%s", err, out)
	}
	if _, err := js.UpdateStream(context.Background(), consumer.OutputStreamConfig()); err != nil {
		t.Fatal(err)
	}
	// Someone deletes the fresh lane's consumer.
	if err := js.DeleteConsumer(context.Background(), consumer.DefaultInputStream, consumer.DefaultFreshDurable); err != nil {
		t.Fatal(err)
	}
	out, err = bus("check")
	if err == nil || !strings.Contains(out, "consumer "+consumer.DefaultFreshDurable+" on "+consumer.DefaultInputStream) || strings.Contains(out, "stream ") {
		t.Fatalf("check after the fresh consumer was deleted: %v\n%s", err, out)
	}
	if out, err := bus("apply"); err != nil || !strings.Contains(out, "consumer "+consumer.DefaultFreshDurable+" on "+consumer.DefaultInputStream+": created or updated") {
		t.Fatalf("apply again: %v\n%s", err, out)
	}
}
