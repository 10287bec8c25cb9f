package stream

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"maps"
	"sync"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/state"
)

// The params topic is compacted; each message is one skill's parameters:
// key = the skill, value = a state.SkillParams JSON object whose "version"
// is the version of the set that last changed it (version ≥ 1). An empty
// value (tombstone) removes the skill's entry, so it falls back to the
// default. The set in force is the base set (the --params file, or the
// built-in defaults) with every skill's latest message laid over it; its
// version is the largest version seen. A publisher writes all skills of
// one new version together; the follower swaps the set in once the topic
// has been quiet for ParamsFollowerOptions.Quiet, so one refit is one
// swap.

// ParamsFollowerOptions configure a ParamsFollower.
type ParamsFollowerOptions struct {
	Brokers []string
	Topic   string
	// Base is the set the topic's skills are laid over (nil: defaults).
	Base *state.ParamFile
	// Quiet is how long the topic must have no new message before a new
	// version is swapped in. Default 250 ms.
	Quiet  time.Duration
	Logger zerolog.Logger
}

// ParamsFollower reads the params topic into a Registry: to its end when
// started, then following it.
type ParamsFollower struct {
	reg *state.Registry
	m   *Metrics
	opt ParamsFollowerOptions
	log zerolog.Logger

	skills map[string]state.SkillParams // owned by run's goroutine (and Start before it)

	cancel context.CancelFunc
	wg     sync.WaitGroup
	err    error // of run, read after wg.Wait
}

// NewParamsFollower returns a follower that swaps sets into reg.
func NewParamsFollower(reg *state.Registry, m *Metrics, opt ParamsFollowerOptions) *ParamsFollower {
	if opt.Base == nil {
		opt.Base = state.NewParamFile()
	}
	if opt.Quiet <= 0 {
		opt.Quiet = 250 * time.Millisecond
	}
	log := opt.Logger.With().Str("component", "params").Str("topic", opt.Topic).Logger()
	return &ParamsFollower{reg: reg, m: m, opt: opt, log: log, skills: map[string]state.SkillParams{}}
}

type paramsMsg struct {
	msg kafka.Message
	err error
}

// Start reads the params topic to the end it had when Start was called,
// swaps the resulting set in (when newer than the one in force), and keeps
// following the topic in a goroutine until Stop. It returns when the topic
// has been read to that end, or with the error that prevented it.
func (f *ParamsFollower) Start(ctx context.Context) error {
	tr := &kafka.Transport{}
	cl := &kafka.Client{Addr: kafka.TCP(f.opt.Brokers...), Transport: tr, Timeout: 10 * time.Second}
	defer tr.CloseIdleConnections()
	parts, err := topicPartitions(ctx, cl, f.opt.Topic)
	if err != nil {
		return fmt.Errorf("attain: params topic: %w", err)
	}
	ends := map[int]int64{}
	starts := map[int]int64{}
	for _, p := range parts {
		first, last, err := partitionBounds(ctx, cl, f.opt.Topic, p)
		if err != nil {
			return fmt.Errorf("attain: params topic: %w", err)
		}
		starts[p] = first
		if last > first {
			ends[p] = last
		}
	}

	rctx, cancel := context.WithCancel(context.Background())
	msgs := make(chan paramsMsg)
	readers := make([]*kafka.Reader, 0, len(parts))
	var rwg sync.WaitGroup
	for _, p := range parts {
		r := kafka.NewReader(kafka.ReaderConfig{
			Brokers: f.opt.Brokers, Topic: f.opt.Topic, Partition: p,
			MinBytes: 1, MaxBytes: 4 << 20, MaxWait: 500 * time.Millisecond,
			ErrorLogger: kafka.LoggerFunc(func(s string, a ...any) { f.log.Debug().Msgf(s, a...) }),
		})
		if err := r.SetOffset(starts[p]); err != nil {
			cancel()
			return fmt.Errorf("attain: params topic: seeking partition %d: %w", p, err)
		}
		readers = append(readers, r)
		rwg.Add(1)
		go func() {
			defer rwg.Done()
			for {
				m, err := r.FetchMessage(rctx)
				if rctx.Err() != nil {
					return
				}
				select {
				case msgs <- paramsMsg{m, err}:
				case <-rctx.Done():
					return
				}
				if err != nil {
					return
				}
			}
		}()
	}
	stopReaders := func() {
		cancel()
		rwg.Wait()
		for _, r := range readers {
			r.Close()
		}
	}

	// Read to the end the topic had at start.
	for len(ends) > 0 {
		select {
		case <-ctx.Done():
			stopReaders()
			return ctx.Err()
		case pm := <-msgs:
			if pm.err != nil {
				stopReaders()
				return fmt.Errorf("attain: reading params topic %s: %w", f.opt.Topic, pm.err)
			}
			f.take(pm.msg)
			if end, ok := ends[pm.msg.Partition]; ok && pm.msg.Offset+1 >= end {
				delete(ends, pm.msg.Partition)
			}
		}
	}
	f.swap("start")

	fctx, fcancel := context.WithCancel(context.Background())
	f.cancel = func() { fcancel() }
	f.wg.Add(1)
	go func() {
		defer f.wg.Done()
		defer stopReaders()
		f.err = f.follow(fctx, msgs)
		if f.err != nil {
			f.log.Error().Err(f.err).Msg("stopped following the params topic; parameter sets published from now on are not picked up until restart")
		}
	}()
	return nil
}

// follow applies new messages and swaps a new version in once the topic
// has been quiet for opt.Quiet.
func (f *ParamsFollower) follow(ctx context.Context, msgs <-chan paramsMsg) error {
	quiet := time.NewTimer(time.Hour)
	quiet.Stop()
	defer quiet.Stop()
	for {
		select {
		case <-ctx.Done():
			return nil
		case pm := <-msgs:
			if pm.err != nil {
				return fmt.Errorf("attain: following params topic %s: %w", f.opt.Topic, pm.err)
			}
			f.take(pm.msg)
			quiet.Reset(f.opt.Quiet)
		case <-quiet.C:
			f.swap("topic")
		}
	}
}

// take lays one message over the skills read so far.
func (f *ParamsFollower) take(m kafka.Message) {
	skill := string(m.Key)
	if skill == "" {
		f.log.Warn().Int("partition", m.Partition).Int64("offset", m.Offset).Msg("params message without a key (the skill) ignored")
		return
	}
	if len(m.Value) == 0 {
		delete(f.skills, skill)
		return
	}
	var sp state.SkillParams
	if err := json.Unmarshal(m.Value, &sp); err != nil {
		f.log.Error().Err(err).Str("skill", skill).Int64("offset", m.Offset).Msg("params message is not a skill's parameters; ignored")
		return
	}
	if err := sp.Params.Validate(skill); err != nil {
		f.log.Error().Err(err).Str("skill", skill).Int64("offset", m.Offset).Msg("params message rejected; the skill keeps its previous parameters")
		return
	}
	if sp.Version < 1 {
		f.log.Error().Str("skill", skill).Int64("offset", m.Offset).Msg(`params message has no "version" (must be 1 or more); ignored`)
		return
	}
	f.skills[skill] = sp
}

// compose returns the base set with the topic's skills laid over it.
func (f *ParamsFollower) compose() *state.ParamFile {
	base := f.opt.Base
	pf := &state.ParamFile{Version: base.Version, Created: base.Created, Default: base.Default, Skills: maps.Clone(base.Skills)}
	if pf.Skills == nil {
		pf.Skills = map[string]state.SkillParams{}
	}
	for skill, sp := range f.skills {
		pf.Skills[skill] = sp
		if sp.Version > pf.Version {
			pf.Version = sp.Version
		}
	}
	// A skill of the base file with no version of its own belongs to the
	// base file's version, not to the composed one.
	for skill, sp := range pf.Skills {
		if sp.Version == 0 {
			sp.Version = base.Version
			pf.Skills[skill] = sp
		}
	}
	return pf
}

func (f *ParamsFollower) swap(why string) {
	pf := f.compose()
	cur := f.reg.Current()
	if pf.Version <= cur.Version {
		if len(f.skills) > 0 && pf.Version == cur.Version && why == "topic" {
			f.log.Warn().Int64("version", pf.Version).Msg("params topic changed without a new version; the change waits for the next version")
		}
		return
	}
	if err := f.reg.Swap(pf); err != nil {
		f.log.Error().Err(err).Int64("version", pf.Version).Msg("parameter set from the params topic refused")
		return
	}
	f.m.ParamsVersion.Store(pf.Version)
	f.m.ParamsSwaps.Add(1)
	f.log.Info().Int64("version", pf.Version).Int("skills", len(pf.Skills)).Str("from", why).Msg("parameter set swapped in")
}

// Stop ends following and waits for the follower's goroutines. It returns
// the error that ended following early, if any.
func (f *ParamsFollower) Stop() error {
	if f.cancel == nil {
		return nil
	}
	f.cancel()
	f.wg.Wait()
	if errors.Is(f.err, context.Canceled) {
		return nil
	}
	return f.err
}
