package stream

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"sync"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/config"
	"github.com/attain-dev/attain/state"
)

// Daemon is `attain run`: the store, the parameter registry, the embedded
// broker when no brokers are configured, the HTTP API, the outbox
// publisher, the params-topic follower and the consumer, each started and
// stopped in one place.
//
// Start order: embedded broker → topics → store → parameters (file, then
// topic) → HTTP API → publisher → consumer. Shutdown is the reverse, so
// that nothing is stopped while something started later still uses it:
//
//  1. stop consuming: every partition finishes the batch in hand, commits
//     it synced, drains its outbox once more (within DrainTimeout) while
//     the generation still owns it, and the member leaves the group;
//  2. close the publisher's writer (waits for writes in flight);
//  3. shut the HTTP API down (requests in flight finish);
//  4. stop following the params topic;
//  5. close the store (flush and sync);
//  6. stop the embedded broker (saving its data under the data dir).
type Daemon struct {
	cfg config.Config
	log zerolog.Logger

	// Brokers is set once Run has connected (the embedded broker's
	// address when none was configured); for tests and the demo.
	mu      sync.Mutex
	brokers []string
	store   *state.Store
	metrics *Metrics
	httpLn  net.Listener
	ready   chan struct{}
}

// NewDaemon returns a daemon for a validated configuration.
func NewDaemon(cfg config.Config, log zerolog.Logger) *Daemon {
	return &Daemon{cfg: cfg, log: log, ready: make(chan struct{})}
}

// Ready is closed once every part has started.
func (d *Daemon) Ready() <-chan struct{} { return d.ready }

// Brokers returns the bootstrap addresses in use (after Ready).
func (d *Daemon) Brokers() []string {
	d.mu.Lock()
	defer d.mu.Unlock()
	return d.brokers
}

// HTTPAddr returns the address the HTTP API listens on ("" when disabled;
// after Ready).
func (d *Daemon) HTTPAddr() string {
	d.mu.Lock()
	defer d.mu.Unlock()
	if d.httpLn == nil {
		return ""
	}
	return d.httpLn.Addr().String()
}

// Store returns the open store (after Ready, until Run returns).
func (d *Daemon) Store() *state.Store {
	d.mu.Lock()
	defer d.mu.Unlock()
	return d.store
}

// Metrics returns the daemon's metrics (after Ready).
func (d *Daemon) Metrics() *Metrics {
	d.mu.Lock()
	defer d.mu.Unlock()
	return d.metrics
}

// Run starts everything, runs until ctx ends or a part fails, then shuts
// down in the documented order. It returns the first failure (nil after a
// shutdown asked for by ctx).
func (d *Daemon) Run(ctx context.Context) (err error) {
	cfg, log := d.cfg, d.log
	var g runGroup
	g.log = log
	defer func() {
		if serr := g.stop(); err == nil {
			err = serr
		}
	}()

	brokers := cfg.Brokers
	if len(brokers) == 0 {
		dir := filepath.Join(cfg.DataDir, "broker")
		b, err := StartBroker(BrokerOptions{Addr: cfg.EmbeddedBrokerAddr, DataDir: dir, Logger: log})
		if err != nil {
			return err
		}
		g.add("embedded broker", func() error { b.Close(); return nil })
		brokers = []string{b.Addr()}
		log.Info().Str("brokers", b.Addr()).Msg("no brokers configured: using the embedded broker")
	}
	tctx, cancel := context.WithTimeout(ctx, 30*time.Second)
	err = EnsureTopics(tctx, brokers, Topics(cfg.Topics.Answers, cfg.Topics.Mastery, cfg.Topics.DeadLetter, cfg.Topics.Params, cfg.Topics.Partitions), log)
	cancel()
	if err != nil {
		return err
	}

	st, err := state.OpenStore(cfg.DataDir, state.StoreOptions{
		CacheRecords:    cfg.Cache.Records,
		BlockCacheBytes: int64(cfg.Cache.BlockCacheMB) << 20,
		DedupeWindow:    cfg.Consumer.DedupeWindow,
		Policy:          cfg.Policy(),
		Logger:          log,
	})
	if err != nil {
		return fmt.Errorf("attain: opening the store in %s: %w", cfg.DataDir, err)
	}
	g.add("store", st.Close)

	m := NewMetrics()
	base := state.NewParamFile()
	if cfg.Params != "" {
		if base, err = state.LoadParamFile(cfg.Params); err != nil {
			return err
		}
	}
	reg := state.NewRegistry(base)
	m.ParamsVersion.Store(base.Version)
	log.Info().Int64("version", base.Version).Int("skills", len(base.Skills)).Str("file", cfg.Params).Msg("parameter set loaded")
	if cfg.ParamsFromTopic {
		f := NewParamsFollower(reg, m, ParamsFollowerOptions{Brokers: brokers, Topic: cfg.Topics.Params, Base: base, Logger: log})
		if err := f.Start(ctx); err != nil {
			return err
		}
		g.add("params follower", f.Stop)
	}

	var httpLn net.Listener
	if cfg.HTTPAddr != "" {
		httpLn, err = net.Listen("tcp", cfg.HTTPAddr)
		if err != nil {
			return fmt.Errorf("attain: http_addr %s: %w", cfg.HTTPAddr, err)
		}
		api := NewAPI(st, m, APIOptions{Addr: cfg.HTTPAddr, Token: cfg.HTTPToken, Logger: log})
		g.goActor("HTTP API", func(ctx context.Context) error { return api.Serve(ctx, httpLn) })
	}

	source := Source(cfg.Consumer.Group)
	pub, err := NewPublisher(st, m, PublisherOptions{
		Brokers: brokers, MasteryTopic: cfg.Topics.Mastery, DeadLetterTopic: cfg.Topics.DeadLetter,
		Source: source, Balancer: cfg.Producer.Balancer, Logger: log,
	})
	if err != nil {
		return err
	}
	g.add("publisher", pub.Close)

	dec := &state.NativeDecoder{}
	if cfg.ItemsFile != "" {
		if dec.Items, err = LoadItems(cfg.ItemsFile); err != nil {
			return err
		}
	}
	proc, err := NewProcessor(st, reg, pub, m, ProcessorOptions{
		Brokers: brokers, Group: cfg.Consumer.Group, Topic: cfg.Topics.Answers, Start: cfg.Consumer.Start,
		MaxEventBytes: cfg.Consumer.MaxEventBytes, BatchInterval: cfg.Batch.Interval, BatchMaxAnswers: cfg.Batch.MaxAnswers,
		SessionTimeout: cfg.Consumer.SessionTimeout, HeartbeatInterval: cfg.Consumer.HeartbeatInterval,
		Decoder: dec, Logger: log,
	})
	if err != nil {
		return err
	}
	g.goActor("consumer", proc.Run)
	if cfg.Refit.Interval > 0 || cfg.Refit.Answers > 0 {
		rl, err := NewRefitLoop(st, reg, m, RefitLoopOptionsFrom(cfg, brokers, log))
		if err != nil {
			return err
		}
		g.goActor("refit loop", rl.Run)
	}

	d.mu.Lock()
	d.brokers, d.store, d.metrics, d.httpLn = brokers, st, m, httpLn
	d.mu.Unlock()
	close(d.ready)
	log.Info().Strs("brokers", brokers).Str("data_dir", cfg.DataDir).Str("group", cfg.Consumer.Group).Msg("attain running")

	select {
	case <-ctx.Done():
		log.Info().Msg("shutting down")
		return nil
	case err := <-g.failed:
		log.Error().Err(err).Msg("shutting down after a failure")
		return err
	}
}

// LoadItems reads an item→skills map (Q-matrix), JSON {"item": ["skill", ...]}.
func LoadItems(path string) (map[string][]string, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("attain: items_file: %w", err)
	}
	var items map[string][]string
	if err := json.Unmarshal(b, &items); err != nil {
		return nil, fmt.Errorf("attain: items_file %s: must be a JSON object of item ids to lists of skills: %w", path, err)
	}
	return items, nil
}

// runGroup owns start/stop pairs: each part is added once started, and
// stop stops them in reverse order (the last started first). Long-running
// parts (goActor) get a context of their own; their stop cancels it and
// waits, and an early return with an error is reported on failed.
type runGroup struct {
	log    zerolog.Logger
	steps  []step
	failed chan error
}

type step struct {
	name string
	stop func() error
}

func (g *runGroup) add(name string, stop func() error) {
	g.steps = append(g.steps, step{name, stop})
}

func (g *runGroup) goActor(name string, run func(context.Context) error) {
	if g.failed == nil {
		g.failed = make(chan error, 8)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() {
		err := run(ctx)
		if ctx.Err() == nil {
			// Returned on its own: a failure (or an unexpected stop),
			// reported once, on failed.
			if err == nil {
				err = fmt.Errorf("attain: %s stopped unexpectedly", name)
			}
			select {
			case g.failed <- fmt.Errorf("%s: %w", name, err):
			default:
			}
			err = nil
		}
		done <- err
	}()
	g.add(name, func() error {
		cancel()
		err := <-done
		if errors.Is(err, context.Canceled) {
			return nil
		}
		return err
	})
}

// stop stops every part, last started first, and returns their errors.
func (g *runGroup) stop() error {
	var errs []error
	for i := len(g.steps) - 1; i >= 0; i-- {
		s := g.steps[i]
		t0 := time.Now()
		err := s.stop()
		ev := g.log.Info()
		if err != nil {
			ev = g.log.Error().Err(err)
			errs = append(errs, fmt.Errorf("stopping %s: %w", s.name, err))
		}
		ev.Str("part", s.name).Dur("took", time.Since(t0)).Msg("stopped")
	}
	g.steps = nil
	return errors.Join(errs...)
}
