package state

import (
	"bufio"
	"fmt"
	"math/rand/v2"
	"os"
	"runtime"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"
)

var stepSink float64

// BenchmarkParamsStep is one BKT update (evidence + transition) of
// independent records, as the store applies them (each answer updates a
// different record). Target: ≤ 10 ns/op.
func BenchmarkParamsStep(b *testing.B) {
	p := Params{Prior: 0.3, Learn: 0.1, Guess: 0.2, Slip: 0.1, Forget: 0.01}
	var pL [1024]float64
	for i := range pL {
		pL[i] = float64(i) / 1024
	}
	// A plain b.N loop: b.Loop keeps calls in its body from being inlined
	// and costs several ns per iteration itself, more than the work here.
	for i := 0; i < b.N; i++ {
		j := i & 1023
		pL[j] = p.Step(pL[j], i&3 != 0)
	}
	stepSink = pL[7]
}

// BenchmarkRecordApply is the whole per-record update the store makes for
// one answer: prediction, StepPair (precision kept near 1), counts and the
// reached/stuck decisions. Target: ≤ 10 ns/op.
func BenchmarkRecordApply(b *testing.B) {
	p := Params{Prior: 0.3, Learn: 0.1, Guess: 0.2, Slip: 0.1, Forget: 0.01}
	pol := DefaultPolicy()
	var rs [1024]Record
	for i := range rs {
		rs[i] = NewRecord(p, 1)
	}
	var sink float64
	for i := 0; i < b.N; i++ {
		out := rs[i&1023].Apply(p, i&3 != 0, int64(i), pol)
		sink += out.PCorrect
	}
	stepSink = sink
}

// BenchmarkParamsStepChain is the latency of one update when each depends
// on the previous one (one record answered over and over; re-derivation of
// a history): the division in the evidence update is on the critical path.
func BenchmarkParamsStepChain(b *testing.B) {
	p := Params{Prior: 0.3, Learn: 0.1, Guess: 0.2, Slip: 0.1, Forget: 0.01}
	pL := 0.3
	for i := 0; i < b.N; i++ {
		pL = p.Step(pL, i&3 != 0)
	}
	stepSink = pL
}

// benchAnswers builds n answers over `learners` learners and the six demo
// skills, ids unique, times increasing.
func benchAnswers(n, learners int, seed uint64) []Answer {
	r := rand.New(rand.NewPCG(seed, 1))
	names := make([]string, learners)
	for i := range names {
		names[i] = "learner-" + strconv.Itoa(i)
	}
	t0 := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC)
	as := make([]Answer, n)
	skills := make([][]string, len(skillNames))
	for i := range skills {
		skills[i] = skillNames[i : i+1]
	}
	for i := range as {
		as[i] = Answer{ID: "a" + strconv.Itoa(i), Learner: names[r.IntN(learners)], Skills: skills[r.IntN(len(skills))],
			Correct: r.IntN(3) != 0, At: t0.Add(time.Duration(i) * time.Second)}
	}
	return as
}

// commitEvery is the batch size of the stream processor's default
// (batch.max_answers = 2000).
const commitEvery = 2000

func runApply(b *testing.B, s *Store, as []Answer) {
	pt, err := s.Partition(0)
	if err != nil {
		b.Fatal(err)
	}
	pf := NewParamFile()
	b.ResetTimer()
	start := time.Now()
	cpu0 := processCPU()
	for i := 0; i < b.N; i++ {
		if _, err := pt.Apply(as[i], int64(i), pf); err != nil {
			b.Fatal(err)
		}
		if pt.Pending() >= commitEvery {
			if err := pt.Commit(false); err != nil {
				b.Fatal(err)
			}
		}
	}
	if err := pt.Commit(false); err != nil {
		b.Fatal(err)
	}
	b.StopTimer()
	b.ReportMetric(float64(b.N)/time.Since(start).Seconds(), "answers/s")
	// CPU time of the whole process (Pebble's background work included)
	// per answer: less sensitive than answers/s to other load on the machine.
	b.ReportMetric(float64((processCPU()-cpu0).Nanoseconds())/float64(b.N), "cpu-ns/answer")
}

// processCPU is the user + system CPU time of the process so far.
func processCPU() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// BenchmarkApplyCommit: answers of 50,000 learners over six skills (up to
// 300,000 records, more than the default cache holds), committed every
// 2000 answers with NoSync, as the stream processor does.
func BenchmarkApplyCommit(b *testing.B) {
	s, err := OpenStore(b.TempDir(), StoreOptions{})
	if err != nil {
		b.Fatal(err)
	}
	defer s.Close()
	as := benchAnswers(b.N, 50_000, 1)
	runApply(b, s, as)
	st := s.Stats()
	b.ReportMetric(float64(st.CacheHits)/float64(max(1, st.CacheHits+st.CacheMisses)), "cache-hit-ratio")
}

// BenchmarkApplyStreamLike is the store's share of the stream benchmark
// (stream/bench_test.go): 5000 learners over the six skills, so that every
// learner is cached and most batches touch a learner once or twice,
// committed every 2000 answers. Besides answers/s it reports the bytes
// Pebble writes per answer: to the WAL, by flushes and by compactions.
func BenchmarkApplyStreamLike(b *testing.B) {
	s, err := OpenStore(b.TempDir(), StoreOptions{})
	if err != nil {
		b.Fatal(err)
	}
	defer s.Close()
	as := benchAnswers(b.N, 5000, 1)
	runApply(b, s, as)
	m := s.db.Metrics()
	var flushed, compacted uint64
	for _, l := range m.Levels {
		flushed += l.TableBytesFlushed
		compacted += l.TableBytesCompacted
	}
	b.ReportMetric(float64(m.WAL.BytesWritten)/float64(b.N), "wal-B/answer")
	b.ReportMetric(float64(flushed)/float64(b.N), "flush-B/answer")
	b.ReportMetric(float64(compacted)/float64(b.N), "compact-B/answer")
}

// BenchmarkApplyHotLearners is the cache-hit path: 100 learners, whose
// records and id windows are all cached after their first answers.
func BenchmarkApplyHotLearners(b *testing.B) {
	s, err := OpenStore(b.TempDir(), StoreOptions{})
	if err != nil {
		b.Fatal(err)
	}
	defer s.Close()
	as := benchAnswers(b.N, 100, 2)
	runApply(b, s, as)
}

// BenchmarkCacheGet is one lookup in the learner cache (hit).
func BenchmarkCacheGet(b *testing.B) {
	c := newLRU[*learnerVal](200_000, 200_000)
	keys := make([][]byte, 100_000)
	for i := range keys {
		keys[i] = learnerRecordPrefix(nil, 0, "learner-"+strconv.Itoa(i))
		c.put(0, string(keys[i]), &learnerVal{}, 1)
	}
	i := 0
	for b.Loop() {
		if _, ok := c.get(0, keys[i%len(keys)]); !ok {
			b.Fatal("miss")
		}
		i++
	}
}

// BenchmarkMemory1MRecords builds 1,000,000 learner-skill records (250,000
// learners × 4 skills) with the default options, then applies 1,000,000
// more answers at random records (mostly cache misses: Pebble reads fill
// the block cache), and reports the peak resident set (VmHWM, which
// includes Pebble's block cache outside the Go heap). Target: ≤ 512 MiB.
// Run alone: go test -run '^$' -bench Memory1M -benchtime 1x ./state/
func BenchmarkMemory1MRecords(b *testing.B) {
	if b.N > 1 {
		b.Skip("one pass is the measurement; use -benchtime 1x")
	}
	const learners, perLearner = 250_000, 4
	s, err := OpenStore(b.TempDir(), StoreOptions{})
	if err != nil {
		b.Fatal(err)
	}
	defer s.Close()
	pt, err := s.Partition(0)
	if err != nil {
		b.Fatal(err)
	}
	pf := NewParamFile()
	t0 := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC)
	off := int64(0)
	apply := func(l, sk int, correct bool) {
		a := Answer{ID: "m" + strconv.FormatInt(off, 10), Learner: "learner-" + strconv.Itoa(l), Skills: skillNames[sk : sk+1],
			Correct: correct, At: t0.Add(time.Duration(off) * time.Second)}
		if _, err := pt.Apply(a, off, pf); err != nil {
			b.Fatal(err)
		}
		off++
		if pt.Pending() >= commitEvery {
			if err := pt.Commit(false); err != nil {
				b.Fatal(err)
			}
		}
	}
	start := time.Now()
	for l := 0; l < learners; l++ {
		for sk := 0; sk < perLearner; sk++ {
			apply(l, sk, (l+sk)%3 != 0)
		}
	}
	build := time.Since(start)
	r := rand.New(rand.NewPCG(3, 3))
	for i := 0; i < learners*perLearner; i++ {
		apply(r.IntN(learners), r.IntN(perLearner), r.IntN(2) == 0)
	}
	if err := pt.Commit(false); err != nil {
		b.Fatal(err)
	}
	st := s.Stats()
	if st.Records != learners*perLearner {
		b.Fatalf("records = %d, want %d", st.Records, learners*perLearner)
	}
	var ms runtime.MemStats
	runtime.ReadMemStats(&ms)
	hwm, rss := procStatusKiB(b, "VmHWM"), procStatusKiB(b, "VmRSS")
	b.ReportMetric(float64(hwm)/1024, "peak-RSS-MiB")
	b.ReportMetric(float64(rss)/1024, "RSS-MiB")
	b.ReportMetric(float64(ms.HeapInuse)/(1<<20), "heap-inuse-MiB")
	b.ReportMetric(float64(st.BlockCacheBytes)/(1<<20), "block-cache-MiB")
	b.ReportMetric(float64(st.DiskBytes)/(1<<20), "disk-MiB")
	b.ReportMetric(float64(learners*perLearner)/build.Seconds(), "build-answers/s")
	b.ReportMetric(float64(st.CacheHits)/float64(max(1, st.CacheHits+st.CacheMisses)), "cache-hit-ratio")
}

// procStatusKiB reads a "Vm…: N kB" line of /proc/self/status.
func procStatusKiB(b *testing.B, field string) int64 {
	f, err := os.Open("/proc/self/status")
	if err != nil {
		b.Skipf("no /proc/self/status: %v", err)
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		if rest, ok := strings.CutPrefix(sc.Text(), field+":"); ok {
			var kb int64
			if _, err := fmt.Sscanf(strings.TrimSpace(rest), "%d kB", &kb); err != nil {
				b.Fatalf("parsing %s: %v", field, err)
			}
			return kb
		}
	}
	b.Fatalf("%s not in /proc/self/status", field)
	return 0
}

// BenchmarkScanHistory streams 500,000 stored answers (of 10,000 learners
// over six skills) per op, as the refit does.
func BenchmarkScanHistory(b *testing.B) {
	const n = 500_000
	s, err := OpenStore(b.TempDir(), StoreOptions{})
	if err != nil {
		b.Fatal(err)
	}
	defer s.Close()
	pt, err := s.Partition(0)
	if err != nil {
		b.Fatal(err)
	}
	pf := NewParamFile()
	for i, a := range benchAnswers(n, 10_000, 4) {
		if _, err := pt.Apply(a, int64(i), pf); err != nil {
			b.Fatal(err)
		}
		if pt.Pending() >= commitEvery {
			if err := pt.Commit(false); err != nil {
				b.Fatal(err)
			}
		}
	}
	if err := pt.Commit(false); err != nil {
		b.Fatal(err)
	}
	b.ResetTimer()
	start := time.Now()
	for i := 0; i < b.N; i++ {
		got := 0
		if err := s.ScanHistory(func(_, _ string, h []HistoryEntry) error { got += len(h); return nil }); err != nil {
			b.Fatal(err)
		}
		if got != n {
			b.Fatalf("scanned %d answers, want %d", got, n)
		}
	}
	b.ReportMetric(float64(n*b.N)/time.Since(start).Seconds(), "answers/s")
}
