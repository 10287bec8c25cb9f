package stream

import (
	"fmt"
	"net"
	"strconv"
	"time"

	"github.com/rs/zerolog"
	"github.com/twmb/franz-go/pkg/kfake"
)

// BrokerOptions configure the embedded broker.
type BrokerOptions struct {
	// Addr is host:port to listen on; port 0 picks a free port.
	// Default "127.0.0.1:9092".
	Addr string
	// DataDir, when set, is where the broker keeps its topics, offsets and
	// groups on disk, so that a restart finds them again. "" keeps
	// everything in memory.
	DataDir string
	Logger  zerolog.Logger
}

// Broker is the embedded single-node Kafka-protocol broker (kfake), used by
// `attain run` when no brokers are configured, by `attain broker` and by
// `attain demo`. It speaks the Kafka protocol over TCP, so every client —
// attain's own, kcat — talks to it as to a real cluster.
type Broker struct {
	c    *kfake.Cluster
	addr string
}

// StartBroker starts the embedded broker. Topics are not created here; call
// EnsureTopics with the broker's address.
func StartBroker(opt BrokerOptions) (*Broker, error) {
	addr := opt.Addr
	if addr == "" {
		addr = "127.0.0.1:9092"
	}
	host, portStr, err := net.SplitHostPort(addr)
	if err != nil {
		return nil, fmt.Errorf("attain: embedded broker address %q: %w", addr, err)
	}
	port, err := strconv.Atoi(portStr)
	if err != nil || port < 0 || port > 65535 {
		return nil, fmt.Errorf("attain: embedded broker address %q: port must be a number 0-65535", addr)
	}
	opts := []kfake.Opt{
		kfake.Ports(port), // one port: a single broker
		// kfake listens on 127.0.0.1 only; ListenFn lets the configured host
		// be used instead (and is also how the broker advertises itself).
		kfake.ListenFn(func(network, _ string) (net.Listener, error) {
			return net.Listen(network, net.JoinHostPort(host, strconv.Itoa(port)))
		}),
		kfake.WithLogger(kfakeLogger{opt.Logger}),
		// Consumer groups of tests and the crash test use short sessions;
		// the broker's own floor must not be higher (Kafka's default
		// group.min.session.timeout.ms is 6 s; common practice to lower it
		// for single-node development brokers).
		kfake.GroupMinSessionTimeout(100 * time.Millisecond),
	}
	if opt.DataDir != "" {
		opts = append(opts, kfake.DataDir(opt.DataDir))
	}
	c, err := kfake.NewCluster(opts...)
	if err != nil {
		return nil, fmt.Errorf("attain: starting the embedded broker on %s: %w", addr, err)
	}
	addrs := c.ListenAddrs()
	b := &Broker{c: c, addr: addrs[0]}
	ev := opt.Logger.Info().Str("addr", b.addr)
	if opt.DataDir != "" {
		ev = ev.Str("broker_dir", opt.DataDir)
	} else {
		ev = ev.Bool("in_memory", true)
	}
	ev.Msg("embedded broker listening")
	return b, nil
}

// Addr is the address the broker listens on and advertises (host:port).
func (b *Broker) Addr() string { return b.addr }

// Close stops the broker; with a DataDir its state is saved first.
func (b *Broker) Close() { b.c.Close() }

// kfakeLogger forwards the broker's warnings and errors; its informational
// lines are per request and too many to keep.
type kfakeLogger struct{ log zerolog.Logger }

func (l kfakeLogger) Logf(level kfake.LogLevel, format string, args ...any) {
	switch level {
	case kfake.LogLevelError:
		l.log.Error().Str("component", "broker").Msgf(format, args...)
	case kfake.LogLevelWarn:
		l.log.Debug().Str("component", "broker").Msgf(format, args...)
	}
}
