package stream

import (
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"runtime"
	"sync"
	"sync/atomic"
	"syscall"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/config"
	"github.com/attain-dev/attain/fitjob"
	"github.com/attain-dev/attain/state"
)

// The refit loop of `attain run`: every RefitLoopOptions.Interval, or once
// RefitLoopOptions.Answers answers have been applied since the last refit,
// whichever comes first, it runs a gated refit (fitjob.GatedRefit) over
// the store's own history and puts an accepted set in force: published to
// the params topic (whose follower swaps it into every processor that
// follows it) and, when this processor does not follow the topic, swapped
// into its registry directly.
//
// A refit reads the store through fitjob.StoreSource, i.e. one Pebble
// snapshot (state.Store.ScanHistory), on the loop's own goroutine and the
// fit's workers: consumption goes on meanwhile and is never waited for.
// One refit at a time per store: an in-process flag, and an exclusive
// flock(2) on RefitLockName in the data directory, which also keeps a
// second process on the same directory from refitting at the same time.

// RefitLockName is the lock file a refit holds in the data directory.
const RefitLockName = "refit.lock"

// ErrRefitBusy is returned by RefitLoop.RefitNow when a refit of the same
// store is already running (in this process or, through the lock file, in
// another one).
var ErrRefitBusy = errors.New("attain: a refit of this store is already running")

// RefitLoopOptions configure a RefitLoop.
type RefitLoopOptions struct {
	// Interval between refits (0: no timed refit) and Answers applied since
	// the last refit that trigger one (0: none). Both 0: Run does nothing
	// until ctx ends.
	Interval time.Duration
	Answers  int
	// Gate, Folds and Seed are those of fitjob.GatedRefitOptions.
	Gate  fitjob.GateOptions
	Folds int
	Seed  int64
	// Workers fitting skills in parallel (0: half of GOMAXPROCS, at least
	// one, so that a refit leaves the consumer a core on a 2-core machine;
	// our choice).
	Workers int
	// Dir is the data directory: the lock file and the refit's scratch
	// space go there. Required.
	Dir string
	// Brokers and Topic: where accepted sets are published (PublishParams).
	// Brokers empty: not published.
	Brokers []string
	Topic   string
	// SwapDirect swaps an accepted set into the registry here, as well as
	// publishing it. Set it when no ParamsFollower feeds the registry
	// (params_from_topic false); with a follower, the follower swaps.
	SwapDirect bool
	// SwapWait bounds how long RefitNow waits, after publishing, for the
	// follower to swap the new version in (0: 10 s). Waiting keeps the
	// next refit from numbering its set with the same version.
	SwapWait time.Duration
	// CommitWait is how long Run waits between a trigger and the refit,
	// so that the answers staged when it fired are committed (a refit reads
	// committed state only; the processor commits at least every
	// batch.interval). 0: 250 ms. RefitLoopOptionsFrom sets twice
	// batch.interval.
	CommitWait time.Duration
	// Poll is how often Run looks at the applied-answer count (0: 100 ms;
	// our choice: a trigger is late by at most this).
	Poll   time.Duration
	Logger zerolog.Logger
}

// RefitLoopOptionsFrom returns the loop's options for `attain run` with
// cfg, publishing to brokers (the configured ones or the embedded
// broker's).
func RefitLoopOptionsFrom(cfg config.Config, brokers []string, log zerolog.Logger) RefitLoopOptions {
	return RefitLoopOptions{
		Interval: cfg.Refit.Interval, Answers: cfg.Refit.Answers,
		Gate:  fitjob.GateOptions{MinLearners: cfg.Refit.MinLearners, MinAnswers: cfg.Refit.MinAnswers, Margin: cfg.Refit.Margin},
		Folds: cfg.Refit.Folds, Dir: cfg.DataDir, CommitWait: 2 * cfg.Batch.Interval,
		Brokers: brokers, Topic: cfg.Topics.Params, SwapDirect: !cfg.ParamsFromTopic,
		Logger: log,
	}
}

// RefitStats count the loop's refits. Metrics should carry them later
// (attain_refits_total{outcome}); until then they are here.
type RefitStats struct {
	Started  int64 // refits begun (the lock taken)
	Accepted int64 // refits that put a new set in force
	Rejected int64 // refits whose every skill the gate rejected
	Failed   int64 // refits that ended in an error (ctx ending included)
	Busy     int64 // triggers refused because a refit was running
	// LastVersion is the version the last accepted refit put in force;
	// LastSeconds how long the last refit took.
	LastVersion int64
	LastSeconds float64
}

// RefitLoop runs refits of one store into one registry.
type RefitLoop struct {
	st  *state.Store
	reg *state.Registry
	m   *Metrics
	opt RefitLoopOptions
	log zerolog.Logger

	running atomic.Bool
	mu      sync.Mutex // guards stats
	stats   RefitStats

	// testHook, when set (by tests only, before a refit), is called with
	// "fitting" before the fit and "fitted" after it.
	testHook func(stage string)
}

// NewRefitLoop returns a loop refitting st's history against the set in
// force in reg; m gives the applied-answer count and gets the params
// gauges on a direct swap.
func NewRefitLoop(st *state.Store, reg *state.Registry, m *Metrics, opt RefitLoopOptions) (*RefitLoop, error) {
	var errs []error
	if st == nil || reg == nil || m == nil {
		errs = append(errs, errors.New("attain: refit loop: a store, a registry and metrics are required"))
	}
	if opt.Dir == "" {
		errs = append(errs, errors.New("attain: refit loop: no data directory; fix: set data_dir"))
	}
	if opt.Interval < 0 {
		errs = append(errs, fmt.Errorf("attain: refit loop: refit.interval = %v: must not be negative", opt.Interval))
	}
	if opt.Answers < 0 {
		errs = append(errs, fmt.Errorf("attain: refit loop: refit.answers = %d: must not be negative", opt.Answers))
	}
	if len(opt.Brokers) > 0 && opt.Topic == "" {
		errs = append(errs, errors.New("attain: refit loop: brokers given but no params topic; fix: set topics.params"))
	}
	if len(opt.Brokers) == 0 && !opt.SwapDirect {
		errs = append(errs, errors.New("attain: refit loop: an accepted set would go nowhere (no brokers to publish to, no direct swap)"))
	}
	if err := opt.Gate.Validate(); err != nil {
		errs = append(errs, err)
	}
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}
	if opt.Workers <= 0 {
		opt.Workers = max(1, runtime.GOMAXPROCS(0)/2)
	}
	if opt.SwapWait <= 0 {
		opt.SwapWait = 10 * time.Second
	}
	if opt.CommitWait <= 0 {
		opt.CommitWait = 250 * time.Millisecond
	}
	if opt.Poll <= 0 {
		opt.Poll = 100 * time.Millisecond
	}
	log := opt.Logger.With().Str("component", "refit").Logger()
	return &RefitLoop{st: st, reg: reg, m: m, opt: opt, log: log}, nil
}

// Stats returns a copy of the loop's counts.
func (l *RefitLoop) Stats() RefitStats {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.stats
}

func (l *RefitLoop) count(f func(*RefitStats)) {
	l.mu.Lock()
	f(&l.stats)
	l.mu.Unlock()
}

// Run refits on the schedule until ctx ends; then it returns nil, after
// the refit in progress (if any) has stopped: GatedRefit and PublishParams
// both end with ctx, and nothing is published once ctx has ended. A failed
// refit is logged and counted, never returned.
func (l *RefitLoop) Run(ctx context.Context) error {
	if l.opt.Interval == 0 && l.opt.Answers == 0 {
		<-ctx.Done()
		return nil
	}
	l.log.Info().Dur("interval", l.opt.Interval).Int("answers", l.opt.Answers).Msg("refit loop started")
	var timer <-chan time.Time
	var t *time.Timer
	if l.opt.Interval > 0 {
		t = time.NewTimer(l.opt.Interval)
		defer t.Stop()
		timer = t.C
	}
	poll := time.NewTicker(l.opt.Poll)
	defer poll.Stop()
	base := l.m.Applied.Load()
	for {
		why := ""
		select {
		case <-ctx.Done():
			return nil
		case <-timer:
			why = "interval"
		case <-poll.C:
			if l.opt.Answers > 0 && l.m.Applied.Load()-base >= int64(l.opt.Answers) {
				why = "answers"
			}
		}
		if why == "" {
			continue
		}
		base = l.m.Applied.Load()
		select {
		case <-ctx.Done():
			return nil
		case <-time.After(l.opt.CommitWait):
		}
		if _, err := l.refit(ctx, why); err != nil && ctx.Err() == nil {
			l.log.Error().Err(err).Str("trigger", why).Msg("refit failed; the set in force is unchanged, next refit at the next trigger")
		}
		// The next interval counts from the end of this refit.
		if t != nil {
			if !t.Stop() {
				select {
				case <-t.C:
				default:
				}
			}
			t.Reset(l.opt.Interval)
		}
	}
}

// RefitNow runs one refit now, outside the schedule, and returns its
// report (rep.File is the set put in force; nil when every skill was
// rejected). It returns ErrRefitBusy, at once, when a refit of the store
// is running.
func (l *RefitLoop) RefitNow(ctx context.Context) (*fitjob.GateReport, error) {
	return l.refit(ctx, "asked")
}

func (l *RefitLoop) refit(ctx context.Context, why string) (*fitjob.GateReport, error) {
	unlock, err := l.lock()
	if err != nil {
		if errors.Is(err, ErrRefitBusy) {
			l.count(func(s *RefitStats) { s.Busy++ })
			l.log.Warn().Str("trigger", why).Msg("refit skipped: another refit of this store is running")
		}
		return nil, err
	}
	defer unlock()
	l.count(func(s *RefitStats) { s.Started++ })
	t0 := time.Now()
	rep, err := l.refitLocked(ctx, why)
	secs := time.Since(t0).Seconds()
	l.count(func(s *RefitStats) {
		s.LastSeconds = secs
		switch {
		case err != nil:
			s.Failed++
		case rep.File == nil:
			s.Rejected++
		default:
			s.Accepted++
			s.LastVersion = rep.Version
		}
	})
	return rep, err
}

func (l *RefitLoop) refitLocked(ctx context.Context, why string) (*fitjob.GateReport, error) {
	cur := l.reg.Current()
	applied := l.m.Applied.Load()
	l.log.Info().Str("trigger", why).Int64("version_in_force", cur.Version).Int64("applied", applied).Msg("refit started")
	l.hook("fitting")
	rep, err := fitjob.GatedRefit(ctx, &fitjob.StoreSource{Store: l.st, Dir: l.opt.Dir}, fitjob.GatedRefitOptions{
		Gate: l.opt.Gate, Folds: l.opt.Folds, Seed: l.opt.Seed, Current: cur, Workers: l.opt.Workers,
		Sorter: fitjob.SorterOptions{Dir: l.opt.Dir, Logger: l.log},
		Logger: l.log,
	})
	if err != nil {
		return nil, fmt.Errorf("attain: refit: %w", err)
	}
	l.hook("fitted")
	sum := l.log.Info().Str("trigger", why).Int("accepted", rep.Accepted).Int("rejected", rep.Rejected).
		Int64("answers", rep.Data.Answers).Int64("learners", rep.Data.Learners).Float64("elapsed_s", rep.ElapsedSeconds)
	if rep.File == nil {
		sum.Int64("version_in_force", cur.Version).Msg("refit summary: no skill accepted, the set in force stays")
		return rep, nil
	}
	// Nothing goes out once ctx has ended: a cancelled refit leaves the
	// set in force, and the topic, as they were.
	if err := ctx.Err(); err != nil {
		return nil, fmt.Errorf("attain: refit: %w (nothing published)", err)
	}
	if len(l.opt.Brokers) > 0 {
		if _, err := PublishParams(ctx, ParamsPublishOptions{Brokers: l.opt.Brokers, Topic: l.opt.Topic, Logger: l.log}, rep.Version, rep.Publish); err != nil {
			return nil, fmt.Errorf("attain: refit: %w", err)
		}
		rep.Published, rep.Topic = true, l.opt.Topic
	}
	if l.opt.SwapDirect {
		if err := l.reg.Swap(rep.File); err != nil {
			return nil, fmt.Errorf("attain: refit: swapping version %d in: %w", rep.Version, err)
		}
		l.m.ParamsVersion.Store(rep.Version)
		l.m.ParamsSwaps.Add(1)
		l.log.Info().Int64("version", rep.Version).Int("skills", len(rep.File.Skills)).Str("from", "refit").Msg("parameter set swapped in")
	} else if err := l.waitSwap(ctx, rep.Version); err != nil {
		return rep, err
	}
	sum.Int64("version", rep.Version).Int64("previous_version", cur.Version).Bool("published", rep.Published).
		Msg("refit summary: new parameter set in force")
	return rep, nil
}

func (l *RefitLoop) hook(stage string) {
	if l.testHook != nil {
		l.testHook(stage)
	}
}

// waitSwap waits for the follower to put version v (or a later one) in
// force.
func (l *RefitLoop) waitSwap(ctx context.Context, v int64) error {
	deadline := time.Now().Add(l.opt.SwapWait)
	tick := time.NewTicker(10 * time.Millisecond)
	defer tick.Stop()
	for l.reg.Current().Version < v {
		if time.Now().After(deadline) {
			return fmt.Errorf("attain: refit: version %d published to %s but not swapped in within %v; fix: check that params_from_topic is on and the follower runs (its log)",
				v, l.opt.Topic, l.opt.SwapWait)
		}
		select {
		case <-ctx.Done():
			return fmt.Errorf("attain: refit: version %d published; stopped waiting for the swap: %w", v, ctx.Err())
		case <-tick.C:
		}
	}
	return nil
}

// lock takes the in-process flag and the lock file; unlock releases both.
func (l *RefitLoop) lock() (unlock func(), err error) {
	if !l.running.CompareAndSwap(false, true) {
		return nil, fmt.Errorf("%w (in this process)", ErrRefitBusy)
	}
	path := filepath.Join(l.opt.Dir, RefitLockName)
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o644)
	if err != nil {
		l.running.Store(false)
		return nil, fmt.Errorf("attain: refit: opening the lock file %s: %w; fix: make data_dir writable", path, err)
	}
	// flock(2) locks belong to the open file description: a second open of
	// the same file, in this process or another, is refused while this one
	// holds it, and the kernel releases it when the process dies.
	if err := syscall.Flock(int(f.Fd()), syscall.LOCK_EX|syscall.LOCK_NB); err != nil {
		f.Close()
		l.running.Store(false)
		if errors.Is(err, syscall.EWOULDBLOCK) {
			return nil, fmt.Errorf("%w (%s is held by another refit)", ErrRefitBusy, path)
		}
		return nil, fmt.Errorf("attain: refit: locking %s: %w", path, err)
	}
	return func() {
		syscall.Flock(int(f.Fd()), syscall.LOCK_UN)
		f.Close()
		l.running.Store(false)
	}, nil
}
