package main

import (
	"bufio"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"net"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/state"
	"github.com/attain-dev/attain/stream"
)

// Tests of `attain run` as a separate process: the binary is built, run
// against a broker started by the test (or its own embedded broker), and
// killed or stopped with signals.

// built is the attain binary, built once per test run by buildAttain
// and removed by TestMain.
var built struct {
	once      sync.Once
	dir, path string
	err       error
	out       []byte
}

// buildAttain returns the attain binary, building it on first use.
func buildAttain(t *testing.T) string {
	t.Helper()
	built.once.Do(func() {
		built.dir, built.err = os.MkdirTemp("", "attain-bin-")
		if built.err != nil {
			return
		}
		built.path = filepath.Join(built.dir, "attain")
		built.out, built.err = exec.Command("go", "build", "-o", built.path, ".").CombinedOutput()
	})
	if built.err != nil {
		t.Fatalf("go build: %v\n%s", built.err, built.out)
	}
	return built.path
}

func TestMain(m *testing.M) {
	code := m.Run()
	if built.dir != "" {
		os.RemoveAll(built.dir)
	}
	os.Exit(code)
}

// testBroker starts the embedded broker in the test process, with the
// default topics (4 partitions for answers).
func testBroker(t *testing.T) *stream.Broker {
	t.Helper()
	b, err := stream.StartBroker(stream.BrokerOptions{Addr: "127.0.0.1:0", Logger: zerolog.Nop()})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(b.Close)
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	if err := stream.EnsureTopics(ctx, []string{b.Addr()}, stream.Topics("answers", "attain.mastery", "attain.deadletter", "attain.params", 4), zerolog.Nop()); err != nil {
		t.Fatal(err)
	}
	return b
}

func freeAddr(t *testing.T) string {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	return ln.Addr().String()
}

// attainProc is one running `attain run`.
type attainProc struct {
	cmd     *exec.Cmd
	logPath string
	http    string
	done    chan struct{}
	err     error
}

func startAttain(t *testing.T, bin string, env []string, args ...string) *attainProc {
	t.Helper()
	logPath := filepath.Join(t.TempDir(), "attain.log")
	lf, err := os.Create(logPath)
	if err != nil {
		t.Fatal(err)
	}
	cmd := exec.Command(bin, append([]string{"run"}, args...)...)
	cmd.Env = append(os.Environ(), env...)
	cmd.Stdout, cmd.Stderr = lf, lf
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	p := &attainProc{cmd: cmd, logPath: logPath, done: make(chan struct{})}
	for i, a := range args {
		if a == "--http-addr" && i+1 < len(args) {
			p.http = args[i+1]
		}
	}
	go func() {
		p.err = cmd.Wait()
		lf.Close()
		close(p.done)
	}()
	t.Cleanup(func() {
		select {
		case <-p.done:
		default:
			cmd.Process.Kill()
			<-p.done
		}
	})
	return p
}

func (p *attainProc) log() string {
	b, _ := os.ReadFile(p.logPath)
	return string(b)
}

// waitLog waits until the log holds a line containing s.
func (p *attainProc) waitLog(t *testing.T, s string, timeout time.Duration) {
	t.Helper()
	deadline := time.Now().Add(timeout)
	for !strings.Contains(p.log(), s) {
		select {
		case <-p.done:
			t.Fatalf("attain exited (%v) before logging %q:\n%s", p.err, s, p.log())
		default:
		}
		if time.Now().After(deadline) {
			t.Fatalf("attain did not log %q within %v:\n%s", s, timeout, p.log())
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// metrics returns the samples of /metrics, by name with labels.
func (p *attainProc) metrics() map[string]float64 {
	resp, err := http.Get("http://" + p.http + "/metrics")
	if err != nil {
		return nil
	}
	defer resp.Body.Close()
	out := map[string]float64{}
	sc := bufio.NewScanner(resp.Body)
	for sc.Scan() {
		line := sc.Text()
		if strings.HasPrefix(line, "#") {
			continue
		}
		i := strings.LastIndexByte(line, ' ')
		if i < 0 {
			continue
		}
		if v, err := strconv.ParseFloat(line[i+1:], 64); err == nil {
			out[line[:i]] = v
		}
	}
	return out
}

// caughtUp reports whether the instance has consumed at least consumed
// messages, every answers partition to the end it saw last, and published
// its whole outbox.
func (p *attainProc) caughtUp(partitions int, consumed float64) bool {
	m := p.metrics()
	if m == nil || m["attain_ready"] != 1 || m["attain_outbox_depth"] != 0 || m["attain_messages_consumed_total"] < consumed {
		return false
	}
	for i := range partitions {
		lag, ok := m[fmt.Sprintf(`attain_consumer_lag{partition="%d"}`, i)]
		if !ok || lag != 0 {
			return false
		}
	}
	return true
}

func (p *attainProc) signal(t *testing.T, sig os.Signal, timeout time.Duration) {
	t.Helper()
	if err := p.cmd.Process.Signal(sig); err != nil {
		t.Fatal(err)
	}
	select {
	case <-p.done:
	case <-time.After(timeout):
		t.Fatalf("attain did not exit within %v of %v:\n%s", timeout, sig, p.log())
	}
}

// cohortAnswers simulates n answers of the invented scenario's skills, a
// few of them delivered twice.
func cohortAnswers(seed uint64, learners, n int) []state.Answer {
	skills := []string{"journal-entries", "trial-balance", "bank-reconciliation", "straight-line-depreciation", "sales-tax-invoices", "payroll-deductions"}
	rng := rand.New(rand.NewPCG(seed, 11))
	t0 := time.Date(2025, 4, 7, 19, 0, 0, 0, time.UTC)
	out := make([]state.Answer, 0, n)
	for i := 0; len(out) < n; i++ {
		if len(out) > 0 && rng.IntN(60) == 0 {
			out = append(out, out[len(out)-1-rng.IntN(min(len(out), 10))])
			continue
		}
		l := rng.IntN(learners)
		out = append(out, state.Answer{
			ID: fmt.Sprintf("a%07d", i), Learner: fmt.Sprintf("learner-%04d", l),
			Skills:  []string{skills[rng.IntN(len(skills))]},
			Correct: rng.IntN(100) < 40+l%50, At: t0.Add(time.Duration(i) * time.Second),
		})
	}
	return out
}

// inOrder is the uninterrupted computation: state.Record.Apply over each
// learner's answers in order, an id applied once; and the event ids of the
// reached/stuck outcomes.
func inOrder(answers []state.Answer) (map[string]map[string]state.Record, map[string]bool) {
	pf, pol := state.NewParamFile(), state.DefaultPolicy()
	recs := map[string]map[string]state.Record{}
	seen := map[string]bool{}
	ids := map[string]bool{}
	for _, a := range answers {
		if seen[a.Learner+"\x00"+a.ID] {
			continue
		}
		seen[a.Learner+"\x00"+a.ID] = true
		if recs[a.Learner] == nil {
			recs[a.Learner] = map[string]state.Record{}
		}
		for _, s := range a.Skills {
			p, v := pf.For(s)
			r, ok := recs[a.Learner][s]
			if !ok {
				r = state.NewRecord(p, v)
			}
			o := r.Apply(p, a.Correct, a.At.UnixNano(), pol)
			if o.Reached {
				ids[state.EventID(a.Learner, s, state.KindReached, r.Opportunities)] = true
			}
			if o.Stuck {
				ids[state.EventID(a.Learner, s, state.KindStuck, r.Opportunities)] = true
			}
			recs[a.Learner][s] = r
		}
	}
	return recs, ids
}

func answerMsgs(answers []state.Answer) []kafka.Message {
	msgs := make([]kafka.Message, len(answers))
	for i, a := range answers {
		v, _ := json.Marshal(map[string]any{"id": a.ID, "learner": a.Learner, "skills": a.Skills, "correct": a.Correct, "at": a.At.Format(time.RFC3339Nano)})
		msgs[i] = kafka.Message{Key: []byte(a.Learner), Value: v}
	}
	return msgs
}

func newWriter(addr, topic string) (*kafka.Writer, *kafka.Transport) {
	tr := &kafka.Transport{}
	return &kafka.Writer{Addr: kafka.TCP(addr), Topic: topic, Balancer: kafka.Murmur2Balancer{}, RequiredAcks: kafka.RequireAll,
		BatchSize: 1000, BatchTimeout: time.Millisecond, Transport: tr}, tr
}

// logEnds returns the end offset of each answers partition.
func logEnds(t *testing.T, addr string, partitions int) []int64 {
	t.Helper()
	conn, err := kafka.Dial("tcp", addr)
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	ends := make([]int64, partitions)
	for p := range partitions {
		c, err := kafka.DialLeader(context.Background(), "tcp", addr, "answers", p)
		if err != nil {
			t.Fatal(err)
		}
		ends[p], err = c.ReadLastOffset()
		c.Close()
		if err != nil {
			t.Fatal(err)
		}
	}
	return ends
}

// storeOffsets opens the store of a stopped instance and returns each
// partition's stored next offset (-1 when none).
func storeOffsets(t *testing.T, dir string, partitions int) []int64 {
	t.Helper()
	st, err := state.OpenStore(dir, state.StoreOptions{Logger: zerolog.Nop()})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	out := make([]int64, partitions)
	for p := range partitions {
		pt, err := st.Partition(int32(p))
		if err != nil {
			t.Fatal(err)
		}
		next, ok := pt.NextOffset()
		if !ok {
			next = -1
		}
		out[p] = next
		pt.Release()
	}
	return out
}

// TestRunCrashRecovery kills `attain run` with SIGKILL at random points
// while answers stream in, restarts it on the same data dir each time,
// and checks that the end state is exactly the uninterrupted computation
// (no answer lost or applied twice: opportunity counts equal), every
// offset committed, and every threshold crossing published at least once
// with its deterministic id.
func TestRunCrashRecovery(t *testing.T) {
	bin := buildAttain(t)
	b := testBroker(t)
	answers := cohortAnswers(21, 250, 16000)
	msgs := answerMsgs(answers)
	dataDir := t.TempDir()
	seed := uint64(time.Now().UnixNano())
	rng := rand.New(rand.NewPCG(seed, 3))
	t.Logf("kill schedule seed %d", seed)

	// Answers arrive in chunks over a few seconds while instances are
	// started and killed.
	var wg sync.WaitGroup
	var produceErr error
	wg.Add(1)
	go func() {
		defer wg.Done()
		w, tr := newWriter(b.Addr(), "answers")
		defer tr.CloseIdleConnections()
		defer w.Close()
		for i := 0; i < len(msgs); i += 400 {
			if err := w.WriteMessages(context.Background(), msgs[i:min(i+400, len(msgs))]...); err != nil {
				produceErr = err
				return
			}
			time.Sleep(60 * time.Millisecond)
		}
	}()

	env := func(group string) []string {
		// A new group per killed instance: the store's offsets, not the
		// group's, decide where consumption resumes, and a fresh group
		// need not wait for the killed member's session to expire.
		// A short session timeout: the last instance waits that long for
		// the killed member of its group to be declared dead.
		return []string{"ATTAIN_CONSUMER_GROUP=" + group, "ATTAIN_LOG_LEVEL=info",
			"ATTAIN_CONSUMER_SESSION_TIMEOUT=3s", "ATTAIN_CONSUMER_HEARTBEAT_INTERVAL=300ms"}
	}
	const kills = 4
	for i := range kills {
		p := startAttain(t, bin, env(fmt.Sprintf("crash-%d", i)), "--brokers", b.Addr(), "--data-dir", dataDir, "--http-addr", freeAddr(t))
		p.waitLog(t, `"message":"consuming"`, 30*time.Second)
		time.Sleep(time.Duration(100+rng.IntN(900)) * time.Millisecond)
		if err := p.cmd.Process.Kill(); err != nil {
			t.Fatal(err)
		}
		<-p.done
		t.Logf("killed instance %d; stored offsets now %v", i, storeOffsets(t, dataDir, 4))
	}
	wg.Wait()
	if produceErr != nil {
		t.Fatal(produceErr)
	}

	// The last instance joins the same group as the last killed one: it
	// waits for the dead member's session to expire, then takes over.
	p := startAttain(t, bin, env(fmt.Sprintf("crash-%d", kills-1)), "--brokers", b.Addr(), "--data-dir", dataDir, "--http-addr", freeAddr(t))
	deadline := time.Now().Add(60 * time.Second)
	for !p.caughtUp(4, 0) {
		if time.Now().After(deadline) {
			t.Fatalf("the last instance did not catch up within 60 s; metrics %v\n%s", p.metrics(), p.log())
		}
		time.Sleep(100 * time.Millisecond)
	}
	p.signal(t, syscall.SIGTERM, 30*time.Second)
	if p.err != nil {
		t.Fatalf("attain run exited with %v after SIGTERM:\n%s", p.err, p.log())
	}

	ends := logEnds(t, b.Addr(), 4)
	if got := storeOffsets(t, dataDir, 4); fmt.Sprint(got) != fmt.Sprint(ends) {
		t.Errorf("stored next offsets %v, log ends %v", got, ends)
	}
	st, err := state.OpenStore(dataDir, state.StoreOptions{Logger: zerolog.Nop()})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	wantRecs, wantIDs := inOrder(answers)
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
	events := readTopic(t, b.Addr(), "attain.mastery")
	counts := map[string]int{}
	for _, v := range events {
		var ce stream.CloudEvent
		if err := json.Unmarshal(v, &ce); err != nil {
			t.Fatalf("mastery event is not JSON: %v", err)
		}
		if ce.SpecVersion != "1.0" {
			t.Fatalf("not a CloudEvent: %s", v)
		}
		if !wantIDs[ce.ID] {
			t.Errorf("unexpected event id %s (%s %s)", ce.ID, ce.Type, ce.Subject)
		}
		counts[ce.ID]++
	}
	dups := 0
	for id := range wantIDs {
		switch n := counts[id]; {
		case n == 0:
			t.Errorf("event %s never published", id)
		case n > 1:
			dups += n - 1
		}
	}
	t.Logf("%d answers, %d expected events, %d published (%d re-sent after crashes)", len(answers), len(wantIDs), len(events), dups)
}

// readTopic returns every value of topic, all partitions, to their ends.
func readTopic(t *testing.T, addr, topic string) [][]byte {
	t.Helper()
	var out [][]byte
	for p := range 4 {
		c, err := kafka.DialLeader(context.Background(), "tcp", addr, topic, p)
		if err != nil {
			t.Fatal(err)
		}
		first, last, err := c.ReadOffsets()
		c.Close()
		if err != nil {
			t.Fatal(err)
		}
		if last <= first {
			continue
		}
		r := kafka.NewReader(kafka.ReaderConfig{Brokers: []string{addr}, Topic: topic, Partition: p, MaxWait: 100 * time.Millisecond})
		r.SetOffset(first)
		ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
		for {
			m, err := r.FetchMessage(ctx)
			if err != nil {
				cancel()
				r.Close()
				t.Fatalf("reading %s/%d: %v", topic, p, err)
			}
			out = append(out, m.Value)
			if m.Offset+1 >= last {
				break
			}
		}
		cancel()
		r.Close()
	}
	return out
}

// TestRunEmbeddedBrokerAndShutdown: with no brokers configured, `attain
// run` starts the embedded broker, logs its address, processes what is
// produced to it, and on SIGTERM shuts down in the documented order and
// exits 0; a restart on the same data dir finds the broker's topics and
// the store's offsets again.
func TestRunEmbeddedBrokerAndShutdown(t *testing.T) {
	bin := buildAttain(t)
	dataDir := t.TempDir()
	brokerAddr, httpAddr := freeAddr(t), freeAddr(t)
	args := []string{"--data-dir", dataDir, "--http-addr", httpAddr, "--embedded-broker-addr", brokerAddr}
	p := startAttain(t, bin, []string{"ATTAIN_BROKERS="}, args...)
	p.waitLog(t, `"message":"consuming"`, 30*time.Second)
	if !strings.Contains(p.log(), `"message":"embedded broker listening"`) || !strings.Contains(p.log(), brokerAddr) {
		t.Fatalf("the embedded broker's address is not in the log:\n%s", p.log())
	}
	answers := cohortAnswers(5, 40, 2000)
	w, tr := newWriter(brokerAddr, "answers")
	if err := w.WriteMessages(context.Background(), answerMsgs(answers)...); err != nil {
		t.Fatal(err)
	}
	w.Close()
	tr.CloseIdleConnections()
	waitUntil(t, 30*time.Second, "caught up", func() bool { return p.caughtUp(4, float64(len(answers))) })

	// Consumed is counted when staged; the read API serves committed
	// state, at most one batch interval later.
	var status int
	var body []byte
	waitUntil(t, 5*time.Second, "the read API serves a learner", func() bool {
		resp, err := http.Get("http://" + httpAddr + "/v1/learners/" + answers[0].Learner)
		if err != nil {
			return false
		}
		body, _ = io.ReadAll(resp.Body)
		resp.Body.Close()
		status = resp.StatusCode
		return status == 200
	})
	if !strings.Contains(string(body), `"opportunities"`) {
		t.Errorf("GET /v1/learners/%s: %d %s", answers[0].Learner, status, body)
	}

	p.signal(t, syscall.SIGTERM, 30*time.Second)
	if p.err != nil {
		t.Fatalf("exit after SIGTERM: %v\n%s", p.err, p.log())
	}
	// The parts stop last-started first.
	var order []string
	for _, line := range strings.Split(p.log(), "\n") {
		var e struct{ Message, Part string }
		if json.Unmarshal([]byte(line), &e) == nil && e.Message == "stopped" {
			order = append(order, e.Part)
		}
	}
	want := []string{"consumer", "publisher", "HTTP API", "store", "embedded broker"}
	if fmt.Sprint(order) != fmt.Sprint(want) {
		t.Errorf("stop order %q, want %q", order, want)
	}

	// Restart: the broker's topics and data are back, nothing is read
	// twice.
	p = startAttain(t, bin, []string{"ATTAIN_BROKERS="}, args...)
	p.waitLog(t, `"message":"consuming"`, 30*time.Second)
	waitUntil(t, 30*time.Second, "caught up after restart", func() bool { return p.caughtUp(4, 0) })
	m := p.metrics()
	if m["attain_messages_consumed_total"] != 0 {
		t.Errorf("the restarted instance consumed %v messages again", m["attain_messages_consumed_total"])
	}
	if strings.Contains(p.log(), "created topic") {
		t.Errorf("topics created again after a restart: the embedded broker did not keep them")
	}
	p.signal(t, syscall.SIGTERM, 30*time.Second)
	if p.err != nil {
		t.Fatalf("exit after SIGTERM: %v", p.err)
	}
	wantRecs, _ := inOrder(answers)
	st, err := state.OpenStore(dataDir, state.StoreOptions{Logger: zerolog.Nop()})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	for learner, want := range wantRecs {
		got, _, err := st.Learner(learner)
		if err != nil {
			t.Fatal(err)
		}
		for skill, w := range want {
			if got[skill] != w {
				t.Errorf("%s/%s: got %+v, want %+v", learner, skill, got[skill], w)
			}
		}
	}
}

// TestRunBadConfig: a bad setting is a non-zero exit naming the key.
func TestRunBadConfig(t *testing.T) {
	bin := buildAttain(t)
	cfg := filepath.Join(t.TempDir(), "attain.yaml")
	if err := os.WriteFile(cfg, []byte("batch:\n  interval: -1s\nconsumer:\n  strat: latest\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		name string
		args []string
		key  string
	}{
		{"unknown key in file", []string{"--config", cfg}, "consumer.strat"},
		{"bad flag value", []string{"--http-addr", "nowhere"}, "http_addr"},
	} {
		t.Run(c.name, func(t *testing.T) {
			cmd := exec.Command(bin, append([]string{"run", "--data-dir", t.TempDir()}, c.args...)...)
			out, err := cmd.CombinedOutput()
			var ee *exec.ExitError
			if !errors.As(err, &ee) || ee.ExitCode() == 0 {
				t.Fatalf("exit %v, want non-zero; output:\n%s", err, out)
			}
			if !strings.Contains(string(out), c.key) {
				t.Errorf("output does not name %s:\n%s", c.key, out)
			}
		})
	}
}

func waitUntil(t *testing.T, timeout time.Duration, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(timeout)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out after %v waiting until %s", timeout, what)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// TestBrokerCommand: `attain broker` prints its address, serves the
// Kafka protocol there with attain's topics, and exits 0 on SIGTERM.
func TestBrokerCommand(t *testing.T) {
	bin := buildAttain(t)
	addr := freeAddr(t)
	cmd := exec.Command(bin, "broker", "--addr", addr)
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	var stderr strings.Builder
	cmd.Stderr = &stderr
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	defer cmd.Process.Kill()
	line, err := bufio.NewReader(stdout).ReadString('\n')
	if err != nil || strings.TrimSpace(line) != addr {
		t.Fatalf("first line %q (%v), want the address %s; stderr:\n%s", line, err, addr, stderr.String())
	}
	conn, err := kafka.Dial("tcp", addr)
	if err != nil {
		t.Fatal(err)
	}
	parts, err := conn.ReadPartitions("answers", "attain.mastery", "attain.deadletter", "attain.params")
	conn.Close()
	if err != nil {
		t.Fatal(err)
	}
	count := map[string]int{}
	for _, p := range parts {
		count[p.Topic]++
	}
	if count["answers"] != 4 || count["attain.mastery"] != 4 || count["attain.deadletter"] != 4 || count["attain.params"] != 1 {
		t.Errorf("partitions per topic %v", count)
	}
	cmd.Process.Signal(syscall.SIGTERM)
	if err := cmd.Wait(); err != nil {
		t.Errorf("exit after SIGTERM: %v\n%s", err, stderr.String())
	}
}
