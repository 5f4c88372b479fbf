package main

import (
	"context"
	"flag"
	"fmt"
	"log/slog"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/pgxpool"

	"github.com/ventderive/ventderive/migrations"
)

func init() {
	register(command{name: "migrate", summary: "apply the database migrations (owner role)", run: runMigrate})
}

// runMigrate applies the embedded migrations to the database named by
// --database-url (default: the DATABASE_URL environment variable) and
// prints the schema version. It must run as the role that owns the schema
// (ventderive_owner); replicas may run it together.
func runMigrate(ctx context.Context, args []string, e env) error {
	fs := flag.NewFlagSet("migrate", flag.ContinueOnError)
	fs.SetOutput(e.stderr)
	dbURL := fs.String("database-url", e.getenv("DATABASE_URL"), "PostgreSQL URL of the schema owner role (default $DATABASE_URL)")
	fs.Usage = func() {
		fmt.Fprintln(e.stderr, "usage: ventderive migrate [--database-url URL]")
		fs.PrintDefaults()
	}
	if done, err := parseFlags(fs, args); done {
		return err
	}
	if fs.NArg() != 0 || *dbURL == "" {
		fs.Usage()
		return errUsage
	}
	log := slog.New(slog.NewJSONHandler(e.stderr, nil))
	log.Info("migrate", "database", databaseTarget(*dbURL), "latest", migrations.Latest())
	pool, err := pgxpool.New(ctx, *dbURL)
	if err != nil {
		return fmt.Errorf("database: %w", err)
	}
	defer pool.Close()
	v, err := migrations.Apply(ctx, pool, log)
	if err != nil {
		return fmt.Errorf("migrate: %w", err)
	}
	fmt.Fprintf(e.stdout, "schema version %d (this binary knows %d)\n", v, migrations.Latest())
	return nil
}

// databaseTarget names the server, database and role of a connection string
// for logs, without the password.
func databaseTarget(conn string) string {
	c, err := pgx.ParseConfig(conn)
	if err != nil {
		return "(unparsable connection string)"
	}
	return fmt.Sprintf("%s@%s:%d/%s", c.User, c.Host, c.Port, c.Database)
}
