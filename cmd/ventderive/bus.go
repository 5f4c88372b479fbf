package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"slices"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/ventderive/ventderive/consumer"
)

func init() {
	register(command{name: "bus", summary: "check or create the streams and the durable consumers (deploy identity)", run: runBus})
}

// runBus compares the server's input and output streams and the durable
// consumers (the main one and the fresh lane's) with the definitions the service and deploy/nats/streams use
// (consumer.InputStreamConfig, OutputStreamConfig, ConsumerConfig,
// FreshConsumerConfig), prints
// every difference, and with "apply" creates or updates them first. It
// fails when a difference remains.
func runBus(ctx context.Context, args []string, e env) error {
	fs := flag.NewFlagSet("bus", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	natsURL := fs.String("nats-url", orDefaultString(e.getenv(envPrefix+"NATS_URL"), nats.DefaultURL), "NATS server URL(s) (env "+envPrefix+"NATS_URL)")
	creds := fs.String("nats-creds", e.getenv(envPrefix+"NATS_CREDS"), "NATS credentials file of the deploy identity (env "+envPrefix+"NATS_CREDS)")
	fs.Usage = func() {
		fmt.Fprintln(e.stderr, "usage: ventderive bus [flags] check|apply")
		fs.PrintDefaults()
	}
	if done, err := parseFlags(fs, args); done {
		return err
	}
	if fs.NArg() != 1 || (fs.Arg(0) != "check" && fs.Arg(0) != "apply") {
		fs.Usage()
		return errUsage
	}
	auth, err := natsAuth(*creds, "", "", "")
	if err != nil {
		return err
	}
	nc, err := nats.Connect(*natsURL, append(auth, nats.Name("ventderive bus"))...)
	if err != nil {
		return fmt.Errorf("nats %s: %w", maskURL(*natsURL), err)
	}
	defer nc.Close()
	if err := consumer.CheckServerVersion(nc.ConnectedServerVersion()); err != nil {
		return err
	}
	js, err := jetstream.New(nc)
	if err != nil {
		return err
	}
	ctx, cancel := context.WithTimeout(ctx, 30*time.Second)
	defer cancel()
	cfg := consumer.DefaultConfig()
	streams := []jetstream.StreamConfig{consumer.InputStreamConfig(cfg.InputStream), consumer.OutputStreamConfig()}
	// The main durable and the fresh lane's (consumer.FreshConsumerConfig).
	consumers := []jetstream.ConsumerConfig{consumer.ConsumerConfig(cfg), consumer.FreshConsumerConfig(cfg)}
	if fs.Arg(0) == "apply" {
		for _, sc := range streams {
			if _, err := js.CreateOrUpdateStream(ctx, sc); err != nil {
				return fmt.Errorf("stream %s: %w", sc.Name, err)
			}
			fmt.Fprintf(e.stdout, "stream %s: created or updated\n", sc.Name)
		}
		for _, cc := range consumers {
			if _, err := js.CreateOrUpdateConsumer(ctx, cfg.InputStream, cc); err != nil {
				return fmt.Errorf("consumer %s: %w", cc.Durable, err)
			}
			fmt.Fprintf(e.stdout, "consumer %s on %s: created or updated\n", cc.Durable, cfg.InputStream)
		}
	}
	diffs := 0
	for _, want := range streams {
		diffs += checkStream(ctx, js, want, e.stdout)
	}
	for _, cc := range consumers {
		diffs += checkConsumer(ctx, js, cfg.InputStream, cc, e.stdout)
	}
	if diffs > 0 {
		return fmt.Errorf("%d differences from the service's definitions (run 'ventderive bus apply' as the deploy identity)", diffs)
	}
	fmt.Fprintln(e.stdout, "streams and consumers match the service's definitions")
	return nil
}

func orDefaultString(v, def string) string {
	if v == "" {
		return def
	}
	return v
}

// checkStream prints how the server's stream differs from want and returns
// the number of differences.
func checkStream(ctx context.Context, js jetstream.JetStream, want jetstream.StreamConfig, w io.Writer) int {
	s, err := js.Stream(ctx, want.Name)
	if err != nil {
		fmt.Fprintf(w, "stream %s: %v\n", want.Name, err)
		return 1
	}
	got := s.CachedInfo().Config
	d := differ{w: w, what: "stream " + want.Name}
	diff := d.field
	diff("subjects", got.Subjects, want.Subjects)
	diff("storage", got.Storage, want.Storage)
	diff("retention", got.Retention, want.Retention)
	diff("max_age", got.MaxAge, want.MaxAge)
	diff("duplicate_window", got.Duplicates, want.Duplicates)
	diff("max_msg_size", got.MaxMsgSize, want.MaxMsgSize)
	diff("discard", got.Discard, want.Discard)
	return d.n
}

// checkConsumer prints how the server's durable consumer differs from want
// and returns the number of differences.
func checkConsumer(ctx context.Context, js jetstream.JetStream, stream string, want jetstream.ConsumerConfig, w io.Writer) int {
	c, err := js.Consumer(ctx, stream, want.Durable)
	if err != nil {
		fmt.Fprintf(w, "consumer %s on %s: %v\n", want.Durable, stream, err)
		return 1
	}
	got := c.CachedInfo().Config
	d := differ{w: w, what: "consumer " + want.Durable}
	diff := d.field
	diff("deliver_policy", got.DeliverPolicy, want.DeliverPolicy)
	diff("ack_policy", got.AckPolicy, want.AckPolicy)
	diff("ack_wait", got.AckWait, want.AckWait)
	diff("max_deliver", got.MaxDeliver, want.MaxDeliver)
	diff("max_ack_pending", got.MaxAckPending, want.MaxAckPending)
	diff("filter_subject", filterOf(got), filterOf(want))
	diff("replay_policy", got.ReplayPolicy, want.ReplayPolicy)
	return d.n
}

// differ prints each field of a server's definition that differs from the
// one the service wants, as "<what>: <field> is <got>, want <want>", and
// counts them.
type differ struct {
	w    io.Writer
	what string
	n    int
}

func (d *differ) field(name string, got, want any) {
	if fmt.Sprint(got) != fmt.Sprint(want) {
		fmt.Fprintf(d.w, "%s: %s is %v, want %v\n", d.what, name, got, want)
		d.n++
	}
}

// filterOf is a consumer's filter subjects, however they were given.
func filterOf(c jetstream.ConsumerConfig) []string {
	f := slices.Clone(c.FilterSubjects)
	if c.FilterSubject != "" {
		f = append(f, c.FilterSubject)
	}
	slices.Sort(f)
	return f
}
