package stream

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"
	"github.com/twmb/franz-go/pkg/kgo"
	"github.com/twmb/franz-go/pkg/kmsg"

	"github.com/attain-dev/attain/state"
)

// TestStartLatest: with consumer.start = latest and no stored offset, the
// answers already on the topic are not read; later ones are.
func TestStartLatest(t *testing.T) {
	b := startTestBroker(t, 1)
	answers := cohort(3, 20, 150)
	produce(t, b.Addr(), tAnswers, answerMessages(answers[:100]))
	st := openTestStore(t, t.TempDir())
	defer st.Close()
	rp := startProcessor(t, b.Addr(), st, state.NewRegistry(nil), ProcessorOptions{Start: "latest"})
	waitFor(t, 20*time.Second, "partition resumed", rp.m.Ready)
	produce(t, b.Addr(), tAnswers, answerMessages(answers[100:]))
	waitFor(t, 20*time.Second, "the new answers consumed", func() bool { return rp.m.Consumed.Load() == 50 })
	rp.stop(t)
	checkOffsetsCommitted(t, b.Addr(), st)
	if got := rp.m.Consumed.Load(); got != 50 {
		t.Errorf("consumed %d, want the 50 produced after the start", got)
	}
}

// TestStoredOffsetBelowLogStart: answers deleted from the log before this
// instance read them are detected, counted and skipped; the rest is read.
func TestStoredOffsetBelowLogStart(t *testing.T) {
	b := startTestBroker(t, 1)
	answers := cohort(4, 20, 150)
	produce(t, b.Addr(), tAnswers, answerMessages(answers[:100]))
	dir := t.TempDir()
	st := openTestStore(t, dir)
	rp := startProcessor(t, b.Addr(), st, state.NewRegistry(nil), ProcessorOptions{})
	waitFor(t, 20*time.Second, "100 answers consumed", func() bool { return rp.m.Consumed.Load() == 100 })
	rp.stop(t)

	// While the instance is down, 50 more arrive and retention deletes
	// everything below offset 130.
	produce(t, b.Addr(), tAnswers, answerMessages(answers[100:]))
	deleteRecords(t, b.Addr(), tAnswers, 0, 130)

	rp = startProcessor(t, b.Addr(), st, state.NewRegistry(nil), ProcessorOptions{})
	waitFor(t, 20*time.Second, "the remaining answers consumed", func() bool { return rp.m.Consumed.Load() == 20 })
	rp.stop(t)
	if got := rp.proc.Skipped(); got != 30 {
		t.Errorf("Skipped() = %d, want 30 (offsets 100-129)", got)
	}
	if got := rp.m.SkippedOffsets.Load(); got != 30 {
		t.Errorf("SkippedOffsets = %d, want 30", got)
	}
	if got := rp.m.Committed.Load(); got != 20 {
		t.Errorf("Committed = %d, want the 20 messages read", got)
	}
	checkOffsetsCommitted(t, b.Addr(), st)
	st.Close()
}

// deleteRecords moves the log start of topic/partition to offset, as
// retention would (DeleteRecords, sent with franz-go's client since
// kafka-go has no such call).
func deleteRecords(t *testing.T, addr, topic string, partition int32, offset int64) {
	t.Helper()
	cl, err := kgo.NewClient(kgo.SeedBrokers(addr))
	if err != nil {
		t.Fatal(err)
	}
	defer cl.Close()
	req := kmsg.NewPtrDeleteRecordsRequest()
	rt := kmsg.NewDeleteRecordsRequestTopic()
	rt.Topic = topic
	rp := kmsg.NewDeleteRecordsRequestTopicPartition()
	rp.Partition, rp.Offset = partition, offset
	rt.Partitions = append(rt.Partitions, rp)
	req.Topics = append(req.Topics, rt)
	req.TimeoutMillis = 5000
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	resp, err := req.RequestWith(ctx, cl)
	if err != nil {
		t.Fatal(err)
	}
	for _, rt := range resp.Topics {
		for _, p := range rt.Partitions {
			if p.ErrorCode != 0 || p.LowWatermark != offset {
				t.Fatalf("DeleteRecords %s/%d: error code %d, low watermark %d", topic, p.Partition, p.ErrorCode, p.LowWatermark)
			}
		}
	}
}

// TestPublishRetry: while the mastery topic does not exist, publishing
// fails; consumption goes on, the outbox keeps the events, and once the
// topic exists they are all published.
func TestPublishRetry(t *testing.T) {
	b, err := StartBroker(BrokerOptions{Addr: "127.0.0.1:0", Logger: testLogger(t)})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	all := Topics(tAnswers, tMastery, tDeadLetter, tParams, 2)
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	var noMastery []TopicSpec
	for _, s := range all {
		if s.Name != tMastery {
			noMastery = append(noMastery, s)
		}
	}
	if err := EnsureTopics(ctx, []string{b.Addr()}, noMastery, testLogger(t)); err != nil {
		t.Fatal(err)
	}
	answers := cohort(5, 30, 1500)
	produce(t, b.Addr(), tAnswers, answerMessages(answers))
	st := openTestStore(t, t.TempDir())
	defer st.Close()
	rp := startProcessor(t, b.Addr(), st, state.NewRegistry(nil), ProcessorOptions{})
	waitFor(t, 30*time.Second, "every answer consumed and committed, events waiting in the outbox", func() bool {
		return rp.m.Consumed.Load() == int64(len(answers)) && rp.m.Commits.Load() >= 2 && st.OutboxDepth() > 0
	})
	time.Sleep(time.Second) // a few failed attempts
	if rp.m.PublishedReached.Load() != 0 {
		t.Fatalf("%d events published to a topic that does not exist", rp.m.PublishedReached.Load())
	}
	if err := EnsureTopics(ctx, []string{b.Addr()}, all, testLogger(t)); err != nil {
		t.Fatal(err)
	}
	waitFor(t, 40*time.Second, "the outbox published", func() bool { return st.OutboxDepth() == 0 })
	rp.stop(t)
	_, wantIDs := expected(answers, state.NewParamFile(), state.DefaultPolicy())
	got := map[string]bool{}
	for _, m := range readAll(t, b.Addr(), tMastery) {
		var ce CloudEvent
		if err := json.Unmarshal(m.Value, &ce); err != nil {
			t.Fatal(err)
		}
		got[ce.ID] = true
	}
	for id := range wantIDs {
		if !got[id] {
			t.Errorf("event %s missing", id)
		}
	}
	if len(wantIDs) == 0 {
		t.Fatal("no events expected; the test proves nothing")
	}
}

// TestParamsFollow: the follower reads the params topic to its end at
// start, swaps the set in, and swaps in a newer version published later;
// records touched afterwards are re-derived under it.
func TestParamsFollow(t *testing.T) {
	b := startTestBroker(t, 2)
	v2 := state.SkillParams{Params: state.Params{Prior: 0.2, Learn: 0.25, Guess: 0.15, Slip: 0.08}, Version: 2}
	produceParams(t, b.Addr(), map[string]state.SkillParams{"trial-balance": v2})

	reg := state.NewRegistry(nil)
	m := NewMetrics()
	f := NewParamsFollower(reg, m, ParamsFollowerOptions{Brokers: []string{b.Addr()}, Topic: tParams, Quiet: 50 * time.Millisecond, Logger: testLogger(t)})
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	if err := f.Start(ctx); err != nil {
		t.Fatal(err)
	}
	defer f.Stop()
	if v := reg.Current().Version; v != 2 || m.ParamsVersion.Load() != 2 {
		t.Fatalf("after start: registry version %d, metric %d; want 2", v, m.ParamsVersion.Load())
	}
	if p, v := reg.Current().For("trial-balance"); p != v2.Params || v != 2 {
		t.Fatalf("trial-balance: %v v%d, want %v v2", p, v, v2.Params)
	}

	// Answers under version 2, then version 3 arrives for two skills (one
	// refit = one swap), then one more answer for every learner-skill.
	st := openTestStore(t, t.TempDir())
	defer st.Close()
	first := cohort(6, 25, 800)
	produce(t, b.Addr(), tAnswers, answerMessages(first))
	rp := startProcessor(t, b.Addr(), st, reg, ProcessorOptions{})
	waitFor(t, 20*time.Second, "first answers consumed", func() bool { return rp.m.Consumed.Load() == int64(len(first)) })

	v3a := state.SkillParams{Params: state.Params{Prior: 0.35, Learn: 0.2, Guess: 0.2, Slip: 0.1}, Version: 3}
	v3b := state.SkillParams{Params: state.Params{Prior: 0.1, Learn: 0.05, Guess: 0.25, Slip: 0.2}, Version: 3}
	produceParams(t, b.Addr(), map[string]state.SkillParams{"trial-balance": v3a, "payroll-deductions": v3b})
	waitFor(t, 10*time.Second, "version 3 swapped in", func() bool { return reg.Current().Version == 3 })
	if got := reg.Swaps(); got != 2 {
		t.Errorf("%d swaps, want 2 (start, then one for version 3)", got)
	}

	var second []state.Answer
	seen := map[[2]string]bool{}
	at := first[len(first)-1].At
	for _, a := range first {
		for _, s := range a.Skills {
			k := [2]string{a.Learner, s}
			if !seen[k] {
				seen[k] = true
				at = at.Add(time.Second)
				second = append(second, state.Answer{ID: fmt.Sprintf("after-%d", len(second)), Learner: a.Learner, Skills: []string{s}, Correct: true, At: at})
			}
		}
	}
	produce(t, b.Addr(), tAnswers, answerMessages(second))
	waitFor(t, 20*time.Second, "second answers consumed", func() bool { return rp.m.Consumed.Load() == int64(len(first)+len(second)) })
	rp.stop(t)

	if rp.m.Rederived.Load() == 0 {
		t.Error("no record re-derived after the swap")
	}
	// Every record was touched after the swap, so each equals the whole
	// sequence computed under the final set (re-derivation replays the
	// history under it, then applies the new answer).
	want, _ := expected(append(first, second...), reg.Current(), state.DefaultPolicy())
	for learner, skills := range want {
		got, _, err := st.Learner(learner)
		if err != nil {
			t.Fatal(err)
		}
		for skill, w := range skills {
			g := got[skill]
			if g.ParamsVersion != w.ParamsVersion || g.Opportunities != w.Opportunities || g.Correct != w.Correct ||
				!nearlyEqual(g.Mastery, w.Mastery) || g.Mastered != w.Mastered {
				t.Errorf("%s/%s: got %+v, want %+v", learner, skill, g, w)
			}
		}
	}
}

// nearlyEqual compares masteries computed along two paths (re-derivation from
// stored history and a straight run): equal up to rounding.
func nearlyEqual(a, b float64) bool { return a-b < 1e-12 && b-a < 1e-12 }

// produceParams writes skill parameter messages to the params topic.
func produceParams(t *testing.T, addr string, skills map[string]state.SkillParams) {
	t.Helper()
	var msgs []kafka.Message
	for skill, sp := range skills {
		v, err := json.Marshal(sp)
		if err != nil {
			t.Fatal(err)
		}
		msgs = append(msgs, kafka.Message{Key: []byte(skill), Value: v})
	}
	produce(t, addr, tParams, msgs)
}

// TestDrainFenced: once the owning generation has ended, the publisher
// sends nothing and leaves the outbox as it is.
func TestDrainFenced(t *testing.T) {
	b := startTestBroker(t, 1)
	st := openTestStore(t, t.TempDir())
	defer st.Close()
	pt, err := st.Partition(0)
	if err != nil {
		t.Fatal(err)
	}
	at := time.Date(2025, 3, 1, 18, 0, 0, 0, time.UTC)
	for i := range 12 {
		a := state.Answer{ID: fmt.Sprint(i), Learner: "learner-1", Skills: []string{"trial-balance"}, Correct: i%3 != 0, At: at.Add(time.Duration(i) * time.Minute)}
		if _, err := pt.Apply(a, int64(i), state.NewParamFile()); err != nil {
			t.Fatal(err)
		}
	}
	if err := pt.DeadLetter(state.DeadLetter{Raw: []byte("x"), Topic: tAnswers, Offset: 12, Reason: "malformed: x"}, 12); err != nil {
		t.Fatal(err)
	}
	if err := pt.Commit(true); err != nil {
		t.Fatal(err)
	}
	pt.Release()
	depth := st.OutboxDepth()
	if depth < 2 {
		t.Fatalf("outbox depth %d; the test needs a stuck event and a dead letter", depth)
	}
	m := NewMetrics()
	pub, err := NewPublisher(st, m, PublisherOptions{Brokers: []string{b.Addr()}, MasteryTopic: tMastery, DeadLetterTopic: tDeadLetter, Source: Source("attain"), Logger: testLogger(t)})
	if err != nil {
		t.Fatal(err)
	}
	defer pub.Close()
	ended, cancel := context.WithCancel(context.Background())
	cancel()
	if n, err := pub.Drain(ended, 0); !errors.Is(err, ErrFenced) || n != 0 {
		t.Errorf("Drain with an ended generation = %d, %v; want 0, ErrFenced", n, err)
	}
	if st.OutboxDepth() != depth || len(readAll(t, b.Addr(), tMastery)) != 0 || len(readAll(t, b.Addr(), tDeadLetter)) != 0 {
		t.Fatal("a fenced drain changed the outbox or wrote to the topics")
	}
	n, err := pub.Drain(context.Background(), 0)
	if err != nil || int64(n) != depth || st.OutboxDepth() != 0 {
		t.Fatalf("Drain = %d, %v; outbox depth %d; want %d entries sent", n, err, st.OutboxDepth(), depth)
	}
	if got := int64(len(readAll(t, b.Addr(), tMastery)) + len(readAll(t, b.Addr(), tDeadLetter))); got != depth {
		t.Errorf("%d messages on the topics, want %d", got, depth)
	}
}

// TestCaughtUpCommit: a partition that has read to the end of its log
// commits what it holds at once instead of at the batch's deadline (here
// an hour away), and its outputs are published; while it is behind, it
// batches (fewer commits than fetched chunks).
func TestCaughtUpCommit(t *testing.T) {
	b := startTestBroker(t, 1)
	answers := cohort(6, 30, 5000)
	produce(t, b.Addr(), tAnswers, answerMessages(answers[:4950]))
	st := openTestStore(t, t.TempDir())
	defer st.Close()
	rp := startProcessor(t, b.Addr(), st, state.NewRegistry(nil), ProcessorOptions{BatchInterval: time.Hour, BatchMaxAnswers: 1 << 20})
	defer rp.stop(t)
	waitFor(t, 20*time.Second, "the first answers committed", func() bool { return rp.m.Committed.Load() == 4950 })
	if c := rp.m.Commits.Load(); c >= 4950/chunkMessages {
		t.Errorf("%d commits for 4950 answers read behind the log's end, want fewer than the %d chunks", c, 4950/chunkMessages)
	}
	produce(t, b.Addr(), tAnswers, answerMessages(answers[4950:]))
	waitFor(t, 20*time.Second, "the later answers committed", func() bool { return rp.m.Committed.Load() == 5000 })
	waitFor(t, 20*time.Second, "the outbox published", func() bool { return st.OutboxDepth() == 0 })
	if rp.m.PublishedReached.Load()+rp.m.PublishedStuck.Load() == 0 {
		t.Error("no output published: the test checks nothing about publishing")
	}
}
