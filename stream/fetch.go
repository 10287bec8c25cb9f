package stream

import (
	"context"
	"errors"
	"fmt"
	"sync/atomic"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"
)

// Read-ahead of one partition: up to fetchQueue chunks of chunkMessages
// messages wait for the partition's goroutine while it applies and commits
// (about what kafka-go's Reader holds with QueueCapacity 10000, the value
// this replaced).
const (
	chunkMessages = 1000
	fetchQueue    = 10
	// fetchReadTimeout bounds each read of a fetch response from the broker
	// (kafka-go's Reader uses 10 s, its ReadBatchTimeout default).
	fetchReadTimeout = 10 * time.Second
)

// chunk is a run of consecutive messages of one partition, or the error
// that stopped the fetcher (then msgs is empty and nothing follows).
type chunk struct {
	msgs []kafka.Message
	err  error
}

// errLogTruncated says that the partition's log no longer holds the next
// offset (retention deleted it): the partition is resumed again, which
// logs and counts the loss.
var errLogTruncated = errors.New("the partition's log no longer holds the next offset")

// fetcher reads one partition over a connection to its leader and hands
// the messages over in chunks: one channel operation per chunk, not per
// message, and one read deadline per chunk. (kafka-go's Reader, which it
// replaced, passes each message through a channel and two mutexes; in
// BenchmarkThroughput that was about a fifth of the processor's CPU.)
//
// Connection failures, a change of leader and broker timeouts are retried
// from the next offset with a growing backoff; an offset below the start
// of the log, and a Kafka error that retrying the same fetch cannot fix,
// end the fetcher with an error chunk.
type fetcher struct {
	dialer   *kafka.Dialer
	brokers  []string
	topic    string
	part     int
	maxBytes int
	maxWait  time.Duration
	log      zerolog.Logger

	out  chan chunk
	free chan []kafka.Message
	done chan struct{}
	conn atomic.Pointer[kafka.Conn]
}

func newFetcher(brokers []string, topic string, part, maxBytes int, maxWait time.Duration, log zerolog.Logger) *fetcher {
	return &fetcher{
		dialer: kafka.DefaultDialer, brokers: brokers, topic: topic, part: part,
		maxBytes: maxBytes, maxWait: maxWait, log: log,
		out:  make(chan chunk, fetchQueue),
		free: make(chan []kafka.Message, fetchQueue+2),
		done: make(chan struct{}),
	}
}

// recycle gives a consumed chunk's slice back for reuse.
func (f *fetcher) recycle(msgs []kafka.Message) {
	clear(msgs) // drop the values for the collector
	select {
	case f.free <- msgs[:0]:
	default:
	}
}

func (f *fetcher) buf() []kafka.Message {
	select {
	case b := <-f.free:
		return b
	default:
		return make([]kafka.Message, 0, chunkMessages)
	}
}

// run fetches from offset until ctx ends or a terminal error, which it
// sends as the last chunk. It closes done when it returns.
func (f *fetcher) run(ctx context.Context, offset int64) {
	defer close(f.done)
	defer context.AfterFunc(ctx, func() {
		if c := f.conn.Load(); c != nil {
			c.Close() // unblocks a read in progress
		}
	})()
	defer func() {
		if c := f.conn.Swap(nil); c != nil {
			c.Close()
		}
	}()
	failures := 0
	for ctx.Err() == nil {
		if failures > 0 && !sleepCtx(ctx, fetchBackoff(failures)) {
			return
		}
		conn := f.conn.Load()
		if conn == nil {
			c, err := f.dial(ctx, offset)
			if err != nil {
				failures++
				f.logRetry(ctx, failures, err, offset, "connecting to the partition's leader failed")
				continue
			}
			f.conn.Store(c)
			if ctx.Err() != nil { // ended while dialling: AfterFunc may have run already
				return
			}
			conn = c
		}
		next, err := f.read(ctx, conn, offset)
		offset = next
		if err != nil && !errors.Is(err, errStopped) && !errors.Is(err, kafka.RequestTimedOut) {
			// kafka-go leaves the rest of a failed fetch's response unread:
			// the next request goes over a new connection. (A poll that
			// found nothing new within maxWait ends in RequestTimedOut
			// with the response read to its end; that connection is kept.)
			f.drop()
		}
		switch {
		case err == nil || errors.Is(err, kafka.RequestTimedOut):
			failures = 0
		case ctx.Err() != nil:
			return
		case errors.Is(err, errStopped):
			return
		case errors.Is(err, kafka.OffsetOutOfRange):
			first, last, oerr := f.readOffsets(ctx, offset)
			switch {
			case oerr != nil:
				f.drop()
				failures++
				f.logRetry(ctx, failures, oerr, offset, "reading the partition's offsets failed")
			case offset < first:
				f.send(ctx, chunk{err: fmt.Errorf("%w: next offset %d, log start %d", errLogTruncated, offset, first)})
				return
			case offset < last:
				failures = 0 // produced meanwhile: fetch again at once
			default:
				failures++
				f.logRetry(ctx, failures, err, offset, "the next offset is beyond the end of the partition's log")
			}
		case isRetriable(err):
			failures++
			f.logRetry(ctx, failures, err, offset, "fetching from the partition failed; reconnecting")
		default:
			f.send(ctx, chunk{err: err})
			return
		}
	}
}

// errStopped: the fetcher's context ended while it waited to hand a
// chunk over.
var errStopped = errors.New("fetcher stopped")

// read runs one fetch request from offset and hands its messages over; it
// returns the offset after the last message read.
func (f *fetcher) read(ctx context.Context, conn *kafka.Conn, offset int64) (int64, error) {
	if _, err := conn.Seek(offset, kafka.SeekAbsolute|kafka.SeekDontCheck); err != nil {
		return offset, err
	}
	// The fetch's wait on the broker is derived from this deadline.
	if err := conn.SetReadDeadline(time.Now().Add(f.maxWait)); err != nil {
		return offset, err
	}
	batch := conn.ReadBatchWith(kafka.ReadBatchConfig{MinBytes: 1, MaxBytes: f.maxBytes})
	msgs := f.buf()
	var stopped bool
	for {
		if len(msgs) == 0 {
			_ = conn.SetReadDeadline(time.Now().Add(fetchReadTimeout))
		}
		m, err := batch.ReadMessage()
		if err != nil {
			break // io.EOF at the end of the batch; Close reports the rest
		}
		msgs = append(msgs, m)
		offset = m.Offset + 1
		if len(msgs) == chunkMessages {
			if !f.send(ctx, chunk{msgs: msgs}) {
				stopped = true
				break
			}
			msgs = f.buf()
		}
	}
	err := batch.Close()
	_ = conn.SetReadDeadline(time.Time{})
	if stopped {
		return offset, errStopped
	}
	if len(msgs) > 0 {
		if !f.send(ctx, chunk{msgs: msgs}) {
			return offset, errStopped
		}
	} else {
		f.recycle(msgs)
	}
	return offset, err
}

func (f *fetcher) send(ctx context.Context, c chunk) bool {
	select {
	case f.out <- c:
		return true
	case <-ctx.Done():
		return false
	}
}

// dial connects to the partition's leader through the first broker that
// answers.
func (f *fetcher) dial(ctx context.Context, offset int64) (*kafka.Conn, error) {
	var errs []error
	for _, b := range f.brokers {
		c, err := f.dialer.DialLeader(ctx, "tcp", b, f.topic, f.part)
		if err != nil {
			errs = append(errs, fmt.Errorf("%s: %w", b, err))
			continue
		}
		if _, err := c.Seek(offset, kafka.SeekAbsolute|kafka.SeekDontCheck); err != nil {
			c.Close()
			errs = append(errs, fmt.Errorf("%s: %w", b, err))
			continue
		}
		return c, nil
	}
	return nil, errors.Join(errs...)
}

// readOffsets returns the first and the next offset of the partition's
// log, keeping the connection it asked over for the next fetch.
func (f *fetcher) readOffsets(ctx context.Context, offset int64) (first, last int64, err error) {
	c, err := f.dial(ctx, offset)
	if err != nil {
		return 0, 0, err
	}
	f.conn.Store(c)
	if ctx.Err() != nil { // ended while dialling: AfterFunc may have run already
		return 0, 0, ctx.Err()
	}
	return c.ReadOffsets()
}

func (f *fetcher) drop() {
	if c := f.conn.Swap(nil); c != nil {
		c.Close()
	}
}

// logRetry logs a failure that is being retried: quietly for the first
// two in a row (a leader moving, a broker restarting), as a warning after.
func (f *fetcher) logRetry(ctx context.Context, failures int, err error, offset int64, msg string) {
	if ctx.Err() != nil {
		return
	}
	ev := f.log.Debug()
	if failures > 2 {
		ev = f.log.Warn()
	}
	ev.Err(err).Int64("offset", offset).Int("attempt", failures).Dur("retry_in", fetchBackoff(failures)).Msg(msg)
}

// isRetriable: errors that a new connection (to a possibly new leader)
// may fix. Everything that is not an error code of the Kafka protocol is a
// connection's error; of the protocol's, those that say the leader moved
// or is not ready.
func isRetriable(err error) bool {
	var ke kafka.Error
	if !errors.As(err, &ke) {
		return true // network errors, io.ErrUnexpectedEOF, io.ErrNoProgress, a closed connection
	}
	return ke.Temporary() || errors.Is(err, kafka.NotLeaderForPartition) ||
		errors.Is(err, kafka.UnknownTopicOrPartition) || errors.Is(err, kafka.LeaderNotAvailable)
}

// fetchBackoff: 100 ms doubling to at most 5 s.
func fetchBackoff(failures int) time.Duration {
	d := 100 * time.Millisecond
	for i := 1; i < failures && d < 5*time.Second; i++ {
		d *= 2
	}
	return min(d, 5*time.Second)
}

func sleepCtx(ctx context.Context, d time.Duration) bool {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-t.C:
		return true
	case <-ctx.Done():
		return false
	}
}
