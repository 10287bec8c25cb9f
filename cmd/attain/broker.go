package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"time"

	"github.com/attain-dev/attain/config"
	"github.com/attain-dev/attain/stream"
)

func init() {
	commands["broker"] = command{
		summary: "run the embedded Kafka-protocol broker alone, with attain's topics (for kcat and other clients)",
		run:     runBroker,
	}
}

func runBroker(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("broker", "usage: attain broker [--config FILE] [--addr ADDR] [--dir DIR]",
		"Runs the embedded broker until SIGINT or SIGTERM, with the configured topics created, and prints its address. Topics, offsets and groups are kept under --dir (default: in memory only).", stderr)
	configPath := fs.String("config", "", "YAML config file (env ATTAIN_CONFIG): topic names, topics.partitions, log")
	addr := fs.String("addr", "", "listen address host:port (default: embedded_broker_addr, "+config.Default().EmbeddedBrokerAddr+")")
	dir := fs.String("dir", "", "directory to keep the broker's data in (default: memory only)")
	if err := parseFlags(fs, args, stderr, true); err != nil {
		return err
	}
	cfg, err := config.Load(*configPath, os.Environ(), nil)
	if err != nil {
		return err
	}
	if *addr != "" {
		cfg.EmbeddedBrokerAddr = *addr
	}
	if err := cfg.Validate(); err != nil {
		return err
	}
	log := cfg.Logger(stderr, config.IsTerminal(stderr))
	b, err := stream.StartBroker(stream.BrokerOptions{Addr: cfg.EmbeddedBrokerAddr, DataDir: *dir, Logger: log})
	if err != nil {
		return err
	}
	defer b.Close()
	tctx, cancel := context.WithTimeout(ctx, 30*time.Second)
	defer cancel()
	t := cfg.Topics
	if err := stream.EnsureTopics(tctx, []string{b.Addr()}, stream.Topics(t.Answers, t.Mastery, t.DeadLetter, t.Params, t.Partitions), log); err != nil {
		return err
	}
	fmt.Fprintln(stdout, b.Addr())
	<-ctx.Done()
	return nil
}
