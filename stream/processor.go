package stream

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"sync"
	"sync/atomic"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/state"
)

// ProcessorOptions configure the consumer of the answers topic.
type ProcessorOptions struct {
	Brokers []string
	Group   string
	Topic   string
	// Start is where a partition with no stored offset begins: "earliest"
	// (default) or "latest".
	Start string
	// MaxEventBytes rejects larger input values (0: no limit).
	MaxEventBytes int
	// BatchInterval and BatchMaxAnswers bound a micro-batch: it is committed
	// once BatchInterval has passed since its first message or once it
	// holds BatchMaxAnswers messages, whichever comes first, and as soon
	// as the partition has read to the end of its log. Defaults
	// 100 ms and 10000 (ARCHITECTURE.md, Durability): under load the
	// interval decides, and the count only caps a batch's memory when one
	// partition receives more than 100,000 answers/s. (2000 made a busy
	// partition commit every 40 ms or so; BenchmarkThroughput went from
	// ratio 0.25-0.42 to 0.35-0.53 with 10000, three runs side by side.)
	BatchInterval   time.Duration
	BatchMaxAnswers int
	// Decoder decodes input values. Default &state.NativeDecoder{}.
	Decoder Decoder
	// SessionTimeout, HeartbeatInterval and RebalanceTimeout are the
	// consumer-group timings (consumer.session_timeout and
	// consumer.heartbeat_interval). Defaults 10 s, a third of the session
	// timeout, and 30 s: the Java client's session.timeout.ms default
	// before Kafka 3.0, heartbeats no further apart than a third of it
	// (common practice), and kafka-go's rebalance timeout. The heartbeat
	// interval must be less than the session timeout.
	SessionTimeout, HeartbeatInterval, RebalanceTimeout time.Duration
	// DrainTimeout bounds the last outbox drain of a partition on shutdown.
	// Default 5 s.
	DrainTimeout time.Duration
	// GroupCommitInterval spaces the Kafka group-offset commits of a
	// partition (they serve lag monitoring only). Default 1 s.
	GroupCommitInterval time.Duration
	Logger              zerolog.Logger
}

// Processor consumes the answers topic as a member of a consumer group:
// one goroutine per assigned partition, each resuming from the offset the
// store holds for that partition, applying answers in micro-batches, and
// publishing each committed batch's outbox.
type Processor struct {
	st  *state.Store
	reg *state.Registry
	pub *Publisher
	m   *Metrics
	opt ProcessorOptions
	log zerolog.Logger
	tr  *kafka.Transport
	cl  *kafka.Client

	skipped atomic.Int64
}

// NewProcessor returns a processor; Run runs it.
func NewProcessor(st *state.Store, reg *state.Registry, pub *Publisher, m *Metrics, opt ProcessorOptions) (*Processor, error) {
	switch opt.Start {
	case "":
		opt.Start = "earliest"
	case "earliest", "latest":
	default:
		return nil, fmt.Errorf("%w: consumer.start = %q: must be earliest or latest", ErrConfig, opt.Start)
	}
	if len(opt.Brokers) == 0 || opt.Group == "" || opt.Topic == "" {
		return nil, fmt.Errorf("%w: brokers, consumer group and answers topic are required", ErrConfig)
	}
	if opt.BatchInterval <= 0 {
		opt.BatchInterval = 100 * time.Millisecond
	}
	if opt.BatchMaxAnswers <= 0 {
		opt.BatchMaxAnswers = 10000
	}
	if opt.Decoder == nil {
		opt.Decoder = &state.NativeDecoder{}
	}
	if opt.SessionTimeout <= 0 {
		opt.SessionTimeout = 10 * time.Second
	}
	if opt.HeartbeatInterval <= 0 {
		opt.HeartbeatInterval = opt.SessionTimeout / 3
	}
	if opt.HeartbeatInterval >= opt.SessionTimeout {
		return nil, fmt.Errorf("%w: consumer.heartbeat_interval = %v must be less than consumer.session_timeout = %v", ErrConfig, opt.HeartbeatInterval, opt.SessionTimeout)
	}
	if opt.RebalanceTimeout <= 0 {
		opt.RebalanceTimeout = 30 * time.Second
	}
	if opt.DrainTimeout <= 0 {
		opt.DrainTimeout = 5 * time.Second
	}
	if opt.GroupCommitInterval <= 0 {
		opt.GroupCommitInterval = time.Second
	}
	tr := &kafka.Transport{}
	return &Processor{
		st: st, reg: reg, pub: pub, m: m, opt: opt,
		log: opt.Logger.With().Str("component", "consumer").Str("group", opt.Group).Str("topic", opt.Topic).Logger(),
		tr:  tr,
		cl:  &kafka.Client{Addr: kafka.TCP(opt.Brokers...), Transport: tr, Timeout: 10 * time.Second},
	}, nil
}

// Skipped counts input offsets that were never read because they had been
// deleted from the log (retention) before this instance consumed them.
func (pr *Processor) Skipped() int64 { return pr.skipped.Load() }

// Run joins the consumer group and processes until ctx ends or a partition
// fails in a way that retrying cannot fix (the store failing). On the way
// out every partition commits its batch in hand (synced), drains its
// outbox once more within DrainTimeout, and the member leaves the group.
// Run returns nil after a shutdown asked for by ctx.
func (pr *Processor) Run(ctx context.Context) error {
	defer pr.tr.CloseIdleConnections()
	cg, err := kafka.NewConsumerGroup(kafka.ConsumerGroupConfig{
		ID:                    pr.opt.Group,
		Brokers:               pr.opt.Brokers,
		Topics:                []string{pr.opt.Topic},
		GroupBalancers:        []kafka.GroupBalancer{kafka.RangeGroupBalancer{}, kafka.RoundRobinGroupBalancer{}},
		SessionTimeout:        pr.opt.SessionTimeout,
		HeartbeatInterval:     pr.opt.HeartbeatInterval,
		RebalanceTimeout:      pr.opt.RebalanceTimeout,
		JoinGroupBackoff:      time.Second,
		WatchPartitionChanges: true,
		Logger:                kafka.LoggerFunc(func(f string, a ...any) { pr.log.Debug().Msgf(f, a...) }),
		ErrorLogger:           kafka.LoggerFunc(func(f string, a ...any) { pr.log.Warn().Msgf(f, a...) }),
	})
	if err != nil {
		return fmt.Errorf("%w: consumer group: %v", ErrConfig, err)
	}

	run, fail := context.WithCancelCause(ctx)
	defer fail(nil)
	var current *sync.WaitGroup // partitions of the current generation still doing work
	for {
		gen, err := cg.Next(run)
		if run.Err() != nil {
			break
		}
		if err != nil {
			if errors.Is(err, kafka.ErrGroupClosed) {
				break
			}
			pr.log.Warn().Err(err).Msg("joining the consumer group failed; retrying")
			continue
		}
		var ids []int32
		for _, a := range gen.Assignments[pr.opt.Topic] {
			ids = append(ids, int32(a.ID))
		}
		slices.Sort(ids)
		pr.m.SetAssigned(ids)
		pr.log.Info().Int32("generation", gen.ID).Str("member", gen.MemberID).Ints32("partitions", ids).Msg("assigned partitions")
		wg := &sync.WaitGroup{}
		current = wg
		for _, p := range ids {
			wg.Add(1)
			gen.Start(func(fence context.Context) {
				done := sync.OnceFunc(wg.Done)
				defer done()
				if err := pr.partition(run, fence, gen, p); err != nil {
					pr.log.Error().Err(err).Int32("partition", p).Msg("partition failed; stopping")
					fail(err)
				}
				if run.Err() != nil {
					// Shutting down: the work is done, but the generation
					// must outlive the other partitions' last drains (the
					// first function to return would end it), so wait for
					// the group to be closed.
					done()
					<-fence.Done()
				}
			})
		}
	}
	if current != nil {
		current.Wait()
	}
	cg.Close() // ends the generation, leaves the group
	if err := context.Cause(run); err != nil && !errors.Is(err, context.Canceled) {
		return err
	}
	return nil
}

// partition processes one assigned partition until shutdown (run ends) or
// revocation (fence ends). A returned error is fatal for the processor.
func (pr *Processor) partition(run, fence context.Context, gen *kafka.Generation, p int32) error {
	if run.Err() != nil || fence.Err() != nil {
		return nil
	}
	log := pr.log.With().Int32("partition", p).Int32("generation", gen.ID).Logger()
	pt, err := pr.st.Partition(p)
	if err != nil {
		return fmt.Errorf("attain: opening partition %d of the store: %w", p, err)
	}
	defer pt.Release()

	stop, cancel := context.WithCancel(run)
	defer cancel()
	defer context.AfterFunc(fence, cancel)()

	r := &partitionRun{pr: pr, p: p, pt: pt, gen: gen, fence: fence, stop: stop, log: log}

	// Outputs committed by an earlier owner (or before a crash) go out
	// before anything new is consumed.
	r.pump = newOutboxPump(r)
	r.pump.dirty = true
	r.pump.drain(stop)

	next, err := r.resume(stop)
	if err != nil {
		if stop.Err() != nil {
			return nil
		}
		// Not fatal: ending this partition ends the generation, and the
		// group is joined again after a backoff.
		log.Warn().Err(err).Msg("cannot resume the partition; rejoining the group")
		return nil
	}
	r.next = next
	pr.m.SetLag(p, max(0, r.logEnd-next))
	// Large enough for any message the broker accepts (Kafka's default
	// message.max.bytes is 1 MiB), so that an oversized event is read and
	// dead-lettered instead of blocking the partition.
	r.fetch = newFetcher(pr.opt.Brokers, pr.opt.Topic, int(p), 8<<20, 500*time.Millisecond, log)
	fetchCtx, stopFetch := context.WithCancel(stop)
	go r.fetch.run(fetchCtx, next)
	defer func() { stopFetch(); <-r.fetch.done }()
	pr.m.SetResumed(p)
	log.Info().Int64("offset", next).Msg("consuming")

	// The outbox is published by the pump goroutine, beside consumption:
	// a batch's outputs are sent while the next batch is read and applied.
	pumpCtx, stopPump := context.WithCancel(stop)
	go r.pump.run(pumpCtx)
	err = r.loop(stop)
	stopPump()
	<-r.pump.done
	if err == nil {
		err = r.finish()
	}
	if errors.Is(err, state.ErrPartitionReleased) {
		// Another handle took the partition: this one is fenced and its
		// staging is gone; the next generation resumes from the store.
		log.Warn().Err(err).Msg("partition handle fenced; rejoining the group")
		return nil
	}
	return err
}

// partitionRun is the state of one partition's goroutine.
type partitionRun struct {
	pr    *Processor
	p     int32
	pt    *state.Partition
	gen   *kafka.Generation
	fence context.Context
	log   zerolog.Logger
	fetch *fetcher

	next   int64 // offset after the last message staged
	hwm    int64 // high watermark seen with the last message
	logEnd int64 // end of the log at assignment

	opened time.Time // first message of the batch in hand; zero when none

	pump      *outboxPump
	outputs   bool        // the batch in hand staged outbox entries
	lastGroup time.Time   // last Kafka group-offset commit
	groupSent int64       // offset last committed to the group
	due       *time.Timer // fires when the batch in hand is owed a commit
	staged    int         // messages staged in the batch in hand
	stop      context.Context
}

// resume returns the offset to start reading from: the store's next
// offset, or the configured start when none is stored, moved forward (and
// logged, and counted) when the log no longer holds it.
func (r *partitionRun) resume(ctx context.Context) (int64, error) {
	first, last, err := partitionBounds(ctx, r.pr.cl, r.pr.opt.Topic, int(r.p))
	if err != nil {
		return 0, err
	}
	r.logEnd = last
	next, ok := r.pt.NextOffset()
	switch {
	case !ok && r.pr.opt.Start == "latest":
		r.log.Info().Int64("offset", last).Msg("no stored offset: starting at the end of the log (consumer.start = latest)")
		return last, nil
	case !ok:
		r.log.Info().Int64("offset", first).Msg("no stored offset: starting at the beginning of the log (consumer.start = earliest)")
		return first, nil
	case next < first:
		skipped := first - next
		r.pr.skipped.Add(skipped)
		r.pr.m.SkippedOffsets.Add(skipped)
		r.log.Error().Int64("stored_next", next).Int64("log_start", first).Int64("skipped", skipped).
			Msg("ANSWERS LOST: the stored offset is below the start of the log — those messages were deleted (retention) before this instance read them; continuing from the log start. Raise the answers topic's retention or consume faster")
		return first, nil
	case next > last:
		r.log.Error().Int64("stored_next", next).Int64("log_end", last).
			Msg("the stored offset is beyond the end of the log: the topic was probably deleted and created again; answers at offsets below the stored one will be ignored until the partition's state is erased")
	}
	return next, nil
}

// loop reads, decodes and stages messages, committing the batch in hand
// at least every BatchInterval and every BatchMaxAnswers messages, until
// stop ends.
func (r *partitionRun) loop(stop context.Context) error {
	opt := &r.pr.opt
	r.due = time.NewTimer(time.Hour)
	r.due.Stop()
	defer r.due.Stop()
	for {
		var c chunk
		select {
		case c = <-r.fetch.out:
		case <-r.due.C:
			if err := r.tick(time.Now()); err != nil {
				return err
			}
			continue
		case <-stop.Done():
			return nil
		}
		if c.err != nil {
			// Not fatal: the generation ends and the group is joined again,
			// and resuming deals with the cause (a truncated log is logged
			// and counted there).
			r.log.Warn().Err(c.err).Msg("reading the partition failed; rejoining the group")
			return nil
		}
		for i := range c.msgs {
			if err := r.handle(&c.msgs[i]); err != nil {
				return err
			}
			// The batch's age is looked at every 16 messages: the timer
			// interrupts waiting for messages at the batch's deadline
			// anyway, so this only bounds how long a batch grows when
			// messages never stop arriving (by 16 messages' work), at a
			// sixteenth of the clock reads.
			full := r.staged >= opt.BatchMaxAnswers
			if full || r.staged&15 == 0 {
				if stop.Err() != nil {
					return nil // the rest of the chunk is read again by the next owner
				}
				if now := time.Now(); full || now.Sub(r.opened) >= opt.BatchInterval {
					if err := r.commit(false, now); err != nil {
						return err
					}
				}
			}
		}
		r.fetch.recycle(c.msgs)
		// Caught up with the end of the log as the broker last reported
		// it, and nothing more in hand: commit now rather than at the
		// batch's deadline, so that outputs go out without waiting for
		// the interval. While the partition is behind, batches fill as
		// before.
		if r.staged > 0 && r.next >= r.hwm && len(r.fetch.out) == 0 {
			if err := r.commit(false, time.Now()); err != nil {
				return err
			}
		}
	}
}

// handle stages one message: applied, or dead-lettered with its reason.
func (r *partitionRun) handle(msg *kafka.Message) error {
	pr := r.pr
	pr.m.Consumed.Add(1)
	if msg.HighWaterMark > r.hwm {
		r.hwm = msg.HighWaterMark
	}
	a, rej := decodeMessage(pr.opt.Decoder, msg.Value, pr.opt.MaxEventBytes)
	if rej == nil {
		res, err := r.pt.Apply(a, msg.Offset, pr.reg.Current())
		switch {
		case err == nil && res.Replayed:
		case err == nil:
			if res.Duplicate {
				pr.m.Duplicates.Add(1)
			} else {
				pr.m.Applied.Add(1)
			}
			if res.Late {
				pr.m.Late.Add(1)
			}
			if res.Rederived > 0 {
				pr.m.Rederived.Add(int64(res.Rederived))
			}
			if len(res.Outputs) > 0 {
				r.outputs = true
			}
		case errors.Is(err, state.ErrBadAnswer):
			rej = rejectionOf(err, ReasonUnprocessed, ReasonUnprocessed)
		default:
			return fmt.Errorf("attain: applying %s/%d@%d: %w", msg.Topic, msg.Partition, msg.Offset, err)
		}
	}
	if rej != nil {
		dl := state.DeadLetter{
			Raw: msg.Value, Key: msg.Key, Topic: msg.Topic, Partition: int32(msg.Partition), Offset: msg.Offset,
			Reason: rej.reason(), Field: rej.field, At: msg.Time,
		}
		if err := r.pt.DeadLetter(dl, msg.Offset); err != nil {
			return fmt.Errorf("attain: dead-lettering %s/%d@%d: %w", msg.Topic, msg.Partition, msg.Offset, err)
		}
		pr.m.DeadLettered.Add(1)
		r.outputs = true
		r.log.Warn().Int64("offset", msg.Offset).Str("reason", dl.Reason).Str("field", dl.Field).Msg("input rejected to the dead-letter topic")
	}
	r.next = msg.Offset + 1
	if r.staged == 0 {
		r.opened = time.Now()
		r.due.Reset(pr.opt.BatchInterval)
	}
	r.staged++
	return nil
}

// tick runs when the batch's deadline passes: commit what is staged.
func (r *partitionRun) tick(now time.Time) error {
	if r.staged > 0 {
		return r.commit(false, now)
	}
	return nil
}

// commit writes the batch in hand to the store as one atomic batch, then
// (fenced) reports the offset to the group.
func (r *partitionRun) commit(sync bool, now time.Time) error {
	pr := r.pr
	if r.due != nil {
		r.due.Stop()
	}
	if r.staged > 0 {
		t0 := time.Now()
		if err := r.pt.Commit(sync); err != nil {
			return fmt.Errorf("attain: committing partition %d: %w", r.p, err)
		}
		done := time.Now()
		pr.m.ObserveCommit(done.Sub(t0))
		pr.m.ObserveBatchAge(done.Sub(r.opened))
		pr.m.Commits.Add(1)
		pr.m.Committed.Add(int64(r.staged))
		r.staged = 0
		r.opened = time.Time{}
		if r.outputs {
			r.outputs = false
			r.pump.kick()
		}
		if r.hwm > 0 {
			pr.m.SetLag(r.p, max(0, r.hwm-r.next))
		}
	}
	if r.fence.Err() == nil && r.next != r.groupSent && (sync || now.Sub(r.lastGroup) >= pr.opt.GroupCommitInterval) {
		// The group offset serves lag monitoring only; the store's offset
		// is the one that counts, so a failure is not an error.
		if err := r.gen.CommitOffsets(map[string]map[int]int64{pr.opt.Topic: {int(r.p): r.next}}); err != nil {
			r.log.Debug().Err(err).Msg("committing the group offset failed")
		} else {
			r.groupSent = r.next
		}
		r.lastGroup = now
	}
	return nil
}

// outboxPump publishes one partition's committed outbox from its own
// goroutine, owned by the partition's goroutine (which starts it after the
// first drain and stops it, and waits for it, before finishing). A commit
// with outputs kicks it; a failed drain is retried with a growing backoff
// while consumption goes on, so a slow or unreachable output topic never
// stalls the partition (the outbox holds the entries).
type outboxPump struct {
	r    *partitionRun
	kc   chan struct{} // capacity 1: a kick while draining is kept, not lost
	done chan struct{} // closed when run returns

	// Owned by the goroutine that drains: the partition's before run and
	// after done, the pump's in between.
	dirty   bool          // the outbox may hold entries not yet published
	retryAt time.Time     // earliest time of the next drain after a failure
	backoff time.Duration // after the last failed drain
}

func newOutboxPump(r *partitionRun) *outboxPump {
	return &outboxPump{r: r, kc: make(chan struct{}, 1), done: make(chan struct{})}
}

// kick says that committed outbox entries are waiting. It never blocks.
func (pm *outboxPump) kick() {
	select {
	case pm.kc <- struct{}{}:
	default:
	}
}

// pending reports, once run has returned, whether the outbox may hold
// entries not yet published (a failed or abandoned drain, or a kick not
// taken).
func (pm *outboxPump) pending() bool {
	select {
	case <-pm.kc:
		pm.dirty = true
	default:
	}
	return pm.dirty
}

// run drains whenever kicked, and retries a failed drain when due, until
// ctx ends (the partition stops, or its generation ends: ctx ends no later
// than the fence, so a write in flight is abandoned then).
func (pm *outboxPump) run(ctx context.Context) {
	defer close(pm.done)
	retry := time.NewTimer(time.Hour)
	retry.Stop()
	defer retry.Stop()
	if pm.dirty {
		// The drain before consumption failed.
		retry.Reset(time.Until(pm.retryAt))
	}
	for {
		select {
		case <-ctx.Done():
			return
		case <-pm.kc:
			pm.dirty = true
		case <-retry.C:
		}
		if !pm.dirty {
			continue
		}
		if wait := time.Until(pm.retryAt); wait > 0 {
			retry.Reset(wait)
			continue
		}
		pm.drain(ctx)
		if ctx.Err() != nil {
			return
		}
		if pm.dirty {
			retry.Reset(time.Until(pm.retryAt))
		}
	}
}

// drain publishes the partition's outbox once; a failure sets the backoff
// and the time of the next attempt.
func (pm *outboxPump) drain(fence context.Context) {
	r := pm.r
	n, err := r.pr.pub.Drain(fence, r.p)
	switch {
	case err == nil:
		pm.dirty = false
		pm.backoff = 0
		if n > 0 {
			r.log.Debug().Int("entries", n).Msg("published outbox")
		}
	case errors.Is(err, ErrFenced):
		// The generation ended (or the partition is stopping); the next
		// owner, or finish, publishes the rest.
	default:
		pm.backoff = min(max(2*pm.backoff, 250*time.Millisecond), 30*time.Second)
		pm.retryAt = time.Now().Add(pm.backoff)
		r.log.Warn().Err(err).Int("sent", n).Dur("retry_in", pm.backoff).Msg("publishing the outbox failed; entries are kept and sent again")
	}
}

// finish ends the partition: the batch in hand is committed and synced;
// while the generation still owns the partition (shutdown, not
// revocation), the outbox is drained once more within DrainTimeout and
// the group offset is reported.
func (r *partitionRun) finish() error {
	if err := r.commit(true, time.Now()); err != nil {
		return err
	}
	if r.fence.Err() != nil {
		r.log.Info().Int64("offset", r.next).Msg("partition revoked")
		return nil
	}
	if r.pump.pending() {
		ctx, cancel := context.WithTimeout(r.fence, r.pr.opt.DrainTimeout)
		r.pump.drain(ctx)
		cancel()
	}
	r.log.Info().Int64("offset", r.next).Msg("partition stopped")
	return nil
}
