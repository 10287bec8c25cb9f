package main

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"maps"
	"os"
	"path/filepath"
	"slices"
	"sync"
	"sync/atomic"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/config"
	"github.com/attain-dev/attain/fitjob"
	"github.com/attain-dev/attain/state"
	"github.com/attain-dev/attain/stream"
)

func init() {
	commands["demo"] = command{
		summary: "run everything embedded (broker, processor, a simulated cohort) with a live view",
		run:     runDemo,
	}
}

// The demo's pace. None of these has a published source; they are chosen
// so that the default run, start and shutdown included, takes about a
// minute on a laptop: 300 learners × 6 skills × 30 opportunities is 54,000
// answers, 1,200 a second over 45 s, which one core processes with room
// to spare.
const (
	demoLearners = 300
	demoDuration = 45 * time.Second
	// demoRefresh redraws the terminal view four times a second;
	// demoPlainEvery spaces the progress lines written when stdout is not
	// a terminal.
	demoRefresh    = 250 * time.Millisecond
	demoPlainEvery = 3 * time.Second
	// demoProduceTick is how often the producer sends the answers that
	// have come due.
	demoProduceTick = 20 * time.Millisecond
	// demoMaxWrite bounds the messages of one write (a producer that fell
	// behind catches up in chunks).
	demoMaxWrite = 5000
	// demoSettleTimeout bounds the wait, after the last answer is
	// produced, for the processor to apply everything and publish its
	// outbox; demoInterruptSettle is the shorter wait after Ctrl-C.
	demoSettleTimeout   = 60 * time.Second
	demoInterruptSettle = 10 * time.Second
	// demoStartTimeout bounds the daemon's start (it creates topics with
	// a 30 s timeout of its own).
	demoStartTimeout = 45 * time.Second
)

// errDemoStalled reports a processor that did not catch up with the
// answers produced in time; errDemoOvercount reports a learner-skill
// record that counts more answers than were produced for it (an answer
// applied twice).
var (
	errDemoStalled   = errors.New("attain: demo: the processor did not catch up with the answers produced")
	errDemoOvercount = errors.New("attain: demo: an answer was applied more than once")
)

// demoOptions are the demo's flags.
type demoOptions struct {
	Learners int
	Seed     int64
	Speed    float64
	Duration time.Duration
	Keep     string
}

func runDemo(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("demo", "usage: attain demo [--learners N] [--seed S] [--speed X] [--duration D] [--keep DIR]",
		"Runs everything in one process: the embedded broker, the processor daemon with its HTTP API, and a simulated cohort of the Harbour Lane Evening College scenario answering practice items, with a live view of mastery per skill and a summary at the end. Ctrl-C ends early with the same summary.", stderr)
	var opt demoOptions
	fs.IntVar(&opt.Learners, "learners", demoLearners, "learners in the simulated cohort (each answers 30 items at each of the 6 skills)")
	fs.Int64Var(&opt.Seed, "seed", 1, "random seed: the same seed simulates the same cohort")
	fs.Float64Var(&opt.Speed, "speed", 1, "pace multiplier: 2 produces the cohort in half of --duration")
	fs.DurationVar(&opt.Duration, "duration", demoDuration, "time to produce the whole cohort in at --speed 1")
	fs.StringVar(&opt.Keep, "keep", "", "keep the store, the broker's data and the daemon's log in `DIR` (empty or absent); default: a temporary directory, removed at the end")
	if err := parseFlags(fs, args, stderr, false); err != nil {
		return err
	}
	switch {
	case fs.NArg() > 0:
		fmt.Fprintf(stderr, "attain demo: unexpected argument %q\n", fs.Arg(0))
		fs.Usage()
		return errUsage
	case opt.Learners < 1:
		return fmt.Errorf("--learners = %d: must be 1 or more", opt.Learners)
	case !(opt.Speed > 0) || opt.Speed > 1e6:
		return fmt.Errorf("--speed = %v: must be a number above 0 (1 = real pace, 2 = twice as fast), at most 1e6", opt.Speed)
	case opt.Duration <= 0:
		return fmt.Errorf("--duration = %v: must be above 0, e.g. 45s", opt.Duration)
	}
	return opt.run(ctx, stdout, stderr)
}

// run is the demo: start the daemon (which starts the embedded broker),
// follow its output topics, produce the cohort step by step, wait for
// everything to take effect, print the summary, and stop everything in
// the reverse order of starting it. ctx ending (Ctrl-C) stops producing
// early; the rest still happens.
func (opt demoOptions) run(ctx context.Context, stdout, stderr io.Writer) (err error) {
	began := time.Now()
	dir, removeDir, err := demoDataDir(opt.Keep)
	if err != nil {
		return err
	}
	defer func() {
		if err != nil && opt.Keep == "" {
			// Keep the evidence of a failed run.
			fmt.Fprintf(stderr, "attain demo: kept %s for inspection (the daemon's log is %s)\n", dir, filepath.Join(dir, "demo.log"))
			return
		}
		if rerr := removeDir(); err == nil {
			err = rerr
		}
	}()
	logFile, err := os.Create(filepath.Join(dir, "demo.log"))
	if err != nil {
		return fmt.Errorf("attain: demo: creating the daemon's log: %w", err)
	}
	defer logFile.Close()

	cfg := config.Default()
	cfg.DataDir = dir
	cfg.Brokers = nil                      // the daemon starts the embedded broker
	cfg.EmbeddedBrokerAddr = "127.0.0.1:0" // on a free loopback port
	cfg.HTTPAddr = "127.0.0.1:0"           // so does the HTTP API
	// The half-way refit publishes its set to the params topic; the
	// daemon's follower swaps it in, as every instance of a deployment
	// would.
	cfg.ParamsFromTopic = true
	if err := cfg.Validate(); err != nil {
		return err
	}
	log := cfg.Logger(logFile, false)

	sc := fitjob.HarbourLane()
	cohort := fitjob.Cohort{Learners: opt.Learners, Seed: opt.Seed, Skills: sc.Skills}
	gen, err := fitjob.NewGenerator(cohort)
	if err != nil {
		return err
	}
	r := newDemoRun(opt, cfg, sc, gen, log)

	// Start/stop pairs; stops run in reverse order on every way out, and
	// each runs once (the normal path calls them explicitly, in order).
	var stops []func()
	defer func() {
		for i := len(stops) - 1; i >= 0; i-- {
			stops[i]()
		}
	}()

	// 1. The daemon: broker, topics, store, HTTP API, publisher, consumer.
	dm := startDemoDaemon(cfg, log)
	stops = append(stops, func() { dm.stop() })
	select {
	case <-dm.d.Ready():
	case <-dm.done:
		return fmt.Errorf("attain: demo: the daemon failed to start: %w", dm.stop())
	case <-ctx.Done():
		fmt.Fprintln(stdout, "attain demo: interrupted while starting")
		return dm.stop()
	case <-time.After(demoStartTimeout):
		return fmt.Errorf("attain: demo: the daemon did not start within %v (its log: %s)", demoStartTimeout, logFile.Name())
	}
	r.daemon, r.daemonDone = dm.d, dm.done
	brokers := dm.d.Brokers()

	// 2. Tails of the mastery and dead-letter topics.
	tr := &kafka.Transport{}
	stops = append(stops, tr.CloseIdleConnections)
	r.client = &kafka.Client{Addr: kafka.TCP(brokers...), Transport: tr, Timeout: 10 * time.Second}
	for _, t := range []struct {
		topic  string
		handle func(kafka.Message)
	}{{cfg.Topics.Mastery, r.tally.masteryEvent}, {cfg.Topics.DeadLetter, r.tally.deadLetter}} {
		n, err := topicPartitions(context.Background(), r.client, t.topic)
		if err != nil {
			return err
		}
		tail := startDemoTail(brokers, t.topic, n, log, t.handle)
		r.tails = append(r.tails, tail)
		stops = append(stops, tail.stop)
	}

	// 3. The producer of the answers topic.
	bal, err := stream.Balancer(cfg.Producer.Balancer)
	if err != nil {
		return err
	}
	r.writer = &kafka.Writer{
		Addr:         kafka.TCP(brokers...),
		Topic:        cfg.Topics.Answers,
		Balancer:     bal, // the daemon's: one learner's answers in one partition
		RequiredAcks: kafka.RequireAll,
		// The demo hands over each tick's answers in one synchronous
		// write; a short linger sends them at once instead of after
		// kafka-go's default of a second.
		BatchTimeout: 5 * time.Millisecond,
		BatchSize:    1000,
		Transport:    tr,
	}
	closeWriter := sync.OnceFunc(func() { r.writer.Close() })
	stops = append(stops, closeWriter)

	// 4. The view.
	view := newDemoView(stdout, config.IsTerminal(stdout))
	view.header(r.headerLines(dm.d.HTTPAddr(), brokers, dir))
	stopView := r.startView(view)
	stops = append(stops, stopView)

	// 5. The script.
	for _, st := range r.script() {
		r.setStage(st.name)
		if err := st.run(ctx); err != nil {
			if ctx.Err() != nil {
				break
			}
			if r.daemonFailed() {
				return fmt.Errorf("attain: demo: the daemon stopped: %w (while %s: %v)", dm.stop(), st.name, err)
			}
			return err
		}
	}

	// 6. Wait for everything produced to take effect.
	settled, settleErr := r.settle(ctx)
	interrupted := ctx.Err() != nil && (r.sent < r.total || !settled)
	if r.daemonFailed() {
		return fmt.Errorf("attain: demo: the daemon stopped: %w", dm.stop())
	}
	if settleErr != nil && !errors.Is(settleErr, errDemoStalled) {
		return settleErr
	}
	switch {
	case settled && interrupted:
		r.setStage("interrupted: every answer produced so far is applied")
	case settled:
		r.setStage("done: every answer is applied")
	}

	// 7. Stop the view, the producer and the tails; summarise.
	stopView()
	closeWriter()
	for _, t := range r.tails {
		t.stop()
	}
	sum := r.summary(began, interrupted, settled)
	writeDemoSummary(stdout, sum)

	// 8. Shut the daemon down in order, then say where the data went.
	t0 := time.Now()
	if err := dm.stop(); err != nil {
		return fmt.Errorf("attain: demo: stopping the daemon: %w", err)
	}
	where := "removed"
	if opt.Keep != "" {
		where = "kept in " + dir
	}
	fmt.Fprintf(stdout, "daemon stopped in %v; data %s\n", time.Since(t0).Round(time.Millisecond), where)
	if !settled && !interrupted {
		return settleErr
	}
	return nil
}

// demoDataDir returns the demo's data directory and the function that
// removes it at the end (a no-op for --keep DIR). DIR must be empty or
// absent: a store and broker left by an earlier run would be resumed, and
// the counts would no longer be the cohort's.
func demoDataDir(keep string) (string, func() error, error) {
	if keep == "" {
		dir, err := os.MkdirTemp("", "attain-demo-")
		if err != nil {
			return "", nil, fmt.Errorf("attain: demo: creating a temporary data directory: %w", err)
		}
		return dir, func() error { return os.RemoveAll(dir) }, nil
	}
	ents, err := os.ReadDir(keep)
	switch {
	case errors.Is(err, os.ErrNotExist):
		if err := os.MkdirAll(keep, 0o755); err != nil {
			return "", nil, fmt.Errorf("--keep %s: %w", keep, err)
		}
	case err != nil:
		return "", nil, fmt.Errorf("--keep %s: %w", keep, err)
	case len(ents) > 0:
		return "", nil, fmt.Errorf("--keep %s: the directory is not empty; give an empty or new directory (an earlier run's data would be resumed and mixed into the counts)", keep)
	}
	return keep, func() error { return nil }, nil
}

// demoDaemon owns the daemon's goroutine.
type demoDaemon struct {
	d    *stream.Daemon
	done chan struct{} // closed when Run has returned
	stop func() error  // cancels Run's context and waits; returns Run's error
}

// startDemoDaemon runs the daemon under a context of its own, not the
// command's: after Ctrl-C the daemon goes on applying what was produced
// until the demo stops it.
func startDemoDaemon(cfg config.Config, log zerolog.Logger) *demoDaemon {
	ctx, cancel := context.WithCancel(context.Background())
	dm := &demoDaemon{d: stream.NewDaemon(cfg, log), done: make(chan struct{})}
	var runErr error
	go func() {
		defer close(dm.done)
		runErr = dm.d.Run(ctx)
	}()
	dm.stop = sync.OnceValue(func() error {
		cancel()
		<-dm.done
		return runErr
	})
	return dm
}

// demoStep is one step of the demo's script.
type demoStep struct {
	name string // shown in the view while the step runs
	run  func(ctx context.Context) error
}

// script is what the demo does once everything runs: the cohort is
// produced in two halves, so that a step can act on the half-way state.
// The producer's pacing clock stands still while such a step runs.
func (r *demoRun) script() []demoStep {
	half := r.total / 2
	return []demoStep{
		{"producing the first half of the cohort", func(ctx context.Context) error { return r.produce(ctx, half) }},
		// Steps acting on the half-way state go here.
		{"refitting the parameters on the first half's history", r.refit},
		{"producing the second half of the cohort", func(ctx context.Context) error { return r.produce(ctx, r.total) }},
	}
}

// demoRun is the state of one demo run.
type demoRun struct {
	opt     demoOptions
	cfg     config.Config
	sc      fitjob.Scenario
	gen     *fitjob.Generator
	log     zerolog.Logger
	total   int           // answers in the cohort
	prodDur time.Duration // time to produce them in: --duration / --speed

	daemon     *stream.Daemon
	daemonDone <-chan struct{} // closed when the daemon's Run has returned
	client     *kafka.Client
	writer     *kafka.Writer
	tails      []*demoTail
	tally      *demoTally

	// Producer state, owned by the goroutine running the script.
	sent      int           // cohort answers produced (acknowledged)
	prodSpent time.Duration // time spent in produce so far
	malformed []demoMalformed

	stage atomic.Pointer[string]
	// swap is the half-way refit's outcome (nil until it has run).
	swap atomic.Pointer[demoSwap]
}

func newDemoRun(opt demoOptions, cfg config.Config, sc fitjob.Scenario, gen *fitjob.Generator, log zerolog.Logger) *demoRun {
	skills := make([]string, len(sc.Skills))
	for i, s := range sc.Skills {
		skills[i] = s.Skill
	}
	total := gen.Total()
	r := &demoRun{
		opt: opt, cfg: cfg, sc: sc, gen: gen, log: log, total: total,
		prodDur: max(time.Millisecond, time.Duration(float64(opt.Duration)/opt.Speed)),
		tally:   newDemoTally(skills),
	}
	r.malformed = demoMalformedPlan(total, skills)
	r.setStage("starting")
	return r
}

func (r *demoRun) setStage(s string) { r.stage.Store(&s) }

// daemonFailed reports whether the daemon's Run has returned (it only does
// so on its own after a failure).
func (r *demoRun) daemonFailed() bool {
	select {
	case <-r.daemonDone:
		return true
	default:
		return false
	}
}

// demoMalformed is a bad input message injected into the answers topic
// before the cohort answer at index at, keyed by that answer's learner
// (so that it lands in a partition whose later answers prove it was
// committed).
type demoMalformed struct {
	at    int
	value func(learner string, t time.Time) []byte
}

// demoMalformedPlan spreads three malformed answers over the run, at a
// fifth, half and four fifths of the cohort: a JSON line cut short, an
// answer without its `correct` field, and one with an empty skill list.
func demoMalformedPlan(total int, skills []string) []demoMalformed {
	return []demoMalformed{
		{total / 5, func(l string, t time.Time) []byte {
			b, _ := json.Marshal(state.Answer{ID: "demo-malformed-1", Learner: l, Item: skills[1] + "-q007", Skills: skills[1:2], Correct: true, At: t})
			return b[:len(b)/2] // a truncated JSON line
		}},
		{total / 2, func(l string, t time.Time) []byte {
			b, _ := json.Marshal(map[string]any{"id": "demo-malformed-2", "learner": l, "item": skills[2] + "-q011", "skills": skills[2:3], "at": t})
			return b // no "correct"
		}},
		{total * 4 / 5, func(l string, t time.Time) []byte {
			b, _ := json.Marshal(map[string]any{"id": "demo-malformed-3", "learner": l, "skills": []string{}, "correct": false, "at": t})
			return b // an empty skill list
		}},
	}
}

// produce sends cohort answers until upto of them have been produced,
// paced so that the whole cohort takes prodDur of produce's time: every
// tick it sends the answers that have come due. It returns ctx's error
// when ctx ends first; answers already handed to the broker are always
// waited for, so the counts stay exact.
func (r *demoRun) produce(ctx context.Context, upto int) error {
	t0 := time.Now()
	defer func() { r.prodSpent += time.Since(t0) }()
	tick := time.NewTicker(demoProduceTick)
	defer tick.Stop()
	for r.sent < upto {
		if err := ctx.Err(); err != nil {
			return err
		}
		spent := r.prodSpent + time.Since(t0)
		due := min(upto, int(float64(r.total)*spent.Seconds()/r.prodDur.Seconds()), r.sent+demoMaxWrite)
		if due > r.sent {
			if err := r.send(ctx, due-r.sent); err != nil {
				return err
			}
		}
		if r.sent >= upto {
			break
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-r.daemonDone:
			return errors.New("attain: demo: the daemon stopped while answers were being produced")
		case <-tick.C:
		}
	}
	return nil
}

// send produces the next n cohort answers, with any malformed message
// planned among them, in one synchronous write.
func (r *demoRun) send(ctx context.Context, n int) error {
	msgs := make([]kafka.Message, 0, n+1)
	answers := make([]state.Answer, 0, n)
	bad := 0
	for i := range n {
		a, ok := r.gen.Next()
		if !ok {
			return fmt.Errorf("attain: demo: the cohort ended after %d answers, expected %d", r.sent+i, r.total)
		}
		for _, m := range r.malformed {
			if m.at == r.sent+i {
				msgs = append(msgs, kafka.Message{Key: []byte(a.Learner), Value: m.value(a.Learner, a.At)})
				bad++
			}
		}
		v, err := json.Marshal(a)
		if err != nil {
			return fmt.Errorf("attain: demo: encoding answer %s: %w", a.ID, err)
		}
		msgs = append(msgs, kafka.Message{Key: []byte(a.Learner), Value: v})
		answers = append(answers, a)
	}
	// The write is not cut short by ctx: a message whose fate is unknown
	// would make the final counts uncertain.
	wctx, cancel := context.WithTimeout(context.WithoutCancel(ctx), 30*time.Second)
	defer cancel()
	r.tally.sending(answers)
	if err := r.writer.WriteMessages(wctx, msgs...); err != nil {
		return fmt.Errorf("attain: demo: producing answers to %s: %w", r.cfg.Topics.Answers, err)
	}
	r.tally.produced(answers, bad)
	r.sent += n
	return nil
}

// settle waits until everything produced has taken effect: every input
// message staged (applied, duplicate or dead-lettered), every answer
// committed (each learner-skill record in the store counts exactly the
// answers produced for it), the outbox empty, and the tails have read the
// output topics to their ends. It waits demoSettleTimeout at most, or
// demoInterruptSettle once ctx has ended (Ctrl-C), and then returns false
// with errDemoStalled. It returns at once when the daemon has stopped.
func (r *demoRun) settle(ctx context.Context) (bool, error) {
	limit := demoSettleTimeout
	r.setStage("waiting for the processor to apply the last answers")
	deadline := time.Now().Add(limit)
	interrupted := false
	m, st := r.daemon.Metrics(), r.daemon.Store()
	want := r.tally.learnerCounts()
	confirmed := map[string]bool{}
	interrupt := ctx.Done()
	tick := time.NewTicker(100 * time.Millisecond)
	defer tick.Stop()
	for {
		if ctx.Err() != nil && !interrupted {
			interrupted = true
			r.setStage("interrupted: waiting for the answers already produced")
			if d := time.Now().Add(demoInterruptSettle); d.Before(deadline) {
				deadline, limit = d, demoInterruptSettle
			}
		}
		if r.daemonFailed() {
			return false, nil
		}
		produced := r.tally.producedMessages()
		staged := m.Applied.Load() + m.Duplicates.Load() + m.DeadLettered.Load()
		ok, err := r.settled(produced, staged, want, confirmed, st)
		if err != nil || ok {
			return ok, err
		}
		if time.Now().After(deadline) {
			return false, fmt.Errorf("%w within %v: produced %d, applied %d, duplicates %d, dead-lettered %d, learners confirmed %d of %d, outbox depth %d",
				errDemoStalled, limit, produced, m.Applied.Load(), m.Duplicates.Load(), m.DeadLettered.Load(), len(confirmed), len(want), st.OutboxDepth())
		}
		select {
		case <-tick.C:
		case <-interrupt:
			interrupt = nil // once: the loop top shortens the wait
		}
	}
}

func (r *demoRun) settled(produced, staged int64, want map[string][]int32, confirmed map[string]bool, st *state.Store) (bool, error) {
	if staged < produced {
		return false, nil
	}
	for learner, counts := range want {
		if confirmed[learner] {
			continue
		}
		recs, _, err := st.Learner(learner)
		if err != nil {
			return false, fmt.Errorf("attain: demo: reading learner %s: %w", learner, err)
		}
		done := true
		for s, c := range counts {
			got := recs[r.tally.skills[s]].Opportunities
			if int64(got) > int64(c) {
				return false, fmt.Errorf("%w: learner %s, skill %s: the store counts %d opportunities, %d answers were produced",
					errDemoOvercount, learner, r.tally.skills[s], got, c)
			}
			done = done && int64(got) == int64(c)
		}
		if !done {
			return false, nil
		}
		confirmed[learner] = true
	}
	if st.OutboxDepth() > 0 {
		return false, nil
	}
	// Everything is published; the tails must have read up to the ends of
	// the output topics as they are now.
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	for _, t := range r.tails {
		ends, err := topicEnds(ctx, r.client, t.topic, len(t.next))
		if err != nil {
			return false, err
		}
		if !t.caughtUp(ends) {
			return false, nil
		}
	}
	return true, nil
}

// startView redraws the view every demoRefresh until the returned stop is
// called; stop draws the final frame and waits for the goroutine.
func (r *demoRun) startView(v *demoView) (stop func()) {
	quit := make(chan struct{})
	done := make(chan struct{})
	go func() {
		defer close(done)
		tick := time.NewTicker(demoRefresh)
		defer tick.Stop()
		for {
			v.update(r.snapshot())
			select {
			case <-quit:
				v.finish(r.snapshot())
				return
			case <-tick.C:
			}
		}
	}()
	return sync.OnceFunc(func() {
		close(quit)
		<-done
	})
}

// headerLines are the view's fixed lines: what runs and where.
func (r *demoRun) headerLines(httpAddr string, brokers []string, dir string) []string {
	first := "hl-00001"
	lines := []string{
		"attain demo: " + r.sc.Name,
		fmt.Sprintf("%s learners × %d skills × 30 answers = %s answers (seed %d) + %d malformed",
			thousands(int64(r.opt.Learners)), len(r.sc.Skills), thousands(int64(r.total)), r.opt.Seed, len(r.malformed)),
		fmt.Sprintf("broker %s · data and log in %s", brokers[0], dir),
	}
	if httpAddr != "" {
		lines = append(lines, fmt.Sprintf("read API: curl http://%s/v1/learners/%s", httpAddr, first))
	}
	return lines
}

// snapshot gathers what the view shows.
func (r *demoRun) snapshot() demoSnapshot {
	s := r.tally.snapshot()
	s.Stage = *r.stage.Load()
	s.Total = int64(r.total + len(r.malformed))
	s.Malformed = len(r.malformed)
	if r.daemon != nil {
		m := r.daemon.Metrics()
		s.Applied, s.Duplicates, s.DeadLettered = m.Applied.Load(), m.Duplicates.Load(), m.DeadLettered.Load()
		s.OutboxDepth = r.daemon.Store().OutboxDepth()
		s.Rederived = m.Rederived.Load()
	}
	s.DeadLetterTopic = r.cfg.Topics.DeadLetter
	s.MasteryTopic = r.cfg.Topics.Mastery
	s.Threshold = r.cfg.Model.Threshold
	s.StuckAfter = r.cfg.Model.StuckAfter
	s.Swap = r.swap.Load()
	return s
}

// summary is the final snapshot with what only the end knows.
func (r *demoRun) summary(began time.Time, interrupted, settled bool) demoSummary {
	s := demoSummary{demoSnapshot: r.snapshot(), Interrupted: interrupted, Settled: settled}
	s.Elapsed = time.Since(began)
	s.Producing = r.prodSpent
	s.Learners = r.opt.Learners
	s.Truth = make([]state.Params, len(r.sc.Skills))
	for i, sk := range r.sc.Skills {
		s.Truth[i] = sk.Params
	}
	return s
}

// demoTally is what the demo knows of the cohort: what it produced (the
// producer) and what came back on the output topics (the tails). The
// producer, the tails' goroutines and the view all use it.
type demoTally struct {
	skills []string
	index  map[string]int

	mu struct {
		sync.Mutex
		messages   int64              // input messages acknowledged by the broker, malformed ones included
		malformed  int64              // of which malformed
		perLearner map[string][]int32 // answers produced per learner per skill
		started    []int              // learners who have answered each skill
		answers    []int64            // answers produced per skill

		ids           map[string]bool     // output event ids read back
		dupEvents     int64               // events read back whose id was seen before
		reached       []map[string]uint32 // per skill: learner → opportunities at the first reached event
		stuck         []map[string]bool   // per skill: learners with a stuck event
		stuckLearners map[string]bool     // learners stuck at some skill
		reachedEvents int64
		stuckEvents   int64
		otherEvents   int64 // unreadable, or of a type or skill the demo does not know
		deadLetters   []stream.DeadLetterBody

		// The parameter swap: answer ids produced before it, and events
		// by params_version on answers before and after it.
		swapped                     bool
		beforeSwap                  map[string]bool
		versionBefore, versionAfter map[int64]int64
		oddEvents                   []string
	}
}

func newDemoTally(skills []string) *demoTally {
	t := &demoTally{skills: skills, index: map[string]int{}}
	for i, s := range skills {
		t.index[s] = i
	}
	t.mu.perLearner = map[string][]int32{}
	t.mu.started = make([]int, len(skills))
	t.mu.answers = make([]int64, len(skills))
	t.mu.ids = map[string]bool{}
	t.mu.reached = make([]map[string]uint32, len(skills))
	t.mu.stuck = make([]map[string]bool, len(skills))
	for i := range skills {
		t.mu.reached[i] = map[string]uint32{}
		t.mu.stuck[i] = map[string]bool{}
	}
	t.mu.stuckLearners = map[string]bool{}
	t.mu.beforeSwap = map[string]bool{}
	t.mu.versionBefore, t.mu.versionAfter = map[int64]int64{}, map[int64]int64{}
	return t
}

// sending records the ids of answers about to be written before the
// swap: before the write, since the processor may apply an answer and its
// event be read back before the write call returns.
func (t *demoTally) sending(answers []state.Answer) {
	t.mu.Lock()
	defer t.mu.Unlock()
	if t.mu.swapped {
		return
	}
	for _, a := range answers {
		t.mu.beforeSwap[a.ID] = true
	}
}

// swapped marks the parameter swap: answers produced from now on come
// after it.
func (t *demoTally) swapped() {
	t.mu.Lock()
	defer t.mu.Unlock()
	t.mu.swapped = true
}

// produced records answers (and bad malformed messages) the broker has
// acknowledged.
func (t *demoTally) produced(answers []state.Answer, bad int) {
	t.mu.Lock()
	defer t.mu.Unlock()
	t.mu.messages += int64(len(answers) + bad)
	t.mu.malformed += int64(bad)
	for _, a := range answers {
		counts := t.mu.perLearner[a.Learner]
		if counts == nil {
			counts = make([]int32, len(t.skills))
			t.mu.perLearner[a.Learner] = counts
		}
		for _, sk := range a.Skills {
			i, ok := t.index[sk]
			if !ok {
				continue
			}
			if counts[i] == 0 {
				t.mu.started[i]++
			}
			counts[i]++
			t.mu.answers[i]++
		}
	}
}

func (t *demoTally) producedMessages() int64 {
	t.mu.Lock()
	defer t.mu.Unlock()
	return t.mu.messages
}

// learnerCounts returns a copy of the answers produced per learner per
// skill.
func (t *demoTally) learnerCounts() map[string][]int32 {
	t.mu.Lock()
	defer t.mu.Unlock()
	out := make(map[string][]int32, len(t.mu.perLearner))
	for l, c := range t.mu.perLearner {
		out[l] = slices.Clone(c)
	}
	return out
}

// masteryEvent counts one message of the mastery topic (a CloudEvent).
func (t *demoTally) masteryEvent(msg kafka.Message) {
	var ev stream.CloudEvent
	var data stream.MasteryData
	err := json.Unmarshal(msg.Value, &ev)
	if err == nil {
		err = json.Unmarshal(ev.Data, &data)
	}
	t.mu.Lock()
	defer t.mu.Unlock()
	i, known := t.index[data.Skill]
	if err != nil || !known {
		t.mu.otherEvents++
		return
	}
	if t.mu.ids[ev.ID] {
		t.mu.dupEvents++
		return
	}
	t.mu.ids[ev.ID] = true
	if t.mu.beforeSwap[data.AnswerID] {
		t.mu.versionBefore[data.ParamsVersion]++
	} else {
		t.mu.versionAfter[data.ParamsVersion]++
		if t.mu.swapped && data.ParamsVersion == 1 && len(t.mu.oddEvents) < 3 {
			t.mu.oddEvents = append(t.mu.oddEvents, fmt.Sprintf("%s %s/%s opp %d answer %s v%d", ev.Type, data.Learner, data.Skill, data.Opportunities, data.AnswerID, data.ParamsVersion))
		}
	}
	switch ev.Type {
	case state.KindReached.EventType():
		t.mu.reachedEvents++
		if o, ok := t.mu.reached[i][data.Learner]; !ok || data.Opportunities < o {
			t.mu.reached[i][data.Learner] = data.Opportunities
		}
	case state.KindStuck.EventType():
		t.mu.stuckEvents++
		t.mu.stuck[i][data.Learner] = true
		t.mu.stuckLearners[data.Learner] = true
	default:
		t.mu.otherEvents++
	}
}

// deadLetter keeps one message of the dead-letter topic.
func (t *demoTally) deadLetter(msg kafka.Message) {
	var body stream.DeadLetterBody
	if err := json.Unmarshal(msg.Value, &body); err != nil {
		body = stream.DeadLetterBody{Reason: "(the dead letter's body is not JSON: " + err.Error() + ")"}
	}
	t.mu.Lock()
	defer t.mu.Unlock()
	t.mu.deadLetters = append(t.mu.deadLetters, body)
}

func (t *demoTally) snapshot() demoSnapshot {
	t.mu.Lock()
	defer t.mu.Unlock()
	s := demoSnapshot{
		Produced:         t.mu.messages,
		Answers:          t.mu.messages - t.mu.malformed,
		ReachedEvents:    t.mu.reachedEvents,
		StuckEvents:      t.mu.stuckEvents,
		DuplicateEvents:  t.mu.dupEvents,
		OtherEvents:      t.mu.otherEvents,
		StuckLearners:    len(t.mu.stuckLearners),
		DeadLetterBodies: slices.Clone(t.mu.deadLetters),
		VersionBefore:    maps.Clone(t.mu.versionBefore),
		VersionAfter:     maps.Clone(t.mu.versionAfter),
		OddEvents:        slices.Clone(t.mu.oddEvents),
	}
	learners := map[string]bool{}
	for i, sk := range t.skills {
		row := demoSkillRow{Skill: sk, Learners: t.mu.started[i], Answers: t.mu.answers[i],
			Mastered: len(t.mu.reached[i]), Stuck: len(t.mu.stuck[i])}
		opps := make([]uint32, 0, len(t.mu.reached[i]))
		for l, o := range t.mu.reached[i] {
			opps = append(opps, o)
			learners[l] = true
		}
		row.MedianOpps, row.HasMedian = median(opps)
		s.Skills = append(s.Skills, row)
	}
	s.MasteredLearners = len(learners)
	s.ActiveLearners = len(t.mu.perLearner)
	return s
}

// median returns the median of xs (the mean of the middle two for an even
// count).
func median(xs []uint32) (float64, bool) {
	if len(xs) == 0 {
		return 0, false
	}
	slices.Sort(xs)
	n := len(xs)
	if n%2 == 1 {
		return float64(xs[n/2]), true
	}
	return (float64(xs[n/2-1]) + float64(xs[n/2])) / 2, true
}

// demoTail follows every partition of one output topic from its start,
// one group-less kafka.Reader per partition, handing each message to
// handle. stop ends it and waits for its goroutines.
type demoTail struct {
	topic string
	next  []atomic.Int64 // per partition: offset after the last message handled
	stop  func()
}

func startDemoTail(brokers []string, topic string, partitions int, log zerolog.Logger, handle func(kafka.Message)) *demoTail {
	ctx, cancel := context.WithCancel(context.Background())
	t := &demoTail{topic: topic, next: make([]atomic.Int64, partitions)}
	var wg sync.WaitGroup
	for p := range partitions {
		r := kafka.NewReader(kafka.ReaderConfig{
			Brokers: brokers, Topic: topic, Partition: p,
			MinBytes: 1, MaxBytes: 8 << 20, MaxWait: 250 * time.Millisecond,
			ErrorLogger: kafka.LoggerFunc(func(f string, a ...any) {
				log.Warn().Str("component", "demo").Str("topic", topic).Int("partition", p).Msgf(f, a...)
			}),
		})
		wg.Go(func() {
			defer r.Close()
			for {
				msg, err := r.ReadMessage(ctx)
				if err != nil {
					if ctx.Err() != nil {
						return
					}
					log.Warn().Err(err).Str("component", "demo").Str("topic", topic).Int("partition", p).Msg("reading an output topic failed; retrying")
					select {
					case <-ctx.Done():
						return
					case <-time.After(250 * time.Millisecond):
					}
					continue
				}
				handle(msg)
				t.next[p].Store(msg.Offset + 1)
			}
		})
	}
	t.stop = sync.OnceFunc(func() {
		cancel()
		wg.Wait()
	})
	return t
}

// caughtUp reports whether every partition has been read up to ends.
func (t *demoTail) caughtUp(ends []int64) bool {
	for p, e := range ends {
		if t.next[p].Load() < e {
			return false
		}
	}
	return true
}

// topicPartitions returns the number of partitions of topic.
func topicPartitions(ctx context.Context, cl *kafka.Client, topic string) (int, error) {
	ctx, cancel := context.WithTimeout(ctx, 10*time.Second)
	defer cancel()
	meta, err := cl.Metadata(ctx, &kafka.MetadataRequest{Topics: []string{topic}})
	if err != nil {
		return 0, fmt.Errorf("attain: demo: reading the metadata of %s: %w", topic, err)
	}
	for _, t := range meta.Topics {
		if t.Name == topic {
			if t.Error != nil {
				return 0, fmt.Errorf("attain: demo: topic %s: %w", topic, t.Error)
			}
			return len(t.Partitions), nil
		}
	}
	return 0, fmt.Errorf("attain: demo: topic %s is missing", topic)
}

// topicEnds returns the end offset (high watermark) of each partition.
func topicEnds(ctx context.Context, cl *kafka.Client, topic string, partitions int) ([]int64, error) {
	req := make([]kafka.OffsetRequest, partitions)
	for p := range partitions {
		req[p] = kafka.LastOffsetOf(p)
	}
	res, err := cl.ListOffsets(ctx, &kafka.ListOffsetsRequest{Topics: map[string][]kafka.OffsetRequest{topic: req}})
	if err != nil {
		return nil, fmt.Errorf("attain: demo: listing the offsets of %s: %w", topic, err)
	}
	ends := make([]int64, partitions)
	for _, po := range res.Topics[topic] {
		if po.Error != nil {
			return nil, fmt.Errorf("attain: demo: listing the offsets of %s/%d: %w", topic, po.Partition, po.Error)
		}
		if po.Partition >= 0 && po.Partition < partitions {
			ends[po.Partition] = po.LastOffset
		}
	}
	return ends, nil
}

// The demo's gate: config's refit defaults (5 folds, margin 0) with
// smaller data minimums — those of config's test fixture, 20 learners and
// 200 answers — so that a cohort of a few dozen learners is refitted at
// half-way too (our choice; a deployment keeps the defaults).
const (
	demoGateMinLearners = 20
	demoGateMinAnswers  = 200
	// demoSwapTimeout bounds the wait for the daemon's params follower to
	// swap a published set in (it swaps once the topic has been quiet for
	// 250 ms).
	demoSwapTimeout = 15 * time.Second
)

// demoSwap is the outcome of the half-way refit.
type demoSwap struct {
	From, To int64 // versions; To == From when no skill was accepted
	// AtAnswer is the number of answers applied when the new set came in
	// force (production is paused meanwhile, so every answer before it was
	// computed under From and every one after it under To).
	AtAnswer           int64
	Answers, Learners  int64 // the history the refit read
	Accepted, Rejected int
	Seconds            float64 // the refit (read, fit, gate)
	Skills             []demoSwapSkill
	Err                string // the refit failed: why (the run goes on under From)
}

// demoSwapSkill is one skill's row: the parameters before and after, the
// simulation's truth, and the gate's verdict.
type demoSwapSkill struct {
	Skill         string
	Before, After state.Params
	Truth         state.Params
	Accepted      bool
	Reason        string // the gate's reason (shown for rejected skills)
}

// refit is the half-way step: once the processor has applied and committed
// every answer produced so far, a gated refit reads the daemon's store
// (fitjob.StoreSource on the open store: a Pebble snapshot, consumption is
// not held up), the accepted skills are published to the params topic,
// and the daemon's params follower swaps the new version in. A refit that
// fails, or accepts nothing, is shown and the run goes on under version 1.
func (r *demoRun) refit(ctx context.Context) error {
	m, st := r.daemon.Metrics(), r.daemon.Store()
	// Everything produced so far staged, then one commit round (the
	// processor commits every batch.interval), so that the store's
	// snapshot holds the whole first half.
	for {
		if m.Applied.Load()+m.Duplicates.Load()+m.DeadLettered.Load() >= r.tally.producedMessages() {
			break
		}
		if r.daemonFailed() {
			return errors.New("attain: demo: the daemon stopped before the refit")
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(20 * time.Millisecond):
		}
	}
	select {
	case <-ctx.Done():
		return ctx.Err()
	case <-time.After(3 * r.cfg.Batch.Interval):
	}

	brokers := r.daemon.Brokers()
	cur, err := stream.ReadParams(ctx, brokers, r.cfg.Topics.Params, nil, r.log)
	if err != nil {
		return fmt.Errorf("attain: demo: reading the parameter set in force: %w", err)
	}
	sw := &demoSwap{From: cur.Version, To: cur.Version}
	defer func() { r.swap.Store(sw) }()
	rep, err := fitjob.GatedRefit(ctx, &fitjob.StoreSource{Store: st, Dir: r.cfg.DataDir}, fitjob.GatedRefitOptions{
		Gate:    fitjob.GateOptions{MinLearners: demoGateMinLearners, MinAnswers: demoGateMinAnswers, Margin: r.cfg.Refit.Margin},
		Folds:   r.cfg.Refit.Folds,
		Seed:    r.opt.Seed,
		Current: cur,
		Sorter:  fitjob.SorterOptions{Dir: r.cfg.DataDir, Logger: r.log},
		Logger:  r.log,
	})
	if err != nil {
		if ctx.Err() != nil {
			return ctx.Err()
		}
		sw.Err = err.Error()
		r.log.Error().Err(err).Msg("demo: the half-way refit failed; the run goes on under the set in force")
		return nil
	}
	sw.Answers, sw.Learners = rep.Data.Answers, rep.Data.Learners
	sw.Accepted, sw.Rejected, sw.Seconds = rep.Accepted, rep.Rejected, rep.ElapsedSeconds
	for _, sk := range r.sc.Skills {
		row := demoSwapSkill{Skill: sk.Skill, Truth: sk.Params}
		row.Before, _ = cur.For(sk.Skill)
		row.After = row.Before
		if v, ok := rep.Skill(sk.Skill); ok {
			row.Reason = v.Reason
			row.Accepted = v.Verdict.Accepted()
			if !row.Accepted {
				row.Reason = v.Verdict.String() + ": " + v.Reason
			}
		} else {
			row.Reason = "no answers in the history"
		}
		if p, ok := rep.Publish[sk.Skill]; ok {
			row.After = p.Params
		}
		sw.Skills = append(sw.Skills, row)
	}
	if rep.File == nil {
		return nil
	}
	if _, err := stream.PublishParams(ctx, stream.ParamsPublishOptions{Brokers: brokers, Topic: r.cfg.Topics.Params, Logger: r.log}, rep.Version, rep.Publish); err != nil {
		if ctx.Err() != nil {
			return ctx.Err()
		}
		sw.Err = err.Error()
		return nil
	}
	deadline := time.Now().Add(demoSwapTimeout)
	for m.ParamsVersion.Load() < rep.Version {
		if time.Now().After(deadline) {
			return fmt.Errorf("attain: demo: version %d was published to %s but the daemon did not swap it in within %v", rep.Version, r.cfg.Topics.Params, demoSwapTimeout)
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(10 * time.Millisecond):
		}
	}
	sw.To, sw.AtAnswer = rep.Version, m.Applied.Load()
	r.tally.swapped()
	return nil
}
