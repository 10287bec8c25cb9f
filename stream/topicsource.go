package stream

import (
	"context"
	"errors"
	"fmt"
	"io"
	"sort"
	"strings"
	"sync"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"
	"github.com/segmentio/kafka-go/protocol"

	"github.com/attain-dev/attain/state"
)

// ErrTopicSource is wrapped by every error of reading a history topic.
var ErrTopicSource = errors.New("attain: reading a history topic")

// TopicSourceOptions configure a TopicSource.
type TopicSourceOptions struct {
	Brokers []string
	Topic   string
	// Decoder turns message values into answers (nil → the native JSON
	// decoder). It is called from one goroutine per partition, so it must
	// be safe for concurrent use (state.NativeDecoder is).
	Decoder Decoder
	// MaxEventBytes rejects larger values, as consumer.max_event_bytes does
	// in the processor (0 → no limit).
	MaxEventBytes int
	// FetchBytes is the most one fetch of one partition returns (0 → 4 MiB;
	// our choice: large enough to amortise round trips, small enough that
	// a fetch per partition in flight stays a few MiB each).
	FetchBytes int
	// Reject, when set, is called for every record that does not decode,
	// from the goroutine that called Answers.
	Reject func(TopicReject)
	Logger zerolog.Logger
}

// TopicReject is one record of the history topic that is not an answer.
type TopicReject struct {
	Partition int
	Offset    int64
	// Code is the dead-letter reason code (ReasonEmpty, ReasonMalformed,
	// …); Detail says what is wrong; Field names the field when known.
	Code, Detail, Field string
}

// TopicReadStats count what one Answers call read.
type TopicReadStats struct {
	Partitions int
	// Records read in [start, end) of every partition; Answers of them
	// decoded and passed on; Rejected did not decode (by code in
	// RejectedBy).
	Records, Answers, Rejected int64
	RejectedBy                 map[string]int64
	// Missing counts offsets in [start, end) with no record (compacted
	// away, transaction markers, or deleted by retention while reading).
	Missing int64
	Bytes   int64 // message values read
	// Start and End are, per partition, the offsets read: from the earliest
	// retained offset to the high-water mark when Answers began.
	Start, End map[int]int64
	Elapsed    time.Duration
}

// TopicSource reads a history topic for a refit (it is a fitjob.Source):
// every partition from its earliest retained offset to the high-water
// mark it had when Answers was called, each with its own fetch loop. It
// joins no consumer group and commits no offset, so it does not touch the
// processor's group or its offsets. Records produced after the start are
// not read.
//
// It fetches with kafka.Client.Fetch rather than a kafka.Reader: every
// fetch response carries the high-water mark, so a partition whose last
// offsets hold no record (compacted, or transaction markers) ends when the
// broker says nothing is left before the mark, where a Reader would wait
// for an offset that never comes.
//
// Within a partition records are passed on in offset order; partitions are
// interleaved. The answers topic is keyed by learner, so each learner's
// answers keep their arrival order. Records that do not decode are counted
// and reported (Reject, Stats) and skipped; they stop nothing.
type TopicSource struct {
	opt   TopicSourceOptions
	log   zerolog.Logger
	stats TopicReadStats
}

// NewTopicSource checks opt and returns the source.
func NewTopicSource(opt TopicSourceOptions) (*TopicSource, error) {
	var errs []error
	if len(opt.Brokers) == 0 {
		errs = append(errs, fmt.Errorf("%w: no brokers; fix: give --brokers host:port[,host:port…] (or brokers in the config)", ErrTopicSource))
	}
	if opt.Topic == "" {
		errs = append(errs, fmt.Errorf("%w: no topic; fix: name it, e.g. --from topic:answers", ErrTopicSource))
	}
	if opt.MaxEventBytes < 0 || opt.FetchBytes < 0 {
		errs = append(errs, fmt.Errorf("%w: max event bytes %d, fetch bytes %d: must not be negative", ErrTopicSource, opt.MaxEventBytes, opt.FetchBytes))
	}
	if err := errors.Join(errs...); err != nil {
		return nil, err
	}
	if opt.Decoder == nil {
		opt.Decoder = &state.NativeDecoder{}
	}
	if opt.FetchBytes == 0 {
		opt.FetchBytes = 4 << 20
	}
	log := opt.Logger.With().Str("component", "topic-source").Str("topic", opt.Topic).Logger()
	return &TopicSource{opt: opt, log: log}, nil
}

// Name is "topic:NAME".
func (s *TopicSource) Name() string { return "topic:" + s.opt.Topic }

// Stats are the counts of the latest Answers call.
func (s *TopicSource) Stats() TopicReadStats { return s.stats }

// topicItem is one record's outcome, sent from a partition's fetch loop.
type topicItem struct {
	answer state.Answer
	rej    *TopicReject
}

type topicBatch struct {
	items   []topicItem
	bytes   int64
	missing int64 // offsets in the range that held no record
	err     error // the partition's loop ended with this error
	done    bool  // the partition is read to its end
}

// topicBatchItems is how many records a fetch loop hands over at once (our
// choice: one channel operation per thousand records).
const topicBatchItems = 1024

// Answers reads every partition to its end at start and calls fn for each
// answer, from the calling goroutine. It starts one goroutine per
// partition and waits for all of them before it returns, also when fn or
// a partition fails, or ctx ends.
func (s *TopicSource) Answers(ctx context.Context, fn func(state.Answer) error) error {
	start := time.Now()
	s.stats = TopicReadStats{RejectedBy: map[string]int64{}, Start: map[int]int64{}, End: map[int]int64{}}
	tr := &kafka.Transport{}
	defer tr.CloseIdleConnections()
	cl := &kafka.Client{Addr: kafka.TCP(s.opt.Brokers...), Transport: tr, Timeout: 30 * time.Second}

	parts, err := topicPartitions(ctx, cl, s.opt.Topic)
	if err != nil {
		return fmt.Errorf("%w %s on %s: %v; fix: check --brokers and the topic name", ErrTopicSource, s.opt.Topic, strings.Join(s.opt.Brokers, ","), err)
	}
	sort.Ints(parts)
	s.stats.Partitions = len(parts)
	var todo []int
	for _, p := range parts {
		first, last, err := partitionBounds(ctx, cl, s.opt.Topic, p)
		if err != nil {
			return fmt.Errorf("%w %s: %v", ErrTopicSource, s.opt.Topic, err)
		}
		s.stats.Start[p], s.stats.End[p] = first, last
		if last > first {
			todo = append(todo, p)
		}
	}
	s.log.Info().Int("partitions", len(parts)).Interface("start", s.stats.Start).Interface("end", s.stats.End).Msg("reading the history topic")

	rctx, cancel := context.WithCancel(ctx)
	out := make(chan topicBatch, 2*len(todo))
	var wg sync.WaitGroup
	for _, p := range todo {
		wg.Add(1)
		go func() {
			defer wg.Done()
			s.readPartition(rctx, cl, p, s.stats.Start[p], s.stats.End[p], out)
		}()
	}
	stop := func() {
		cancel()
		// Drain so that no loop blocks on a full channel, then wait.
		go func() {
			for range out {
			}
		}()
		wg.Wait()
		close(out)
	}

	left := len(todo)
	var missing int64
	for left > 0 {
		var b topicBatch
		select {
		case b = <-out:
		case <-ctx.Done():
			stop()
			return ctx.Err()
		}
		if b.err != nil {
			stop()
			return b.err
		}
		s.stats.Bytes += b.bytes
		missing += b.missing
		for i := range b.items {
			it := &b.items[i]
			s.stats.Records++
			if it.rej != nil {
				s.stats.Rejected++
				s.stats.RejectedBy[it.rej.Code]++
				if s.opt.Reject != nil {
					s.opt.Reject(*it.rej)
				}
				continue
			}
			s.stats.Answers++
			if err := fn(it.answer); err != nil {
				stop()
				return err
			}
		}
		if b.done {
			left--
		}
	}
	stop()
	s.stats.Missing = missing
	s.stats.Elapsed = time.Since(start)
	ev := s.log.Info()
	if s.stats.Rejected > 0 || missing > 0 {
		ev = s.log.Warn()
	}
	ev.Int64("records", s.stats.Records).Int64("answers", s.stats.Answers).Int64("rejected", s.stats.Rejected).
		Interface("rejected_by", s.stats.RejectedBy).Int64("missing_offsets", missing).
		Dur("took", s.stats.Elapsed).Msg("history topic read")
	return nil
}

// fetchRetries is how often a failed fetch is retried, with a doubling
// backoff from 100 ms, before the read fails (our choice: rides out a
// leader election, which takes seconds).
const fetchRetries = 8

// readPartition fetches [from, end) of partition p and sends the decoded
// records on out, in order, ending with a batch marked done or carrying
// the error.
func (s *TopicSource) readPartition(ctx context.Context, cl *kafka.Client, p int, from, end int64, out chan<- topicBatch) {
	send := func(b topicBatch) bool {
		select {
		case out <- b:
			return true
		case <-ctx.Done():
			return false
		}
	}
	fail := func(err error) {
		send(topicBatch{err: fmt.Errorf("%w %s/%d at offset %d: %v", ErrTopicSource, s.opt.Topic, p, from, err)})
	}
	var b topicBatch
	off := from
	retries := 0
	gap := func(n int64) {
		if n > 0 {
			b.missing += n
		}
	}
	for off < end {
		res, err := cl.Fetch(ctx, &kafka.FetchRequest{
			Topic: s.opt.Topic, Partition: p, Offset: off,
			MinBytes: 1, MaxBytes: int64(s.opt.FetchBytes), MaxWait: 500 * time.Millisecond,
		})
		if err == nil && res.Error != nil {
			err = res.Error
		}
		if err != nil {
			if ctx.Err() != nil {
				return
			}
			if errors.Is(err, kafka.OffsetOutOfRange) {
				// Retention deleted the records ahead of us: go on from the
				// new log start, counting what was lost.
				first, _, lerr := partitionBounds(ctx, cl, s.opt.Topic, p)
				if lerr == nil && first > off {
					s.log.Error().Int("partition", p).Int64("from", off).Int64("to", first).
						Msg("records deleted by retention while reading the history topic; they are missing from the refit")
					gap(min(first, end) - off)
					off = first
					continue
				}
			}
			if retries++; retries > fetchRetries {
				fail(err)
				return
			}
			s.log.Warn().Err(err).Int("partition", p).Int("retry", retries).Msg("fetch failed; retrying")
			select {
			case <-time.After((100 * time.Millisecond) << (retries - 1)):
			case <-ctx.Done():
				return
			}
			continue
		}
		retries = 0
		n, err := s.takeRecords(res.Records, p, &off, end, &b, gap)
		res.Records = nil
		if err != nil {
			fail(err)
			return
		}
		if n == 0 && res.HighWatermark <= off {
			// Nothing at or after off below the mark: the rest of the range
			// holds no record. (The mark never falls below end unless the
			// log was truncated.)
			gap(end - off)
			off = end
		} else if n == 0 && res.HighWatermark > off && off < end {
			// The broker returned nothing although records remain: either
			// the batch at off was larger than FetchBytes, or offsets up to
			// the mark are all gone. Ask the log where it starts now.
			first, last, lerr := partitionBounds(ctx, cl, s.opt.Topic, p)
			if lerr == nil && last <= off {
				gap(end - off)
				off = end
			} else if lerr == nil && first > off {
				gap(min(first, end) - off)
				off = first
			} else {
				fail(fmt.Errorf("no record returned at offset %d below the high-water mark %d; fix: raise the fetch size above the largest record batch", off, res.HighWatermark))
				return
			}
		}
		if len(b.items) >= topicBatchItems || off >= end {
			b.done = off >= end
			if !send(b) || b.done {
				return
			}
			b = topicBatch{}
		}
	}
	b.done = true // the range ended on a skip past its end
	send(b)
}

// takeRecords decodes the records of one fetch response at offsets in
// [*off, end), appending them to b and advancing *off past each. Control
// records (transaction markers) are skipped and counted as gaps.
func (s *TopicSource) takeRecords(rr kafka.RecordReader, p int, off *int64, end int64, b *topicBatch, gap func(int64)) (int, error) {
	n := 0
	take := func(r kafka.RecordReader, control bool) error {
		for {
			rec, err := r.ReadRecord()
			if errors.Is(err, io.EOF) {
				return nil
			}
			if err != nil {
				return err
			}
			if rec.Offset < *off || rec.Offset >= end {
				continue // a batch may start before the offset asked for
			}
			gap(rec.Offset - *off)
			*off = rec.Offset + 1
			n++
			if control {
				gap(1)
				continue
			}
			var v []byte
			if rec.Value != nil {
				if v, err = kafka.ReadAll(rec.Value); err != nil {
					return err
				}
			}
			b.bytes += int64(len(v))
			a, rej := decodeMessage(s.opt.Decoder, v, s.opt.MaxEventBytes)
			if rej != nil {
				b.items = append(b.items, topicItem{rej: &TopicReject{Partition: p, Offset: rec.Offset, Code: rej.code, Detail: rej.detail, Field: rej.field}})
				continue
			}
			b.items = append(b.items, topicItem{answer: a})
		}
	}
	if st, ok := rr.(*protocol.RecordStream); ok {
		for _, r := range st.Records {
			_, control := r.(*protocol.ControlBatch)
			if err := take(r, control); err != nil {
				return n, err
			}
		}
		return n, nil
	}
	return n, take(rr, false)
}
