// Command ventderive derives CO2-elimination physiology from FHIR R4 blood
// gas and ventilator Observations. See README.md for the subcommands.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
)

// env is what a subcommand may touch of the outside world. Only package main
// reads flags and environment variables.
type env struct {
	getenv func(string) string
	stdin  io.Reader
	stdout io.Writer
	stderr io.Writer
}

// errUsage marks a command-line mistake: exit status 2.
var errUsage = errors.New("usage")

// parseFlags parses a command's flags. done says the command ends here:
// with err nil after -h or --help (the flag package printed the usage), or
// with errUsage after a malformed flag (the flag package named it).
func parseFlags(fs *flag.FlagSet, args []string) (done bool, err error) {
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return true, nil
		}
		return true, errUsage
	}
	return false, nil
}

type command struct {
	name    string
	summary string
	run     func(ctx context.Context, args []string, e env) error
}

// commands is filled by each subcommand's file in an init function, so that
// subcommands stay independent of each other.
var commands []command

func register(c command) { commands = append(commands, c) }

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	err := run(ctx, os.Args[1:], env{getenv: os.Getenv, stdin: os.Stdin, stdout: os.Stdout, stderr: os.Stderr})
	stop()
	if err != nil {
		if !errors.Is(err, errUsage) {
			fmt.Fprintln(os.Stderr, "ventderive:", err)
		}
		if errors.Is(err, errUsage) {
			os.Exit(2)
		}
		os.Exit(1)
	}
}

func run(ctx context.Context, args []string, e env) error {
	if len(args) > 0 && (args[0] == "version" || wantsVersion(args)) {
		readBuildInfo().print(e.stdout)
		return nil
	}
	if len(args) == 0 || args[0] == "-h" || args[0] == "--help" || args[0] == "help" {
		usage(e.stderr)
		if len(args) == 0 {
			return errUsage
		}
		return nil
	}
	for _, c := range commands {
		if c.name == args[0] {
			return c.run(ctx, args[1:], e)
		}
	}
	fmt.Fprintf(e.stderr, "ventderive: unknown command %q\n", args[0])
	usage(e.stderr)
	return errUsage
}

func usage(w io.Writer) {
	fmt.Fprintln(w, "usage: ventderive <command> [flags]")
	fmt.Fprintln(w, "commands:")
	for _, c := range commands {
		fmt.Fprintf(w, "  %-9s %s\n", c.name, c.summary)
	}
	fmt.Fprintln(w, "Run 'ventderive <command> -h' for a command's flags, 'ventderive --version' (or '<command> --version') for the build.")
}
