package stream

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"runtime"
	"runtime/debug"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/fitjob"
	"github.com/attain-dev/attain/state"
)

// A refit reads the whole history topic from a real Kafka-protocol broker
// over TCP: every partition from the earliest offset to the high-water
// mark at the start (records produced while reading are left alone), each
// learner's answers in produced order, bad records counted by reason and
// reported, no consumer group joined. A gated refit from the topic gives
// exactly the verdicts and parameters of a refit from the same answers in
// memory.
func TestTopicSource(t *testing.T) {
	b := startTestBroker(t, 3)
	g, err := fitjob.NewGenerator(fitjob.Cohort{Learners: 150, Opportunities: 12, Seed: 3, Skills: fitjob.HarbourLane().Skills[:3]})
	if err != nil {
		t.Fatal(err)
	}
	var as []state.Answer
	for a := range g.All() {
		as = append(as, a)
	}
	msgs := answerMessages(as)
	bad := []kafka.Message{
		{Key: []byte("hl-00001"), Value: nil},                                       // empty
		{Key: []byte("hl-00002"), Value: []byte("{not json")},                       // malformed
		{Key: []byte("hl-00003"), Value: []byte(`{"id":"x","learner":"hl-00003"}`)}, // invalid: fields missing
		{Key: []byte("hl-00004"), Value: []byte(`{"id":"y","learner":"hl-00004","skills":["trial-balance"],"correct":true,"at":"2025-09-01T18:00:00Z","pad":"` + strings.Repeat("x", 3000) + `"}`)}, // oversized
	}
	// Bad records among the good ones.
	msgs = slices.Insert(msgs, 100, bad[0], bad[1])
	msgs = slices.Insert(msgs, 2000, bad[2], bad[3])
	produce(t, b.Addr(), tAnswers, msgs)

	var rejects []TopicReject
	src, err := NewTopicSource(TopicSourceOptions{
		Brokers: []string{b.Addr()}, Topic: tAnswers, MaxEventBytes: 2048, FetchBytes: 64 << 10, // small fetches: many round trips
		Reject: func(r TopicReject) { rejects = append(rejects, r) }, Logger: testLogger(t),
	})
	if err != nil {
		t.Fatal(err)
	}
	if src.Name() != "topic:answers" {
		t.Errorf("name %q", src.Name())
	}
	var got []state.Answer
	late := answerMessages([]state.Answer{{ID: "late-1", Learner: "hl-00001", Skills: []string{"petty-cash"}, Correct: true, At: time.Now()}})
	err = src.Answers(context.Background(), func(a state.Answer) error {
		if len(got) == 0 {
			produce(t, b.Addr(), tAnswers, late) // after the start: not read
		}
		got = append(got, a)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	st := src.Stats()
	if len(got) != len(as) || st.Answers != int64(len(as)) || st.Records != int64(len(as)+4) || st.Rejected != 4 || st.Partitions != 3 {
		t.Fatalf("read %d answers (stats %+v), want %d answers and 4 rejected", len(got), st, len(as))
	}
	for _, code := range []string{ReasonEmpty, ReasonMalformed, ReasonInvalid, ReasonOversized} {
		if st.RejectedBy[code] != 1 {
			t.Errorf("rejected by %s: %d, want 1 (%v)", code, st.RejectedBy[code], st.RejectedBy)
		}
	}
	if len(rejects) != 4 {
		t.Errorf("%d rejects reported, want 4", len(rejects))
	}
	for _, r := range rejects {
		if r.Detail == "" || r.Offset < 0 {
			t.Errorf("reject %+v", r)
		}
		if r.Code == ReasonInvalid && r.Field == "" {
			t.Errorf("invalid record without its field: %+v", r)
		}
	}
	// Each learner's answers in produced order; every answer once.
	byLearner := func(as []state.Answer) map[string][]string {
		m := map[string][]string{}
		for _, a := range as {
			m[a.Learner] = append(m[a.Learner], a.ID)
		}
		return m
	}
	want, have := byLearner(as), byLearner(got)
	for l, ids := range want {
		if !slices.Equal(ids, have[l]) {
			t.Errorf("learner %s: read %v, produced %v", l, have[l], ids)
		}
	}
	var total int64
	for p, end := range st.End {
		if st.Start[p] != 0 {
			t.Errorf("partition %d started at %d", p, st.Start[p])
		}
		total += end
	}
	if total != int64(len(msgs)) {
		t.Errorf("ends sum to %d, produced %d before the start", total, len(msgs))
	}

	// No consumer group: the processor's group and offsets are untouched.
	tr := &kafka.Transport{}
	defer tr.CloseIdleConnections()
	cl := &kafka.Client{Addr: kafka.TCP(b.Addr()), Transport: tr}
	lg, err := cl.ListGroups(context.Background(), &kafka.ListGroupsRequest{})
	if err != nil {
		t.Fatal(err)
	}
	if len(lg.Groups) != 0 {
		t.Errorf("consumer groups after reading: %+v", lg.Groups)
	}

	// The topic as a fitjob.Source.
	opt := fitjob.GatedRefitOptions{Seed: 4, Now: func() time.Time { return time.Unix(1e9, 0) }, Sorter: fitjob.SorterOptions{Dir: t.TempDir()}}
	fromTopic, err := fitjob.GatedRefit(context.Background(), src, opt)
	if err != nil {
		t.Fatal(err)
	}
	fromMemory, err := fitjob.GatedRefit(context.Background(), memSource(as), opt)
	if err != nil {
		t.Fatal(err)
	}
	// The second read starts again, from the ends the topic has now: the
	// record produced during the first read is in (its skill, too thin to
	// fit, is listed and rejected).
	if len(fromTopic.Skills) != 4 || fromTopic.Data.Answers != int64(len(as)+1) {
		t.Fatalf("refit from the topic: %d skills, %+v", len(fromTopic.Skills), fromTopic.Data)
	}
	if sv, ok := fromTopic.Skill("petty-cash"); !ok || sv.Verdict != fitjob.VerdictTooLittleData {
		t.Errorf("petty-cash: %+v", sv)
	}
	for _, m := range fromMemory.Skills {
		sv, _ := fromTopic.Skill(m.Skill)
		if sv.Verdict != m.Verdict || sv.Candidate == nil || m.Candidate == nil || sv.Candidate.Params != m.Candidate.Params {
			t.Errorf("%s: from the topic %s %v, from memory %s %v", m.Skill, sv.Verdict, sv.Candidate, m.Verdict, m.Candidate)
		}
	}
}

type memSource []state.Answer

func (memSource) Name() string { return "memory" }
func (m memSource) Answers(_ context.Context, fn func(state.Answer) error) error {
	for _, a := range m {
		if err := fn(a); err != nil {
			return err
		}
	}
	return nil
}

// Errors: a missing topic names the fix; an error of fn and a cancelled
// context stop the read, return at once and leave no goroutine behind.
func TestTopicSourceErrors(t *testing.T) {
	if _, err := NewTopicSource(TopicSourceOptions{}); !errors.Is(err, ErrTopicSource) || !strings.Contains(err.Error(), "--brokers") {
		t.Errorf("no options: %v", err)
	}
	b := startTestBroker(t, 2)
	src, err := NewTopicSource(TopicSourceOptions{Brokers: []string{b.Addr()}, Topic: "no-such-topic", Logger: testLogger(t)})
	if err != nil {
		t.Fatal(err)
	}
	if err := src.Answers(context.Background(), func(state.Answer) error { return nil }); !errors.Is(err, ErrTopicSource) || !strings.Contains(err.Error(), "fix:") {
		t.Errorf("missing topic: %v", err)
	}
	produce(t, b.Addr(), tAnswers, answerMessages(cohort(1, 50, 5000)))
	base := runtime.NumGoroutine()
	src, _ = NewTopicSource(TopicSourceOptions{Brokers: []string{b.Addr()}, Topic: tAnswers, FetchBytes: 16 << 10, Logger: testLogger(t)})
	stopErr := errors.New("enough")
	n := 0
	if err := src.Answers(context.Background(), func(state.Answer) error {
		if n++; n == 100 {
			return stopErr
		}
		return nil
	}); !errors.Is(err, stopErr) || n != 100 {
		t.Errorf("fn error: %v after %d answers", err, n)
	}
	ctx, cancel := context.WithCancel(context.Background())
	n = 0
	if err := src.Answers(ctx, func(state.Answer) error {
		if n++; n == 50 {
			cancel()
		}
		return nil
	}); !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled: %v", err)
	}
	if got := settleGoroutines(base+2, 5*time.Second); got > base+2 {
		t.Errorf("%d goroutines after the reads, %d before:\n%s", got, base, goroutineDump())
	}
}

// BenchmarkTopicSource reads a history topic of 1,000,000 answers (the
// shape of the refit benchmark: learners × 20 skills × 10 answers, native
// JSON, 4 partitions) from the embedded broker over TCP; answers/s is the
// figure. The broker runs in a child process on the same two cores.
// Run alone: go test -run '^$' -bench TopicSource -benchtime 1x ./stream/
func BenchmarkTopicSource(b *testing.B) {
	if b.N > 1 {
		b.Skip("one pass is the measurement; use -benchtime 1x")
	}
	addr := startBrokerProcess(b)
	msgs := benchHistory(b, 5000)
	t1 := time.Now()
	produce(b, addr, tAnswers, msgs)
	b.Logf("produced %d answers in %v", len(msgs), time.Since(t1).Round(time.Millisecond))
	src, err := NewTopicSource(TopicSourceOptions{Brokers: []string{addr}, Topic: tAnswers, Logger: testLogger(b)})
	if err != nil {
		b.Fatal(err)
	}
	b.ResetTimer()
	n := 0
	if err := src.Answers(context.Background(), func(state.Answer) error { n++; return nil }); err != nil {
		b.Fatal(err)
	}
	b.StopTimer()
	if n != len(msgs) {
		b.Fatalf("read %d of %d", n, len(msgs))
	}
	st := src.Stats()
	b.ReportMetric(float64(n)/b.Elapsed().Seconds(), "answers/s")
	b.ReportMetric(b.Elapsed().Seconds(), "total-s")
	b.ReportMetric(float64(st.Bytes)/b.Elapsed().Seconds()/(1<<20), "MiB/s")
}

// BenchmarkGatedRefitTopic is a whole refit from a history topic: 1,000,000
// answers (5,000 learners × 20 of 200 skills × 10 answers, native JSON, 4
// partitions; ATTAIN_BENCH_TOPIC_LEARNERS=50000 for 10 million) read from the embedded broker over TCP, grouped on disk,
// fitted and gated with the default options. Reports the read rate, the
// total time, the scratch space and the refit's peak RSS (VmHWM reset after
// producing; the in-process broker's memory, holding the topic, is part of
// it). Run alone: go test -run '^$' -bench GatedRefitTopic -benchtime 1x ./stream/
func BenchmarkGatedRefitTopic(b *testing.B) {
	if b.N > 1 {
		b.Skip("one pass is the measurement; use -benchtime 1x")
	}
	addr := startBrokerProcess(b)
	learners := 5000
	if v := os.Getenv("ATTAIN_BENCH_TOPIC_LEARNERS"); v != "" { // 50000 for 10 million answers
		if learners, _ = strconv.Atoi(v); learners < 1 {
			b.Fatalf("ATTAIN_BENCH_TOPIC_LEARNERS=%q: want a positive number", v)
		}
	}
	t1 := time.Now()
	produceMany(b, addr, tAnswers, benchHistory(b, learners))
	b.Logf("produced %d answers in %v", learners*200, time.Since(t1).Round(time.Millisecond))
	src, err := NewTopicSource(TopicSourceOptions{Brokers: []string{addr}, Topic: tAnswers, Logger: testLogger(b)})
	if err != nil {
		b.Fatal(err)
	}
	if v := os.Getenv("ATTAIN_BENCH_MEMLIMIT_MIB"); v != "" { // as GOMEMLIMIT, for the refit only
		mib, err := strconv.Atoi(v)
		if err != nil || mib < 1 {
			b.Fatalf("ATTAIN_BENCH_MEMLIMIT_MIB=%q: want a positive number", v)
		}
		debug.SetMemoryLimit(int64(mib) << 20)
		defer debug.SetMemoryLimit(math.MaxInt64)
	}
	runtime.GC()
	debug.FreeOSMemory()
	reset := os.WriteFile("/proc/self/clear_refs", []byte("5"), 0) == nil
	rss0 := procStatusMiB(b, "VmRSS")
	b.ResetTimer()
	rep, err := fitjob.GatedRefit(context.Background(), src, fitjob.GatedRefitOptions{Sorter: fitjob.SorterOptions{Dir: b.TempDir(), ArrivalOrder: true}})
	if err != nil {
		b.Fatal(err)
	}
	b.StopTimer()
	st := src.Stats()
	b.ReportMetric(float64(st.Answers)/st.Elapsed.Seconds(), "answers/s-read")
	b.ReportMetric(st.Elapsed.Seconds(), "read-s")
	b.ReportMetric(b.Elapsed().Seconds(), "total-s")
	b.ReportMetric(float64(rep.Data.ScratchBytes)/float64(rep.Data.Answers), "scratch-B/answer")
	if reset {
		b.ReportMetric(procStatusMiB(b, "VmHWM"), "peak-RSS-MiB")
	}
	b.ReportMetric(rss0, "RSS-before-MiB")
	b.Logf("%d skills, %d accepted; %d answers of %d learners", len(rep.Skills), rep.Accepted, rep.Data.Answers, rep.Data.Learners)
}

// benchHistory is the refit benchmark's shape (fitjob's
// BenchmarkGatedRefitStore1M) as native JSON messages keyed by learner:
// learners × 20 of 200 skills × 10 answers, outcomes drawn from each
// skill's true BKT parameters (fitjob.PickSkills).
func benchHistory(b *testing.B, learners int) []kafka.Message {
	const skills, skillsEach, opps = 200, 20, 10
	names := make([]string, skills)
	for i := range names {
		names[i] = fmt.Sprintf("skill-%03d", i)
	}
	truth, err := fitjob.PickSkills(fitjob.HarbourLane(), names, 5)
	if err != nil {
		b.Fatal(err)
	}
	msgs := make([]kafka.Message, 0, learners*skillsEach*opps)
	t0 := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC)
	for l := range learners {
		r := rand.New(rand.NewPCG(77, uint64(l)))
		id := fmt.Sprintf("bench-%06d", l)
		n := 0
		for _, s := range r.Perm(skills)[:skillsEach] {
			p := truth[s].Params
			mastered := r.Float64() < p.Prior
			for range opps {
				var correct bool
				if mastered {
					correct = r.Float64() >= p.Slip
				} else {
					correct = r.Float64() < p.Guess
					mastered = r.Float64() < p.Learn
				}
				n++
				msgs = append(msgs, kafka.Message{Key: []byte(id), Value: answerJSON(state.Answer{
					ID: fmt.Sprintf("%s-%d", id, n), Learner: id, Skills: []string{names[s]},
					Correct: correct, At: t0.Add(time.Duration(l*1000+n) * time.Minute),
				})})
			}
		}
	}
	return msgs
}

// procStatusMiB reads a "Vm…: N kB" line of /proc/self/status, in MiB.
func procStatusMiB(b *testing.B, field string) float64 {
	raw, err := os.ReadFile("/proc/self/status")
	if err != nil {
		b.Skip("no /proc/self/status")
	}
	for _, line := range strings.Split(string(raw), "\n") {
		if rest, ok := strings.CutPrefix(line, field+":"); ok {
			kb, err := strconv.Atoi(strings.TrimSpace(strings.TrimSuffix(strings.TrimSpace(rest), "kB")))
			if err != nil {
				b.Fatal(err)
			}
			return float64(kb) / 1024
		}
	}
	b.Fatalf("no %s in /proc/self/status", field)
	return 0
}

const brokerChildEnv = "STREAM_TEST_BROKER_CHILD"

// TestBrokerChildProcess is not a test: it is the broker process of the
// topic benchmarks, so that the broker's memory and garbage collection do
// not count in the refit's. It starts the embedded broker on a free port
// with the test topics (answers: 4 partitions), prints the address, and
// runs until its standard input closes.
func TestBrokerChildProcess(t *testing.T) {
	if os.Getenv(brokerChildEnv) == "" {
		return
	}
	b, err := StartBroker(BrokerOptions{Addr: "127.0.0.1:0", Logger: zerolog.Nop()})
	if err != nil {
		fmt.Println("error:", err)
		os.Exit(1)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	err = EnsureTopics(ctx, []string{b.Addr()}, Topics(tAnswers, tMastery, tDeadLetter, tParams, 4), zerolog.Nop())
	cancel()
	if err != nil {
		fmt.Println("error:", err)
		os.Exit(1)
	}
	fmt.Println(b.Addr())
	io.Copy(io.Discard, os.Stdin)
	b.Close()
	os.Exit(0)
}

// startBrokerProcess runs TestBrokerChildProcess in a child process and
// returns its address; the child ends with the benchmark.
func startBrokerProcess(b *testing.B) string {
	b.Helper()
	cmd := exec.Command(os.Args[0], "-test.run=^TestBrokerChildProcess$")
	cmd.Env = append(os.Environ(), brokerChildEnv+"=1")
	stdin, err := cmd.StdinPipe()
	if err != nil {
		b.Fatal(err)
	}
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		b.Fatal(err)
	}
	cmd.Stderr = os.Stderr
	if err := cmd.Start(); err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() {
		stdin.Close()
		cmd.Wait()
	})
	line, err := bufio.NewReader(stdout).ReadString('\n')
	if err != nil || strings.HasPrefix(line, "error:") {
		b.Fatalf("broker process: %q, %v", line, err)
	}
	return strings.TrimSpace(line)
}

// produceMany is produce without its one-minute limit, for the 10-million
// answer benchmarks.
func produceMany(b *testing.B, addr, topic string, msgs []kafka.Message) {
	b.Helper()
	tr := &kafka.Transport{}
	defer tr.CloseIdleConnections()
	w := &kafka.Writer{
		Addr: kafka.TCP(addr), Topic: topic, Balancer: kafka.Murmur2Balancer{},
		RequiredAcks: kafka.RequireAll, BatchSize: 1000, BatchTimeout: time.Millisecond, Transport: tr,
	}
	defer w.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Minute)
	defer cancel()
	for len(msgs) > 0 {
		n := min(len(msgs), 5000)
		if err := w.WriteMessages(ctx, msgs[:n]...); err != nil {
			b.Fatalf("producing to %s: %v", topic, err)
		}
		msgs = msgs[n:]
	}
}
