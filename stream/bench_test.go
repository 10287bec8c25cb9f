package stream

import (
	"context"
	"os"
	"runtime/pprof"
	"strconv"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/state"
)

// BenchmarkThroughput fills a 4-partition answers topic with simulated
// answers (ATTAIN_BENCH_ANSWERS, default 1000000; 30000 with -short), then
// measures, on the same topic in the same run:
//
//   - raw: kafka-go consumption alone, one group-less Reader per partition
//     reading every message and doing nothing with it;
//   - attain: the processor end to end with its defaults — decode, BKT
//     update, history, store commit every 100 ms or 10000 answers (Pebble
//     WAL without fsync, as in production; fsync on shutdown), outbox
//     publish to the mastery topic — until every answer is in a committed
//     batch and the broker has acknowledged every output (the outbox is
//     empty).
//
// Both clocks start at the first message read, so that the consumer
// group's join is not counted; the processor's shutdown that follows
// (final synced commit, leaving the group) is timed apart (shutdown-s).
// Besides answers/s for both and their ratio (target ≥ 0.5) it reports
// the oldest batch at the end of its commit (batch-age-max-ms: 100 ms of
// batch.interval, then the commit itself).
func BenchmarkThroughput(b *testing.B) {
	// A million: with 300,000 the raw reader's start (its first fetches)
	// weighs enough in its short run to cut its rate by two fifths (about
	// 440k against 720k answers/s), and the ratio
	// read about 0.5 where the steady state is near 0.26.
	n := 1_000_000
	if testing.Short() {
		n = 30_000
	}
	if s := os.Getenv("ATTAIN_BENCH_ANSWERS"); s != "" {
		v, err := strconv.Atoi(s)
		if err != nil || v <= 0 {
			b.Fatalf("ATTAIN_BENCH_ANSWERS=%q: must be a positive number", s)
		}
		n = v
	}
	const partitions = 4
	br := startTestBroker(b, partitions)
	answers := cohort(42, 5000, n)
	t0 := time.Now()
	produce(b, br.Addr(), tAnswers, answerMessages(answers))
	b.Logf("filled %s with %d answers in %v", tAnswers, n, time.Since(t0).Round(time.Millisecond))

	var raw, attain float64
	var shutdown, batchAge, rawCPU, attainCPU time.Duration
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		c0 := processCPU()
		raw = rawRate(b, br.Addr(), partitions, n)
		c1 := processCPU()
		attain = attainRate(b, br.Addr(), n, i, &shutdown, &batchAge, &attainCPU)
		rawCPU = c1 - c0
	}
	// CPU per answer (user + system, the whole process: the embedded
	// broker serving the fetches is counted on both sides).
	b.ReportMetric(float64(rawCPU.Nanoseconds())/1e3/float64(n), "cpu-us/answer-raw")
	b.ReportMetric(float64(attainCPU.Nanoseconds())/1e3/float64(n), "cpu-us/answer-attain")
	b.ReportMetric(shutdown.Seconds(), "shutdown-s")
	b.ReportMetric(float64(batchAge.Milliseconds()), "batch-age-max-ms")
	b.ReportMetric(raw, "answers/s-raw")
	b.ReportMetric(attain, "answers/s-attain")
	b.ReportMetric(attain/raw, "ratio")
}

// rawRate reads the whole topic with one Reader per partition.
func rawRate(b *testing.B, addr string, partitions, n int) float64 {
	ends := logEnds(b, addr, tAnswers)
	var first sync.Once
	var start time.Time
	var count atomic.Int64
	var wg sync.WaitGroup
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Minute)
	defer cancel()
	for p := range partitions {
		wg.Add(1)
		go func() {
			defer wg.Done()
			r := kafka.NewReader(kafka.ReaderConfig{
				Brokers: []string{addr}, Topic: tAnswers, Partition: p,
				MinBytes: 1, MaxBytes: 8 << 20, MaxWait: 500 * time.Millisecond, QueueCapacity: 1000,
			})
			defer r.Close()
			if err := r.SetOffset(0); err != nil {
				b.Error(err)
				return
			}
			for end := ends[p]; end > 0; {
				m, err := r.FetchMessage(ctx)
				if err != nil {
					b.Error(err)
					return
				}
				first.Do(func() { start = time.Now() })
				count.Add(1)
				if m.Offset+1 >= end {
					return
				}
			}
		}()
	}
	wg.Wait()
	el := time.Since(start)
	if int(count.Load()) != n {
		b.Fatalf("raw read %d messages, want %d", count.Load(), n)
	}
	return float64(n) / el.Seconds()
}

// attainRate runs the processor over the whole topic with a new store and
// a new consumer group.
func attainRate(b *testing.B, addr string, n, iter int, shutdown, batchAge, cpu *time.Duration) float64 {
	st := openTestStore(b, b.TempDir())
	defer st.Close()
	rp := startProcessor(b, addr, st, state.NewRegistry(nil), ProcessorOptions{Group: "bench-" + strconv.Itoa(iter)})
	var start time.Time
	var c0 time.Duration
	if path := os.Getenv("ATTAIN_BENCH_CPUPROFILE"); path != "" {
		// A profile of the processor's run alone (not the fill, not raw).
		f, err := os.Create(path)
		if err != nil {
			b.Fatal(err)
		}
		defer f.Close()
		if err := pprof.StartCPUProfile(f); err != nil {
			b.Fatal(err)
		}
		defer pprof.StopCPUProfile()
	}
	deadline := time.Now().Add(5 * time.Minute)
	// Done is every answer in a committed batch and every output
	// acknowledged by the broker (outbox empty): what a crash could no
	// longer lose.
	var allRead, allCommitted time.Time
	var depthAtCommitted int64
	for rp.m.Committed.Load() < int64(n) || st.OutboxDepth() != 0 {
		if start.IsZero() && rp.m.Consumed.Load() > 0 {
			start, c0 = time.Now(), processCPU()
		}
		if allRead.IsZero() && rp.m.Consumed.Load() >= int64(n) {
			allRead = time.Now()
		}
		if allCommitted.IsZero() && rp.m.Committed.Load() >= int64(n) {
			allCommitted = time.Now()
			depthAtCommitted = st.OutboxDepth()
		}
		if time.Now().After(deadline) {
			b.Fatalf("attain committed %d of %d in 5 minutes", rp.m.Committed.Load(), n)
		}
		time.Sleep(time.Millisecond)
	}
	el := time.Since(start)
	*cpu = processCPU() - c0
	if allRead.IsZero() {
		allRead = time.Now()
	}
	if allCommitted.IsZero() {
		allCommitted = time.Now()
	}
	b.Logf("attain: every answer read after %v, committed after %v (outbox depth then %d), outbox empty after %v",
		allRead.Sub(start).Round(time.Millisecond), allCommitted.Sub(start).Round(time.Millisecond), depthAtCommitted, el.Round(time.Millisecond))
	*batchAge = time.Duration(rp.m.MaxBatchAge.Load())
	t0 := time.Now()
	s := st.Stats() // before the final synced checkpoint
	rp.stop(b)
	*shutdown = time.Since(t0)
	if d := st.OutboxDepth(); d != 0 {
		b.Fatalf("outbox holds %d entries after the final drain", d)
	}
	b.Logf("attain: pebble wrote %.0f B/answer to the WAL, %.0f by flushes, %.0f by compactions",
		float64(s.WALBytes)/float64(n), float64(s.FlushedBytes)/float64(n), float64(s.CompactedBytes)/float64(n))
	b.Logf("attain: %d applied, %d duplicates, %d commits, %d published, cache hits %d misses %d",
		rp.m.Applied.Load(), rp.m.Duplicates.Load(), rp.m.Commits.Load(),
		rp.m.PublishedReached.Load()+rp.m.PublishedStuck.Load(), s.CacheHits, s.CacheMisses)
	return float64(n) / el.Seconds()
}
