package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"

	"github.com/attain-dev/attain/config"
	"github.com/attain-dev/attain/stream"
)

func init() {
	commands["run"] = command{
		summary: "run the processor daemon: consume answers, keep mastery, publish events",
		run:     runRun,
	}
}

func runRun(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("run", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: attain run [--config FILE] [--brokers LIST] [--data-dir DIR] [--http-addr ADDR] [--params FILE] [--embedded-broker-addr ADDR]")
		fmt.Fprintln(stderr, "\nConsumes the answers topic, keeps every learner's mastery in the store under --data-dir, publishes reached/stuck events and dead letters, and serves the HTTP API. With no brokers configured it starts the embedded broker. SIGINT or SIGTERM shut it down cleanly.\n\nflags:")
		fs.PrintDefaults()
	}
	configPath := fs.String("config", "", "YAML config file (env ATTAIN_CONFIG)")
	def := config.Default()
	def.RegisterFlags(fs)
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return err
		}
		return errUsage
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(stderr, "attain run: unexpected argument %q\n", fs.Arg(0))
		fs.Usage()
		return errUsage
	}
	cfg, err := config.Load(*configPath, os.Environ(), fs)
	if err != nil {
		return err
	}
	if err := cfg.Validate(); err != nil {
		return err
	}
	log := cfg.Logger(stderr, config.IsTerminal(stderr))
	return stream.NewDaemon(cfg, log).Run(ctx)
}
