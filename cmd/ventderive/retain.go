package main

import (
	"context"
	"flag"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/consumer/postgres"
)

func init() {
	register(command{name: "retain", summary: "remove uncited ventilator readings older than a horizon (dry run unless --apply; owner role)", run: runRetain})
}

// runRetain reports (and with --apply removes) the ventilator readings no
// derivation or refusal cites whose every version is older than the
// horizon, and the payloads of messages all of whose facts go with them.
func runRetain(ctx context.Context, args []string, e env) error {
	fs := flag.NewFlagSet("retain", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	dbURL := fs.String("database-url", e.getenv("DATABASE_URL"), "PostgreSQL URL of the schema owner role (default $DATABASE_URL)")
	horizon := fs.Duration("horizon", 7*24*time.Hour, fmt.Sprintf("keep every reading newer than this (effective time; at least %v)", postgres.MinRetainHorizon))
	asOf := fs.String("as-of", "", "measure the horizon back from this RFC 3339 time (default: now)")
	apply := fs.Bool("apply", false, "remove; without it, only report what would be removed")
	fs.Usage = func() {
		fmt.Fprintln(e.stderr, "usage: ventderive retain [--horizon D] [--as-of T] [--apply] [--database-url URL]")
		fs.PrintDefaults()
	}
	if done, err := parseFlags(fs, args); done {
		return err
	}
	if fs.NArg() != 0 || *dbURL == "" {
		fs.Usage()
		return errUsage
	}
	o := postgres.RetainOptions{Horizon: *horizon, Apply: *apply}
	if *asOf != "" {
		t, err := time.Parse(time.RFC3339, *asOf)
		if err != nil {
			fmt.Fprintf(e.stderr, "retain: --as-of: %v\n", err)
			return errUsage
		}
		o.AsOf = t
	}
	if o.Horizon < postgres.MinRetainHorizon {
		fmt.Fprintf(e.stderr, "retain: --horizon %v is shorter than %v (the readings around a late blood gas must stay)\n", o.Horizon, postgres.MinRetainHorizon)
		return errUsage
	}
	pool, err := pgxpool.New(ctx, *dbURL)
	if err != nil {
		return fmt.Errorf("database: %w", err)
	}
	defer pool.Close()
	rep, err := postgres.Retain(ctx, pool, o)
	if err != nil {
		return err
	}
	verb := "would remove"
	if rep.Applied {
		verb = "removed"
	}
	fmt.Fprintf(e.stdout, "cutoff %s (effective time; every version older, uncited, ventilator readings only)\n", rep.Cutoff.Format(time.RFC3339))
	fmt.Fprintf(e.stdout, "%s %d readings (%d fact rows) of %d patients and the payloads of %d messages: %d bytes\n",
		verb, rep.Keys, rep.Facts, rep.Patients, rep.Messages, rep.Bytes)
	if !rep.Applied {
		fmt.Fprintln(e.stdout, "dry run: nothing removed (--apply removes)")
	}
	return nil
}
