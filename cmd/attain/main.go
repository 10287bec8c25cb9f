// Command attain estimates every learner's mastery of every skill from a
// stream of answer events (Bayesian Knowledge Tracing on Kafka).
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"sort"
	"syscall"
)

// A command runs with its arguments (after the command name) and returns
// an error to print; errUsage prints the usage and exits 2.
type command struct {
	summary string
	run     func(ctx context.Context, args []string, stdout, stderr io.Writer) error
}

var errUsage = errors.New("usage")

// newFlags returns a command's flag set, whose usage prints the usage
// line, what the command does, and its flags.
func newFlags(name, usage, about string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(stderr, usage)
		fmt.Fprintf(stderr, "\n%s\n\nflags:\n", about)
		fs.PrintDefaults()
	}
	return fs
}

// parseFlags parses a command's arguments: -h gives flag.ErrHelp; a bad
// flag, or with noArgs an argument that is not a flag, gives errUsage
// after saying why.
func parseFlags(fs *flag.FlagSet, args []string, stderr io.Writer, noArgs bool) error {
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return err
		}
		return errUsage
	}
	if noArgs && fs.NArg() > 0 {
		fmt.Fprintf(stderr, "attain %s: unexpected argument %q\n", fs.Name(), fs.Arg(0))
		fs.Usage()
		return errUsage
	}
	return nil
}

// commands lists the subcommands; each lives in a file of its own.
var commands = map[string]command{}

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM, syscall.SIGHUP)
	code := run(ctx, os.Args[1:], os.Stdout, os.Stderr)
	stop()
	os.Exit(code)
}

func run(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	if len(args) == 0 || args[0] == "-h" || args[0] == "--help" || args[0] == "help" {
		usage(stderr)
		if len(args) == 0 {
			return 2
		}
		return 0
	}
	c, ok := commands[args[0]]
	if !ok {
		fmt.Fprintf(stderr, "attain: unknown command %q\n\n", args[0])
		usage(stderr)
		return 2
	}
	err := c.run(ctx, args[1:], stdout, stderr)
	switch {
	case err == nil:
		return 0
	case errors.Is(err, flag.ErrHelp):
		return 0
	case errors.Is(err, errUsage):
		return 2
	default:
		fmt.Fprintf(stderr, "attain %s: %v\n", args[0], err)
		return 1
	}
}

func usage(w io.Writer) {
	fmt.Fprintln(w, "usage: attain COMMAND [flags]\n\ncommands:")
	names := make([]string, 0, len(commands))
	for n := range commands {
		names = append(names, n)
	}
	sort.Strings(names)
	for _, n := range names {
		fmt.Fprintf(w, "  %-10s %s\n", n, commands[n].summary)
	}
	fmt.Fprintln(w, "\nRun 'attain COMMAND -h' for a command's flags.")
}
