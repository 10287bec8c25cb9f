package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"sort"
	"strings"
	"testing"
	"time"

	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/fitjob"
	"github.com/attain-dev/attain/state"
)

const replayFixtures = "../../testdata/replay/"

// attain replay writes the four outputs, prints the report's absolute
// path, and with the fixture's flags writes exactly the committed
// predictions.csv that the sklearn reference values were computed from.
func TestCLIReplay(t *testing.T) {
	root, err := filepath.Abs(replayFixtures)
	if err != nil {
		t.Fatal(err)
	}
	out := filepath.Join(t.TempDir(), "out")
	r := replayCLI(t, "replay", "--from", filepath.Join(root, "answers.jsonl"),
		"--params", filepath.Join(root, "params-a.json"),
		"--threshold", "0.95", "--threshold", "0.9", "--stuck-after", "10", "--stuck-after", "5", "--out", out)
	if r.code != 0 {
		t.Fatalf("exit %d\nstdout: %s\nstderr: %s", r.code, r.stdout, r.stderr)
	}
	report := filepath.Join(out, "report.html")
	if !strings.Contains(r.stdout, "report: "+report+"\n") {
		t.Errorf("stdout does not name the report %s:\n%s", report, r.stdout)
	}
	if !strings.Contains(r.stdout, "replayed 1462 answers of 41 learners") || !strings.Contains(r.stdout, "8 records rejected") {
		t.Errorf("summary:\n%s", r.stdout)
	}
	for _, name := range []string{"predictions.csv", "events.csv", "metrics.json", "report.html"} {
		if fi, err := os.Stat(filepath.Join(out, name)); err != nil || fi.Size() < 100 {
			t.Errorf("%s: %v", name, err)
		}
	}
	if got, want := mustRead(t, filepath.Join(out, "predictions.csv")), mustRead(t, filepath.Join(root, "predictions.csv")); !bytes.Equal(got, want) {
		t.Errorf("predictions.csv differs from testdata/replay/predictions.csv")
	}
	var m struct {
		WhatIf []struct {
			Threshold  float64 `json:"threshold"`
			StuckAfter int     `json:"stuck_after"`
		} `json:"what_if"`
	}
	if err := json.Unmarshal(mustRead(t, filepath.Join(out, "metrics.json")), &m); err != nil {
		t.Fatal(err)
	}
	if len(m.WhatIf) != 4 || m.WhatIf[1].Threshold != 0.95 || m.WhatIf[1].StuckAfter != 5 || m.WhatIf[2].Threshold != 0.9 {
		t.Errorf("what-if grid: %+v", m.WhatIf)
	}
	// Nothing but the outputs in the folder (temporary files removed).
	if names := listDir(t, out); len(names) != 4 {
		t.Errorf("output folder holds %v", names)
	}
}

// replayCLI runs the built attain binary (the config loader refuses
// unknown ATTAIN_* variables, so the self-re-running helper of cli_test.go
// cannot be used here).
func replayCLI(t *testing.T, args ...string) cliResult {
	t.Helper()
	cmd := exec.Command(buildAttain(t), args...)
	cmd.Dir = t.TempDir()
	var out, errb bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &errb
	err := cmd.Run()
	code := 0
	var ee *exec.ExitError
	if errors.As(err, &ee) {
		code = ee.ExitCode()
	} else if err != nil {
		t.Fatalf("running attain %v: %v", args, err)
	}
	return cliResult{out.String(), errb.String(), code}
}

func mustRead(t *testing.T, path string) []byte {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// Bad flags are refused with the flag named and the fix.
func TestCLIReplayBadFlags(t *testing.T) {
	root, _ := filepath.Abs(replayFixtures)
	in := filepath.Join(root, "answers.jsonl")
	cases := []struct {
		args []string
		code int
		want string
	}{
		{[]string{"--out", "x"}, 2, "--from is required"},
		{[]string{"--from", in}, 2, "--out is required"},
		{[]string{"--from", in, "--out", "x", "--threshold", "1.5"}, 1, `--threshold "1.5": must be a number in (0, 1]`},
		{[]string{"--from", in, "--out", "x", "--stuck-after", "-1"}, 1, `--stuck-after "-1"`},
		{[]string{"--from", in, "--out", "x", "--params", "nope.json"}, 1, "--params"},
		{[]string{"--from", in, "--out", "x", "--order", "sideways"}, 1, `order "sideways"`},
		{[]string{"--from", "topic:answers", "--out", "x"}, 1, "no brokers to read the topic from; give --brokers"},
		{[]string{"--from", "topic:answers", "--out", "x", "--order", "at"}, 1, "a topic is replayed in arrival order"},
		{[]string{"--from", in, "--out", "x", "--params", "topic:attain.params"}, 1, "give --brokers"},
		{[]string{"--from", filepath.Join(root, "missing.jsonl"), "--out", "x"}, 1, "opening answers"},
	}
	for _, c := range cases {
		r := replayCLI(t, append([]string{"replay"}, c.args...)...)
		if r.code != c.code || !strings.Contains(r.stderr, c.want) {
			t.Errorf("replay %v: exit %d, stderr:\n%s\nwant exit %d and %q", c.args, r.code, r.stderr, c.code, c.want)
		}
	}
}

// --params topic:attain.params reads the params topic of a real broker
// (the embedded one, over TCP) to its end and replays under that set.
func TestCLIReplayParamsFromTopic(t *testing.T) {
	b := testBroker(t)
	w := &kafka.Writer{Addr: kafka.TCP(b.Addr()), Topic: "attain.params", Balancer: &kafka.Hash{}, BatchTimeout: 10 * time.Millisecond}
	defer w.Close()
	sp := state.SkillParams{Params: state.Params{Prior: 0.2, Learn: 0.25, Guess: 0.15, Slip: 0.08}, Version: 7}
	v, _ := json.Marshal(sp)
	ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
	defer cancel()
	if err := w.WriteMessages(ctx, kafka.Message{Key: []byte("trial-balance"), Value: v}); err != nil {
		t.Fatal(err)
	}
	root, _ := filepath.Abs(replayFixtures)
	out := filepath.Join(t.TempDir(), "out")
	r := replayCLI(t, "replay", "--from", filepath.Join(root, "answers.jsonl"),
		"--params", "topic:attain.params", "--brokers", b.Addr(), "--out", out)
	if r.code != 0 {
		t.Fatalf("exit %d\n%s\n%s", r.code, r.stdout, r.stderr)
	}
	var m struct {
		Params []struct {
			Name    string `json:"name"`
			Version int64  `json:"version"`
		} `json:"params"`
		Skills map[string]struct {
			Params        state.Params `json:"params"`
			ParamsVersion int64        `json:"params_version"`
		} `json:"skills"`
	}
	if err := json.Unmarshal(mustRead(t, filepath.Join(out, "metrics.json")), &m); err != nil {
		t.Fatal(err)
	}
	if len(m.Params) != 1 || m.Params[0].Version != 7 || m.Params[0].Name != "topic:attain.params" {
		t.Errorf("params: %+v", m.Params)
	}
	if tb := m.Skills["trial-balance"]; tb.Params != sp.Params || tb.ParamsVersion != 7 {
		t.Errorf("trial-balance: %+v, want %v version 7", tb, sp.Params)
	}
	if je := m.Skills["journal-entries"]; je.Params != state.DefaultParams() {
		t.Errorf("journal-entries (not on the topic): %+v, want the defaults", je.Params)
	}
}

// --from topic:answers replays a real topic (the embedded broker, 4
// partitions keyed by learner, malformed records among the answers) from
// its start: each learner's answers in offset order, as the processor
// applies them. It equals the replay of the same answers from a file in
// arrival order (the same per-learner sequences; rows merged in another
// order), counts and lists the malformed records by partition and offset,
// gives byte-identical outputs twice, and commits no consumer-group offset.
func TestCLIReplayFromTopic(t *testing.T) {
	b := testBroker(t)
	root, _ := filepath.Abs(replayFixtures)
	in := filepath.Join(root, "answers.jsonl")
	w := &kafka.Writer{Addr: kafka.TCP(b.Addr()), Topic: "answers", Balancer: &kafka.Murmur2Balancer{}, BatchTimeout: 5 * time.Millisecond, BatchSize: 500}
	defer w.Close()
	var msgs []kafka.Message
	for _, line := range strings.Split(strings.TrimSpace(string(mustRead(t, in))), "\n") {
		if strings.TrimSpace(line) == "" {
			continue
		}
		var probe struct {
			Learner string `json:"learner"`
		}
		json.Unmarshal([]byte(line), &probe)
		key := probe.Learner
		if key == "" {
			key = "unknown"
		}
		msgs = append(msgs, kafka.Message{Key: []byte(key), Value: []byte(line)})
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if err := w.WriteMessages(ctx, msgs...); err != nil {
		t.Fatal(err)
	}

	dirs := []string{filepath.Join(t.TempDir(), "t1"), filepath.Join(t.TempDir(), "t2"), filepath.Join(t.TempDir(), "file")}
	for i, d := range dirs {
		from := "topic:answers"
		if i == 2 {
			from = in
		}
		r := replayCLI(t, "replay", "--from", from, "--brokers", b.Addr(), "--order", "arrival",
			"--params", filepath.Join(root, "params-a.json"), "--threshold", "0.95", "--threshold", "0.9", "--out", d)
		if r.code != 0 {
			t.Fatalf("replay %s: exit %d\n%s\n%s", from, r.code, r.stdout, r.stderr)
		}
	}
	for _, name := range []string{"predictions.csv", "events.csv", "metrics.json", "report.html"} {
		if !bytes.Equal(mustRead(t, filepath.Join(dirs[0], name)), mustRead(t, filepath.Join(dirs[1], name))) {
			t.Errorf("%s differs between two replays of the same topic", name)
		}
	}
	sortedLines := func(path string) []string {
		l := strings.Split(strings.TrimSpace(string(mustRead(t, path))), "\n")
		sort.Strings(l[1:])
		return l
	}
	for _, name := range []string{"predictions.csv", "events.csv"} {
		a, f := sortedLines(filepath.Join(dirs[0], name)), sortedLines(filepath.Join(dirs[2], name))
		if !slices.Equal(a, f) || len(a) < 50 {
			t.Errorf("%s: the topic's rows (%d) are not the file's (%d)", name, len(a), len(f))
		}
	}
	type scores struct {
		AUC, RMSE, LogLoss float64
		Answers, Learners  int
	}
	var mt, mf struct {
		Overall scores `json:"overall"`
		Data    struct {
			Records, Answers, Duplicates, Late int64
		} `json:"data"`
		Rejected struct {
			Count  int                     `json:"count"`
			Listed []fitjob.RejectedRecord `json:"listed"`
		} `json:"rejected"`
	}
	json.Unmarshal(mustRead(t, filepath.Join(dirs[0], "metrics.json")), &mt)
	json.Unmarshal(mustRead(t, filepath.Join(dirs[2], "metrics.json")), &mf)
	if mt.Data != mf.Data || mt.Overall.Answers != 1463 || // arrival order: one repeated id is outside the 32-id window
		mt.Overall.Learners != mf.Overall.Learners ||
		math.Abs(mt.Overall.AUC-mf.Overall.AUC) > 1e-12 || math.Abs(mt.Overall.LogLoss-mf.Overall.LogLoss) > 1e-12 || math.Abs(mt.Overall.RMSE-mf.Overall.RMSE) > 1e-12 {
		t.Errorf("topic: %+v %+v\nfile:  %+v %+v", mt.Data, mt.Overall, mf.Data, mf.Overall)
	}
	if mt.Rejected.Count != 8 || len(mt.Rejected.Listed) != 8 {
		t.Fatalf("topic rejected %d (%d listed), want 8", mt.Rejected.Count, len(mt.Rejected.Listed))
	}
	for _, r := range mt.Rejected.Listed {
		if r.Line != 0 || (r.Offset < 0 && r.Field != "at") || r.Reason == "" {
			t.Errorf("rejected record without its place: %+v", r)
		}
	}
	// No consumer group was joined or committed.
	cl := &kafka.Client{Addr: kafka.TCP(b.Addr())}
	groups, err := cl.ListGroups(ctx, &kafka.ListGroupsRequest{})
	if err != nil {
		t.Fatal(err)
	}
	if len(groups.Groups) != 0 {
		t.Errorf("replay left consumer groups behind: %+v", groups.Groups)
	}
}

// The progress line gives the share done, answers, rate and time left.
func TestReplayProgressLine(t *testing.T) {
	p := fitjob.ReplayProgress{Bytes: 250, TotalBytes: 1000, Answers: 5000}
	got := progressLine(p, 10*time.Second, true)
	for _, want := range []string{"[#######.......................]", "25.0%", "5000 answers", "500 answers/s", "about 30s left"} {
		if !strings.Contains(got, want) {
			t.Errorf("progress %q lacks %q", got, want)
		}
	}
	got = progressLine(fitjob.ReplayProgress{Records: 7, Answers: 6}, time.Second, false)
	if !strings.Contains(got, "7 records, 6 answers") || strings.Contains(got, "[") {
		t.Errorf("progress without a size: %q", got)
	}
}
