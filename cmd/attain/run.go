package main

import (
	"context"
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
	fs := newFlags("run", "usage: attain run [--config FILE] [--brokers LIST] [--data-dir DIR] [--http-addr ADDR] [--params FILE] [--embedded-broker-addr ADDR]",
		"Consumes the answers topic, keeps every learner's mastery in the store under --data-dir, publishes reached/stuck events and dead letters, and serves the HTTP API. With no brokers configured it starts the embedded broker. SIGINT or SIGTERM shut it down cleanly.", stderr)
	configPath := fs.String("config", "", "YAML config file (env ATTAIN_CONFIG)")
	def := config.Default()
	def.RegisterFlags(fs)
	if err := parseFlags(fs, args, stderr, true); err != nil {
		return err
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
