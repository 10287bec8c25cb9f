package stream

import (
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/state"
)

// TestEndToEnd runs thousands of answers across four partitions through
// the processor and checks every learner's final records against
// state.Record.Apply run in order over that learner's answers, and the
// mastery topic against the reached/stuck outcomes of the same run.
func TestEndToEnd(t *testing.T) {
	b := startTestBroker(t, 4)
	answers := cohort(1, 150, 6000)
	produce(t, b.Addr(), tAnswers, answerMessages(answers))

	before := settleGoroutines(0, 0)
	st := openTestStore(t, t.TempDir())
	reg := state.NewRegistry(nil)
	rp := startProcessor(t, b.Addr(), st, reg, ProcessorOptions{})
	waitFor(t, 60*time.Second, "every answer consumed and published", func() bool {
		return rp.m.Consumed.Load() == int64(len(answers)) && st.OutboxDepth() == 0 && rp.m.Ready()
	})
	rp.stop(t)

	wantRecs, wantIDs := expected(answers, reg.Current(), state.DefaultPolicy())
	if got := rp.m.Applied.Load() + rp.m.Duplicates.Load(); got != int64(len(answers)) {
		t.Errorf("applied %d + duplicates %d = %d, want %d", rp.m.Applied.Load(), rp.m.Duplicates.Load(), got, len(answers))
	}
	if got := rp.m.Committed.Load(); got != int64(len(answers)) {
		t.Errorf("Committed = %d after shutdown, want every message read (%d)", got, len(answers))
	}
	if rp.m.DeadLettered.Load() != 0 {
		t.Errorf("dead-lettered %d good answers", rp.m.DeadLettered.Load())
	}
	for learner, want := range wantRecs {
		got, ok, err := st.Learner(learner)
		if err != nil || !ok {
			t.Fatalf("Learner(%s) = ok %v, err %v", learner, ok, err)
		}
		if len(got) != len(want) {
			t.Errorf("%s: %d skills, want %d", learner, len(got), len(want))
		}
		for skill, w := range want {
			if g := got[skill]; g != w {
				t.Errorf("%s/%s: got %+v, want %+v", learner, skill, g, w)
			}
		}
	}

	// Every expected event is on the mastery topic, as a CloudEvent, and
	// nothing else is.
	events := readAll(t, b.Addr(), tMastery)
	gotIDs := map[string]bool{}
	for _, m := range events {
		var ce CloudEvent
		if err := json.Unmarshal(m.Value, &ce); err != nil {
			t.Fatalf("mastery message at %d/%d is not JSON: %v", m.Partition, m.Offset, err)
		}
		checkCloudEvent(t, ce, string(m.Key))
		kind, ok := wantIDs[ce.ID]
		if !ok {
			t.Errorf("unexpected event %s (%s %s)", ce.ID, ce.Type, ce.Subject)
			continue
		}
		if ce.Type != kind.EventType() {
			t.Errorf("event %s: type %s, want %s", ce.ID, ce.Type, kind.EventType())
		}
		gotIDs[ce.ID] = true
	}
	for id := range wantIDs {
		if !gotIDs[id] {
			t.Errorf("event %s (%s) missing from the mastery topic", id, wantIDs[id].EventType())
		}
	}
	var reached, stuck int
	for _, k := range wantIDs {
		if k == state.KindReached {
			reached++
		} else {
			stuck++
		}
	}
	if reached == 0 || stuck == 0 {
		t.Errorf("the cohort produced %d reached and %d stuck events; the test needs both", reached, stuck)
	}
	if int64(reached) > rp.m.PublishedReached.Load() || int64(stuck) > rp.m.PublishedStuck.Load() {
		t.Errorf("published %d reached / %d stuck, want at least %d / %d", rp.m.PublishedReached.Load(), rp.m.PublishedStuck.Load(), reached, stuck)
	}
	t.Logf("%d answers, %d learners, %d events (%d reached, %d stuck), %d commits", len(answers), len(wantRecs), len(events), reached, stuck, rp.m.Commits.Load())

	// Every offset is committed in the store.
	checkOffsetsCommitted(t, b.Addr(), st)
	if err := st.Close(); err != nil {
		t.Fatal(err)
	}
	if after := settleGoroutines(before, 10*time.Second); after > before {
		t.Errorf("goroutines: %d before the processor, %d after it stopped\n%s", before, after, goroutineDump())
	}
}

// checkCloudEvent checks the envelope of a mastery event.
func checkCloudEvent(t *testing.T, ce CloudEvent, key string) {
	t.Helper()
	if ce.SpecVersion != "1.0" || ce.Source != Source("attain") || ce.DataContentType != "application/json" || ce.Time.IsZero() {
		t.Errorf("event %s: bad envelope %+v", ce.ID, ce)
	}
	if ce.Type != state.KindReached.EventType() && ce.Type != state.KindStuck.EventType() {
		t.Errorf("event %s: type %q", ce.ID, ce.Type)
	}
	var d MasteryData
	if err := json.Unmarshal(ce.Data, &d); err != nil {
		t.Fatalf("event %s: data: %v", ce.ID, err)
	}
	if d.Learner != ce.Subject || key != d.Learner {
		t.Errorf("event %s: subject %q, data.learner %q, key %q", ce.ID, ce.Subject, d.Learner, key)
	}
	kind := state.KindReached
	if ce.Type == state.KindStuck.EventType() {
		kind = state.KindStuck
	}
	if id := state.EventID(d.Learner, d.Skill, kind, d.Opportunities); id != ce.ID {
		t.Errorf("event id %s, want EventID(...) = %s", ce.ID, id)
	}
	if d.AnswerID == "" || d.ParamsVersion < 1 || d.Opportunities < 1 || d.Mastery < 0 || d.Mastery > 1 {
		t.Errorf("event %s: bad data %+v", ce.ID, d)
	}
	if kind == state.KindReached && d.Mastery < state.DefaultPolicy().Threshold {
		t.Errorf("reached event %s with mastery %v below the threshold", ce.ID, d.Mastery)
	}
}

// checkOffsetsCommitted checks that every partition of the answers topic
// has its stored next offset at the end of its log.
// assignedSome reports whether m's member holds partitions of the current
// generation and all of them have resumed.
func assignedSome(m *Metrics) bool {
	m.mu.Lock()
	n := len(m.mu.assigned)
	m.mu.Unlock()
	return n > 0 && m.Ready()
}

func checkOffsetsCommitted(t *testing.T, addr string, st *state.Store) {
	t.Helper()
	ends := logEnds(t, addr, tAnswers)
	for p, end := range ends {
		pt, err := st.Partition(int32(p))
		if err != nil {
			t.Fatal(err)
		}
		next, ok := pt.NextOffset()
		pt.Release()
		if end > 0 && (!ok || next != end) {
			t.Errorf("partition %d: stored next offset %d (ok %v), log end %d", p, next, ok, end)
		}
	}
}

// TestBadInput sends each kind of bad event between good ones and checks
// that each is dead-lettered with its reason and field, byte for byte,
// while the good ones around it are applied and every offset committed.
func TestBadInput(t *testing.T) {
	b := startTestBroker(t, 1)
	at := time.Date(2025, 3, 1, 18, 0, 0, 0, time.UTC)
	good := func(i int) []byte {
		return answerJSON(state.Answer{ID: fmt.Sprintf("g%d", i), Learner: "learner-1", Skills: []string{"trial-balance"}, Correct: i%2 == 0, At: at.Add(time.Duration(i) * time.Minute)})
	}
	bad := []struct {
		name, value, code, field string
	}{
		{"malformed JSON", `{"id": "b1", "learner": `, ReasonMalformed, ""},
		{"not an object", `[1, 2, 3]`, ReasonMalformed, ""},
		{"missing field", `{"id":"b3","learner":"learner-1","skills":["trial-balance"],"at":"2025-03-01T18:00:00Z"}`, ReasonInvalid, "correct"},
		{"wrong type", `{"id":"b4","learner":"learner-1","skills":["trial-balance"],"correct":"yes","at":"2025-03-01T18:00:00Z"}`, ReasonInvalid, "correct"},
		{"empty skills", `{"id":"b5","learner":"learner-1","skills":[],"correct":true,"at":"2025-03-01T18:00:00Z"}`, ReasonInvalid, "skills"},
		{"bad time", `{"id":"b6","learner":"learner-1","skills":["trial-balance"],"correct":true,"at":"yesterday evening"}`, ReasonInvalid, "at"},
		{"unsupported version", `{"version":2,"id":"b7","learner":"learner-1","skills":["trial-balance"],"correct":true,"at":"2025-03-01T18:00:00Z"}`, ReasonVersion, "version"},
		{"oversized", `{"id":"b8","learner":"learner-1","skills":["trial-balance"],"correct":true,"at":"2025-03-01T18:00:00Z","pad":"` + strings.Repeat("x", 2000) + `"}`, ReasonOversized, ""},
		{"empty value", ``, ReasonEmpty, ""},
		{"not UTF-8", "\xff\xfe{\"id\":1}", ReasonMalformed, ""},
	}
	fixtures := loadBadFixtures(t)
	for _, f := range fixtures {
		bad = append(bad, struct{ name, value, code, field string }{f.Name, f.Value, f.Code, f.Field})
	}
	var values [][]byte
	var wantBad []int // offsets of bad messages, index into bad
	values = append(values, good(0))
	for i, c := range bad {
		wantBad = append(wantBad, len(values))
		values = append(values, []byte(c.value))
		values = append(values, good(i+1))
	}
	msgs := make([]kafka.Message, len(values))
	for i, v := range values {
		msgs[i] = kafka.Message{Key: []byte("learner-1"), Value: v}
	}
	produce(t, b.Addr(), tAnswers, msgs)

	st := openTestStore(t, t.TempDir())
	defer st.Close()
	rp := startProcessor(t, b.Addr(), st, state.NewRegistry(nil), ProcessorOptions{MaxEventBytes: 1024})
	waitFor(t, 30*time.Second, "every message consumed and published", func() bool {
		return rp.m.Consumed.Load() == int64(len(values)) && st.OutboxDepth() == 0
	})
	rp.stop(t)

	if got := rp.m.DeadLettered.Load(); got != int64(len(bad)) {
		t.Errorf("dead-lettered %d, want %d", got, len(bad))
	}
	if got := rp.m.Applied.Load(); got != int64(len(bad)+1) {
		t.Errorf("applied %d, want %d", got, len(bad)+1)
	}
	recs, _, err := st.Learner("learner-1")
	if err != nil {
		t.Fatal(err)
	}
	if n := recs["trial-balance"].Opportunities; n != uint32(len(bad)+1) {
		t.Errorf("learner-1 has %d opportunities, want %d (the good answers)", n, len(bad)+1)
	}
	checkOffsetsCommitted(t, b.Addr(), st)

	dls := readAll(t, b.Addr(), tDeadLetter)
	if len(dls) != len(bad) {
		t.Fatalf("%d dead letters on the topic, want %d", len(dls), len(bad))
	}
	byOffset := map[int64]int{}
	for i, off := range wantBad {
		byOffset[int64(off)] = i
	}
	for _, m := range dls {
		var body DeadLetterBody
		if err := json.Unmarshal(m.Value, &body); err != nil {
			t.Fatalf("dead letter at %d is not a JSON body: %v", m.Offset, err)
		}
		i, ok := byOffset[body.Source.Offset]
		if !ok {
			t.Errorf("dead letter for offset %d, which was a good answer: %s", body.Source.Offset, body.Reason)
			continue
		}
		c := bad[i]
		t.Run(c.name, func(t *testing.T) {
			code, detail, _ := strings.Cut(body.Reason, ": ")
			if code != c.code || detail == "" {
				t.Errorf("reason %q, want code %q and a detail", body.Reason, c.code)
			}
			if body.Field != c.field {
				t.Errorf("field %q, want %q (reason %q)", body.Field, c.field, body.Reason)
			}
			orig, err := body.OriginalBytes()
			if err != nil || string(orig) != c.value {
				t.Errorf("original %q (err %v), want %q", orig, err, c.value)
			}
			if body.Source.Topic != tAnswers || body.Source.Partition != 0 {
				t.Errorf("source %+v", body.Source)
			}
			h := map[string]string{}
			for _, hd := range m.Headers {
				h[hd.Key] = string(hd.Value)
			}
			if h[HeaderReason] != body.Reason || h[HeaderReasonCode] != c.code || h[HeaderField] != c.field ||
				h[HeaderSourceTopic] != tAnswers || h[HeaderSourcePartition] != "0" || h[HeaderSourceOffset] != fmt.Sprint(body.Source.Offset) ||
				h[HeaderValue] != "body" {
				t.Errorf("headers %v do not match the body %+v", h, body)
			}
			if string(m.Key) != "learner-1" {
				t.Errorf("key %q, want the original key", m.Key)
			}
		})
		delete(byOffset, body.Source.Offset)
	}
	if len(byOffset) > 0 {
		t.Errorf("bad messages at offsets %v were not dead-lettered", byOffset)
	}
}

// badFixture is one entry of testdata/stream/bad/expect.json: a file of
// that folder holding a rejected event byte for byte, and the reason code
// and field it must be rejected with.
type badFixture struct {
	Name, Value, Code, Field string
}

func loadBadFixtures(t *testing.T) []badFixture {
	t.Helper()
	dir := filepath.Join("..", "testdata", "stream", "bad")
	b, err := os.ReadFile(filepath.Join(dir, "expect.json"))
	if err != nil {
		t.Fatal(err)
	}
	var want map[string]struct{ Code, Field string }
	if err := json.Unmarshal(b, &want); err != nil {
		t.Fatal(err)
	}
	var out []badFixture
	for name, w := range want {
		v, err := os.ReadFile(filepath.Join(dir, name))
		if err != nil {
			t.Fatal(err)
		}
		out = append(out, badFixture{Name: name, Value: string(v), Code: w.Code, Field: w.Field})
	}
	slices.SortFunc(out, func(a, b badFixture) int { return strings.Compare(a.Name, b.Name) })
	return out
}

// TestRebalance runs two members of one group over one store: the second
// joins while the first is consuming, the first then leaves. Partitions
// move twice (eager rebalances revoke everything), and the final state
// must still be exactly the in-order computation, every event published.
func TestRebalance(t *testing.T) {
	b := startTestBroker(t, 4)
	answers := cohort(2, 120, 6000)
	msgs := answerMessages(answers)
	third := len(msgs) / 3
	produce(t, b.Addr(), tAnswers, msgs[:third])

	st := openTestStore(t, t.TempDir())
	defer st.Close()
	reg := state.NewRegistry(nil)
	opt := ProcessorOptions{BatchMaxAnswers: 100, SessionTimeout: time.Second, RebalanceTimeout: 5 * time.Second}
	a := startProcessor(t, b.Addr(), st, reg, opt)
	waitFor(t, 30*time.Second, "the first member consuming", func() bool { return a.m.Consumed.Load() > 0 })
	c := startProcessor(t, b.Addr(), st, reg, opt)
	// Answers keep arriving while the group rebalances, so that the first
	// member is revoked with work in hand; half of the second third is held
	// back until the second member has its partitions, so that it has
	// answers of its own to consume however fast the first member was
	// (the first member alone can consume all of the rest before the
	// rebalance completes).
	second := msgs[third : 2*third]
	sent := 0
	for sent < len(second)/2 && !assignedSome(c.m) {
		n := min(len(second)/2-sent, 20)
		produce(t, b.Addr(), tAnswers, second[sent:sent+n])
		sent += n
	}
	waitFor(t, 30*time.Second, "the second member assigned", func() bool { return assignedSome(c.m) })
	produce(t, b.Addr(), tAnswers, second[sent:])
	waitFor(t, 30*time.Second, "the second member consuming", func() bool { return c.m.Ready() && c.m.Consumed.Load() > 0 })
	a.stop(t)
	produce(t, b.Addr(), tAnswers, msgs[2*third:])
	waitFor(t, 60*time.Second, "every answer applied and published", func() bool {
		return a.m.Applied.Load()+a.m.Duplicates.Load()+c.m.Applied.Load()+c.m.Duplicates.Load() >= int64(len(msgs)) && st.OutboxDepth() == 0
	})
	c.stop(t)
	t.Logf("member 1 consumed %d, member 2 consumed %d (a message read again after a revocation counts twice)", a.m.Consumed.Load(), c.m.Consumed.Load())

	wantRecs, wantIDs := expected(answers, reg.Current(), state.DefaultPolicy())
	for learner, want := range wantRecs {
		got, _, err := st.Learner(learner)
		if err != nil {
			t.Fatal(err)
		}
		for skill, w := range want {
			if g := got[skill]; g != w {
				t.Errorf("%s/%s: got %+v, want %+v", learner, skill, g, w)
			}
		}
	}
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
	checkOffsetsCommitted(t, b.Addr(), st)
}

// TestProcessorOptionsRejected: options the consumer group cannot work
// with are refused with ErrConfig, naming the setting.
func TestProcessorOptionsRejected(t *testing.T) {
	st := openTestStore(t, t.TempDir())
	defer st.Close()
	base := ProcessorOptions{Brokers: []string{"127.0.0.1:1"}, Group: "g", Topic: "answers"}
	for _, tc := range []struct {
		name string
		set  func(*ProcessorOptions)
		want string
	}{
		{"heartbeat = session timeout", func(o *ProcessorOptions) { o.SessionTimeout, o.HeartbeatInterval = 6*time.Second, 6*time.Second }, "consumer.heartbeat_interval"},
		{"heartbeat > session timeout", func(o *ProcessorOptions) { o.SessionTimeout, o.HeartbeatInterval = time.Second, 3*time.Second }, "consumer.session_timeout"},
		{"bad start", func(o *ProcessorOptions) { o.Start = "middle" }, "consumer.start"},
		{"no group", func(o *ProcessorOptions) { o.Group = "" }, "consumer group"},
	} {
		opt := base
		tc.set(&opt)
		_, err := NewProcessor(st, state.NewRegistry(nil), nil, NewMetrics(), opt)
		if !errors.Is(err, ErrConfig) || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("%s: %v, want ErrConfig naming %s", tc.name, err, tc.want)
		}
	}
	opt := base
	opt.SessionTimeout, opt.HeartbeatInterval = 10*time.Second, 3*time.Second
	if _, err := NewProcessor(st, state.NewRegistry(nil), nil, NewMetrics(), opt); err != nil {
		t.Errorf("valid timings refused: %v", err)
	}
}
