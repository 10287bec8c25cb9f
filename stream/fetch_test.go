package stream

import (
	"context"
	"errors"
	"fmt"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"
)

// collect reads chunks from f until it has want messages or an error
// chunk arrives, checking that offsets are consecutive from first.
func collect(t *testing.T, f *fetcher, first int64, want int) ([]kafka.Message, error) {
	t.Helper()
	var got []kafka.Message
	deadline := time.After(20 * time.Second)
	for len(got) < want {
		select {
		case c := <-f.out:
			if c.err != nil {
				return got, c.err
			}
			if len(c.msgs) == 0 || len(c.msgs) > chunkMessages {
				t.Fatalf("chunk of %d messages, want 1..%d", len(c.msgs), chunkMessages)
			}
			for _, m := range c.msgs {
				if m.Offset != first+int64(len(got)) {
					t.Fatalf("message at offset %d, want %d (in order, none skipped)", m.Offset, first+int64(len(got)))
				}
				got = append(got, kafka.Message{Offset: m.Offset, Value: append([]byte(nil), m.Value...)})
			}
			f.recycle(c.msgs)
		case <-deadline:
			t.Fatalf("%d of %d messages after 20 s", len(got), want)
		}
	}
	return got, nil
}

func valueMessages(from, n int) []kafka.Message {
	msgs := make([]kafka.Message, n)
	for i := range msgs {
		msgs[i] = kafka.Message{Value: fmt.Appendf(nil, "m%d", from+i)}
	}
	return msgs
}

// TestFetcher: against the embedded broker over TCP, the fetcher hands
// over every message in order in chunks of at most chunkMessages (chunk
// slices are recycled, so the values read must survive that), waits at the
// end of the log for messages produced later, reports a start below the
// log's start as errLogTruncated, and stops promptly when cancelled.
func TestFetcher(t *testing.T) {
	b := startTestBroker(t, 1)
	addr := []string{b.Addr()}
	produce(t, b.Addr(), tAnswers, valueMessages(0, 2500))

	t.Run("in order, then long poll", func(t *testing.T) {
		f := newFetcher(addr, tAnswers, 0, 8<<20, 200*time.Millisecond, testLogger(t))
		ctx, cancel := context.WithCancel(context.Background())
		go f.run(ctx, 0)
		got, err := collect(t, f, 0, 2500)
		if err != nil {
			t.Fatal(err)
		}
		for i, m := range got {
			if string(m.Value) != fmt.Sprintf("m%d", i) {
				t.Fatalf("offset %d holds %q, want %q", i, m.Value, fmt.Sprintf("m%d", i))
			}
		}
		// Idle at the end of the log, each poll ends empty after maxWait
		// and the connection is kept (a failed fetch would replace it).
		idle := f.conn.Load()
		time.Sleep(5 * 200 * time.Millisecond)
		if f.conn.Load() != idle {
			t.Errorf("the connection was replaced while idle at the end of the log")
		}
		// At the end of the log: produced later, still read, in order.
		produce(t, b.Addr(), tAnswers, valueMessages(2500, 10))
		if _, err := collect(t, f, 2500, 10); err != nil {
			t.Fatal(err)
		}
		start := time.Now()
		cancel()
		select {
		case <-f.done:
		case <-time.After(5 * time.Second):
			t.Fatalf("fetcher still running 5 s after cancel")
		}
		t.Logf("stopped %v after cancel", time.Since(start))
	})

	t.Run("from the middle", func(t *testing.T) {
		f := newFetcher(addr, tAnswers, 0, 8<<20, 200*time.Millisecond, testLogger(t))
		ctx, cancel := context.WithCancel(context.Background())
		defer func() { cancel(); <-f.done }()
		go f.run(ctx, 1234)
		got, err := collect(t, f, 1234, 100)
		if err != nil {
			t.Fatal(err)
		}
		if string(got[0].Value) != "m1234" {
			t.Fatalf("first value %q, want m1234", got[0].Value)
		}
	})

	t.Run("below the log start", func(t *testing.T) {
		deleteRecords(t, b.Addr(), tAnswers, 0, 2000)
		f := newFetcher(addr, tAnswers, 0, 8<<20, 200*time.Millisecond, testLogger(t))
		ctx, cancel := context.WithCancel(context.Background())
		defer func() { cancel(); <-f.done }()
		go f.run(ctx, 1500)
		_, err := collect(t, f, 1500, 1)
		if !errors.Is(err, errLogTruncated) {
			t.Fatalf("error %v, want errLogTruncated", err)
		}
		select {
		case <-f.done:
		case <-time.After(5 * time.Second):
			t.Fatalf("fetcher still running after its terminal error")
		}
	})

	t.Run("broker unreachable, then cancelled", func(t *testing.T) {
		// A port nothing listens on: dialling fails and is retried with
		// backoff until the context ends; no error chunk is sent.
		f := newFetcher([]string{"127.0.0.1:1"}, tAnswers, 0, 8<<20, 200*time.Millisecond, testLogger(t))
		ctx, cancel := context.WithCancel(context.Background())
		go f.run(ctx, 0)
		time.Sleep(400 * time.Millisecond)
		cancel()
		select {
		case <-f.done:
		case <-time.After(5 * time.Second):
			t.Fatalf("fetcher still running 5 s after cancel")
		}
		select {
		case c := <-f.out:
			t.Fatalf("chunk %+v from an unreachable broker, want none (retried)", c)
		default:
		}
	})
}

// TestFetcherBackoff: 100 ms doubling, capped at 5 s (common practice for
// reconnect backoff; no source).
func TestFetcherBackoff(t *testing.T) {
	for _, c := range []struct {
		failures int
		want     time.Duration
	}{{1, 100 * time.Millisecond}, {2, 200 * time.Millisecond}, {3, 400 * time.Millisecond}, {6, 3200 * time.Millisecond}, {7, 5 * time.Second}, {50, 5 * time.Second}} {
		if got := fetchBackoff(c.failures); got != c.want {
			t.Errorf("fetchBackoff(%d) = %v, want %v", c.failures, got, c.want)
		}
	}
}
