package stream

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math/rand/v2"
	"runtime"
	"strings"
	"testing"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/state"
)

// Test topics; each test gets its own broker, so the names can be fixed.
const (
	tAnswers    = "answers"
	tMastery    = "attain.mastery"
	tDeadLetter = "attain.deadletter"
	tParams     = "attain.params"
)

// testLogger writes to the test log when -v is given, else nowhere.
func testLogger(t testing.TB) zerolog.Logger {
	if testing.Verbose() {
		// Milliseconds in the time stamps (zerolog's own Timestamp has
		// whole seconds), to follow rebalances and commits.
		cw := zerolog.ConsoleWriter{Out: tlogWriter{t}, NoColor: true, TimeFormat: "15:04:05.000"}
		return zerolog.New(cw).Level(zerolog.InfoLevel).Hook(zerolog.HookFunc(func(e *zerolog.Event, _ zerolog.Level, _ string) {
			e.Str(zerolog.TimestampFieldName, time.Now().Format(time.RFC3339Nano))
		}))
	}
	return zerolog.New(io.Discard)
}

type tlogWriter struct{ t testing.TB }

func (w tlogWriter) Write(b []byte) (int, error) {
	w.t.Log(strings.TrimRight(string(b), "\n"))
	return len(b), nil
}

// startTestBroker starts the embedded broker on a free 127.0.0.1 port with
// the four topics, answers having partitions partitions.
func startTestBroker(t testing.TB, partitions int) *Broker {
	t.Helper()
	b, err := StartBroker(BrokerOptions{Addr: "127.0.0.1:0", Logger: testLogger(t)})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(b.Close)
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	if err := EnsureTopics(ctx, []string{b.Addr()}, Topics(tAnswers, tMastery, tDeadLetter, tParams, partitions), testLogger(t)); err != nil {
		t.Fatal(err)
	}
	return b
}

func openTestStore(t testing.TB, dir string) *state.Store {
	t.Helper()
	st, err := state.OpenStore(dir, state.StoreOptions{Logger: testLogger(t)})
	if err != nil {
		t.Fatal(err)
	}
	return st
}

// produce writes msgs to topic with kafka-go, key → partition by murmur2
// (as the Java client does).
func produce(t testing.TB, addr, topic string, msgs []kafka.Message) {
	t.Helper()
	tr := &kafka.Transport{}
	defer tr.CloseIdleConnections()
	w := &kafka.Writer{
		Addr: kafka.TCP(addr), Topic: topic, Balancer: kafka.Murmur2Balancer{},
		RequiredAcks: kafka.RequireAll, BatchSize: 1000, BatchTimeout: time.Millisecond, Transport: tr,
	}
	defer w.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	for len(msgs) > 0 {
		n := min(len(msgs), 5000)
		if err := w.WriteMessages(ctx, msgs[:n]...); err != nil {
			t.Fatalf("producing to %s: %v", topic, err)
		}
		msgs = msgs[n:]
	}
}

// readAll returns every message of topic, all partitions, up to the end
// each partition has now.
func readAll(t testing.TB, addr, topic string) []kafka.Message {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	tr := &kafka.Transport{}
	defer tr.CloseIdleConnections()
	cl := &kafka.Client{Addr: kafka.TCP(addr), Transport: tr}
	parts, err := topicPartitions(ctx, cl, topic)
	if err != nil {
		t.Fatal(err)
	}
	var out []kafka.Message
	for _, p := range parts {
		first, last, err := partitionBounds(ctx, cl, topic, p)
		if err != nil {
			t.Fatal(err)
		}
		if last <= first {
			continue
		}
		r := kafka.NewReader(kafka.ReaderConfig{Brokers: []string{addr}, Topic: topic, Partition: p, MaxBytes: 8 << 20, MaxWait: 100 * time.Millisecond})
		if err := r.SetOffset(first); err != nil {
			t.Fatal(err)
		}
		for {
			m, err := r.FetchMessage(ctx)
			if err != nil {
				r.Close()
				t.Fatalf("reading %s/%d: %v", topic, p, err)
			}
			out = append(out, m)
			if m.Offset+1 >= last {
				break
			}
		}
		r.Close()
	}
	return out
}

// runningProcessor is a Processor (with its Publisher) running in a
// goroutine owned by the test.
type runningProcessor struct {
	proc   *Processor
	pub    *Publisher
	m      *Metrics
	cancel context.CancelFunc
	done   chan error
}

func startProcessor(t testing.TB, addr string, st *state.Store, reg *state.Registry, opt ProcessorOptions) *runningProcessor {
	t.Helper()
	m := NewMetrics()
	pub, err := NewPublisher(st, m, PublisherOptions{
		Brokers: []string{addr}, MasteryTopic: tMastery, DeadLetterTopic: tDeadLetter,
		Source: Source("attain"), Logger: testLogger(t),
	})
	if err != nil {
		t.Fatal(err)
	}
	opt.Brokers = []string{addr}
	if opt.Group == "" {
		opt.Group = "attain"
	}
	opt.Topic = tAnswers
	opt.Logger = testLogger(t)
	if opt.SessionTimeout == 0 {
		opt.SessionTimeout = 2 * time.Second
	}
	if opt.HeartbeatInterval == 0 {
		// Frequent heartbeats: members see a rebalance sooner (the
		// processor's default is a third of the session timeout).
		opt.HeartbeatInterval = opt.SessionTimeout / 10
	}
	proc, err := NewProcessor(st, reg, pub, m, opt)
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	rp := &runningProcessor{proc: proc, pub: pub, m: m, cancel: cancel, done: make(chan error, 1)}
	go func() { rp.done <- proc.Run(ctx) }()
	return rp
}

// stop shuts the processor down and closes its publisher.
func (rp *runningProcessor) stop(t testing.TB) {
	t.Helper()
	rp.cancel()
	select {
	case err := <-rp.done:
		if err != nil {
			t.Errorf("processor: %v", err)
		}
	case <-time.After(30 * time.Second):
		t.Fatal("processor did not stop within 30 s")
	}
	if err := rp.pub.Close(); err != nil {
		t.Error(err)
	}
}

// waitFor polls cond until it holds or timeout passes.
func waitFor(t testing.TB, timeout time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(timeout)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %v waiting for %s", timeout, what)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// answerJSON is the native v1 event of a.
func answerJSON(a state.Answer) []byte {
	b, err := json.Marshal(map[string]any{
		"id": a.ID, "learner": a.Learner, "item": a.Item, "skills": a.Skills, "correct": a.Correct,
		"at": a.At.UTC().Format(time.RFC3339Nano),
	})
	if err != nil {
		panic(err)
	}
	return b
}

// The skills of the invented demo scenario (ARCHITECTURE.md).
var testSkills = []string{"journal-entries", "trial-balance", "bank-reconciliation", "straight-line-depreciation", "sales-tax-invoices", "payroll-deductions"}

// cohort simulates n answers of learners learners, in time order, with
// roughly one in fifty resent with the same id (a producer retry) and one
// in eight tagged with two skills.
func cohort(seed uint64, learners, n int) []state.Answer {
	rng := rand.New(rand.NewPCG(seed, 7))
	t0 := time.Date(2025, 3, 1, 18, 0, 0, 0, time.UTC)
	skill := make([]float64, learners) // a crude ability per learner
	for i := range skill {
		skill[i] = 0.3 + 0.6*rng.Float64()
	}
	out := make([]state.Answer, 0, n)
	for i := 0; len(out) < n; i++ {
		if len(out) > 0 && rng.IntN(50) == 0 {
			out = append(out, out[len(out)-1-rng.IntN(min(len(out), 20))]) // a recent answer delivered again
			continue
		}
		l := rng.IntN(learners)
		a := state.Answer{
			ID:      fmt.Sprintf("ans-%06d", i),
			Learner: fmt.Sprintf("learner-%04d", l),
			Item:    fmt.Sprintf("item-%03d", rng.IntN(300)),
			Skills:  []string{testSkills[rng.IntN(len(testSkills))]},
			Correct: rng.Float64() < skill[l],
			At:      t0.Add(time.Duration(i) * time.Second),
		}
		if rng.IntN(8) == 0 {
			if s := testSkills[rng.IntN(len(testSkills))]; s != a.Skills[0] {
				a.Skills = append(a.Skills, s)
			}
		}
		out = append(out, a)
	}
	return out
}

// expected computes every learner's records and outputs by running
// state.Record.Apply over the learner's answers in order, skipping ids
// already applied for that learner (as the store's id window does for
// nearby resends).
func expected(answers []state.Answer, pf *state.ParamFile, pol state.Policy) (map[string]map[string]state.Record, map[string]state.Kind) {
	recs := map[string]map[string]state.Record{}
	seen := map[string]map[string]bool{}
	ids := map[string]state.Kind{}
	for _, a := range answers {
		if seen[a.Learner] == nil {
			seen[a.Learner] = map[string]bool{}
			recs[a.Learner] = map[string]state.Record{}
		}
		if seen[a.Learner][a.ID] {
			continue
		}
		seen[a.Learner][a.ID] = true
		for _, s := range a.Skills {
			p, v := pf.For(s)
			r, ok := recs[a.Learner][s]
			if !ok {
				r = state.NewRecord(p, v)
			}
			o := r.Apply(p, a.Correct, a.At.UnixNano(), pol)
			if o.Reached {
				ids[state.EventID(a.Learner, s, state.KindReached, r.Opportunities)] = state.KindReached
			}
			if o.Stuck {
				ids[state.EventID(a.Learner, s, state.KindStuck, r.Opportunities)] = state.KindStuck
			}
			recs[a.Learner][s] = r
		}
	}
	return recs, ids
}

func answerMessages(answers []state.Answer) []kafka.Message {
	msgs := make([]kafka.Message, len(answers))
	for i, a := range answers {
		msgs[i] = kafka.Message{Key: []byte(a.Learner), Value: answerJSON(a)}
	}
	return msgs
}

// goroutines returns the number of goroutines once it has stopped falling
// (connections wind down asynchronously), within grace.
func settleGoroutines(limit int, grace time.Duration) int {
	deadline := time.Now().Add(grace)
	n := runtime.NumGoroutine()
	for n > limit && time.Now().Before(deadline) {
		time.Sleep(50 * time.Millisecond)
		runtime.GC()
		n = runtime.NumGoroutine()
	}
	return n
}

func goroutineDump() string {
	buf := make([]byte, 1<<20)
	return string(buf[:runtime.Stack(buf, true)])
}

// logEnds returns the end offset of each partition of topic, by partition.
func logEnds(t testing.TB, addr, topic string) map[int]int64 {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	tr := &kafka.Transport{}
	defer tr.CloseIdleConnections()
	cl := &kafka.Client{Addr: kafka.TCP(addr), Transport: tr}
	parts, err := topicPartitions(ctx, cl, topic)
	if err != nil {
		t.Fatal(err)
	}
	ends := map[int]int64{}
	for _, p := range parts {
		_, last, err := partitionBounds(ctx, cl, topic, p)
		if err != nil {
			t.Fatal(err)
		}
		ends[p] = last
	}
	return ends
}
