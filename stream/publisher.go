package stream

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/state"
)

// ErrFenced is returned by Publisher.Drain when the generation that owns
// the partition ended before everything was sent: the rest is left in the
// outbox for the partition's next owner.
var ErrFenced = errors.New("attain: partition no longer owned")

// PublisherOptions configure the outbox publisher.
type PublisherOptions struct {
	Brokers         []string
	MasteryTopic    string
	DeadLetterTopic string
	// Source is the CloudEvents source of every output (see Source).
	Source string
	// Balancer maps a key to a partition of the output topics: "murmur2"
	// (the Java client's default partitioner) or "crc32" (librdkafka's
	// default for keyed messages). Default murmur2.
	Balancer string
	// Chunk is the number of outbox entries sent per synchronous write.
	// Default 2000. (With 500, BenchmarkThroughput's outbox fell behind
	// consumption: 18,000-35,000 of its 68,904 outputs still waited when
	// the last answer was committed; with 2000, 98-395.)
	Chunk int
	// WriteTimeout bounds one write. Default 10 s.
	WriteTimeout time.Duration
	Logger       zerolog.Logger
}

// Publisher sends committed outbox entries to the mastery and dead-letter
// topics and deletes each chunk once the broker has acknowledged it (all
// in-sync replicas). It is safe for concurrent use by the partitions'
// goroutines; each partition's entries are sent in outbox order.
type Publisher struct {
	st  *state.Store
	m   *Metrics
	opt PublisherOptions
	tr  *kafka.Transport
	w   *kafka.Writer

	// acked holds, per partition, the last outbox number this publisher
	// has had acknowledged and deleted. Numbers are never reused and only
	// ever deleted, so every entry up to it is gone: reading resumes after
	// it instead of stepping over the deletions' tombstones from the
	// start of the outbox each time.
	mu    sync.Mutex
	acked map[int32]uint64
}

// ErrConfig is wrapped by errors about options the stream package was
// given.
var ErrConfig = errors.New("attain: stream configuration")

// Balancer returns the kafka-go balancer of a producer.balancer value:
// "murmur2" (or "") is the Java client's default partitioner, "crc32"
// librdkafka's default for keyed messages.
func Balancer(name string) (kafka.Balancer, error) {
	switch name {
	case "", "murmur2":
		return kafka.Murmur2Balancer{}, nil
	case "crc32":
		return kafka.CRC32Balancer{}, nil
	}
	return nil, fmt.Errorf("%w: producer.balancer = %q: must be murmur2 or crc32", ErrConfig, name)
}

// NewPublisher returns a publisher; Close releases its connections.
func NewPublisher(st *state.Store, m *Metrics, opt PublisherOptions) (*Publisher, error) {
	bal, err := Balancer(opt.Balancer)
	if err != nil {
		return nil, err
	}
	if opt.Chunk <= 0 {
		opt.Chunk = 2000
	}
	if opt.WriteTimeout <= 0 {
		opt.WriteTimeout = 10 * time.Second
	}
	// Metadata is refreshed every 2 s rather than kafka-go's 6 s, so that
	// an output topic created after a failed write is found soon.
	tr := &kafka.Transport{MetadataTTL: 2 * time.Second}
	w := &kafka.Writer{
		Addr:         kafka.TCP(opt.Brokers...),
		Balancer:     bal,
		RequiredAcks: kafka.RequireAll,
		// Writes are synchronous and already grouped into chunks: a batch
		// goes out as soon as the chunk is handed over, instead of after
		// kafka-go's default one-second linger.
		BatchTimeout: time.Millisecond,
		BatchSize:    opt.Chunk,
		WriteTimeout: opt.WriteTimeout,
		// A failed write leaves the chunk in the outbox; the next drain
		// sends it again, so the writer itself need not retry for long.
		MaxAttempts: 3,
		Transport:   tr,
		ErrorLogger: kafka.LoggerFunc(func(f string, a ...any) {
			opt.Logger.Warn().Str("component", "publisher").Msgf(f, a...)
		}),
	}
	return &Publisher{st: st, m: m, opt: opt, tr: tr, w: w, acked: make(map[int32]uint64)}, nil
}

// Drain sends partition p's committed outbox entries, in order, until the
// outbox of p is empty. fence is the owning generation's context, or one
// that ends no later than it: it is checked before every write, and a
// write in flight is abandoned when it ends (ErrFenced; the entries stay in
// the outbox). It returns the number of entries acknowledged and deleted.
func (pb *Publisher) Drain(fence context.Context, p int32) (int, error) {
	sent := 0
	for {
		if fence.Err() != nil {
			return sent, ErrFenced
		}
		pb.mu.Lock()
		after := pb.acked[p]
		pb.mu.Unlock()
		entries, err := pb.st.Outbox(p, after, pb.opt.Chunk)
		if err != nil {
			return sent, fmt.Errorf("attain: reading the outbox of partition %d: %w", p, err)
		}
		if len(entries) == 0 {
			return sent, nil
		}
		msgs := make([]kafka.Message, 0, len(entries))
		seqs := make([]uint64, 0, len(entries))
		var reached, stuck, dead int64
		for _, e := range entries {
			var msg kafka.Message
			switch {
			case e.Output != nil:
				msg, err = outputMessage(e.Output, pb.opt.MasteryTopic, pb.opt.Source)
				if e.Output.Kind == state.KindStuck {
					stuck++
				} else {
					reached++
				}
			case e.DeadLetter != nil:
				msg, err = deadLetterMessage(e.DeadLetter, pb.opt.DeadLetterTopic)
				dead++
			default:
				err = fmt.Errorf("outbox entry %d of partition %d is empty", e.Seq, p)
			}
			if err != nil {
				return sent, fmt.Errorf("attain: publishing partition %d: %w", p, err)
			}
			msgs = append(msgs, msg)
			seqs = append(seqs, e.Seq)
		}
		if fence.Err() != nil {
			return sent, ErrFenced
		}
		if err := pb.w.WriteMessages(fence, msgs...); err != nil {
			if fence.Err() != nil {
				return sent, ErrFenced
			}
			return sent, fmt.Errorf("attain: publishing %d outbox entries of partition %d: %w", len(msgs), p, err)
		}
		// Acknowledged by every in-sync replica: safe to forget. A crash
		// between the write and this delete sends the chunk again on
		// restart; the event ids let consumers drop the duplicates.
		if err := pb.st.DeleteOutbox(p, seqs); err != nil {
			return sent, fmt.Errorf("attain: deleting %d published outbox entries of partition %d: %w", len(seqs), p, err)
		}
		pb.mu.Lock()
		pb.acked[p] = max(pb.acked[p], seqs[len(seqs)-1])
		pb.mu.Unlock()
		pb.m.PublishedReached.Add(reached)
		pb.m.PublishedStuck.Add(stuck)
		pb.m.PublishedDeadLetters.Add(dead)
		sent += len(entries)
		if len(entries) < pb.opt.Chunk {
			return sent, nil
		}
	}
}

// Close waits for writes in flight and closes the connections.
func (pb *Publisher) Close() error {
	err := pb.w.Close()
	pb.tr.CloseIdleConnections()
	return err
}
