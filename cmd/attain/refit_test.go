package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"
	"go.yaml.in/yaml/v3"

	"github.com/attain-dev/attain/fitjob"
	"github.com/attain-dev/attain/state"
	"github.com/attain-dev/attain/stream"
)

// refitCLI runs the built attain binary in dir (the config loader refuses
// unknown ATTAIN_* variables, so the self-re-running helper of cli_test.go,
// which sets one, cannot run refit).
func refitCLI(t *testing.T, dir string, env []string, args ...string) cliResult {
	t.Helper()
	cmd := exec.Command(buildAttain(t), args...)
	cmd.Dir = dir
	cmd.Env = append(os.Environ(), env...)
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

// refitReport reads a refit report written by `attain refit --report`.
func refitReport(t *testing.T, path string) fitjob.GateReport {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var rep fitjob.GateReport
	if err := json.Unmarshal(b, &rep); err != nil {
		t.Fatalf("report %s: %v", path, err)
	}
	return rep
}

// From a file: the table, the report and the parameter file agree, every
// skill of the history is listed with its verdict; a refit against the
// set just written changes nothing (the gate compares on the same
// learners, and that set was fitted on them); --dry-run writes nothing.
func TestCLIRefitGateFromFile(t *testing.T) {
	dir := t.TempDir()
	if r := refitCLI(t, dir, nil, "simulate", "--out", "a.jsonl", "--learners", "400", "--opportunities", "15", "--seed", "3"); r.code != 0 {
		t.Fatalf("simulate: %s", r.stderr)
	}
	r := refitCLI(t, dir, nil, "refit", "--from", "a.jsonl", "--out", "p.json", "--report", "r.json")
	if r.code != 0 {
		t.Fatalf("refit exit %d: %s", r.code, r.stderr)
	}
	t.Logf("refit:\n%s", r.stdout)
	rep := refitReport(t, filepath.Join(dir, "r.json"))
	pf, err := state.LoadParamFile(filepath.Join(dir, "p.json"))
	if err != nil {
		t.Fatal(err)
	}
	if len(rep.Skills) != 6 || rep.Version != 2 || pf.Version != 2 || rep.ParamFile != "p.json" || rep.Published {
		t.Fatalf("report: %d skills, version %d, file %q, published %v; parameter file version %d", len(rep.Skills), rep.Version, rep.ParamFile, rep.Published, pf.Version)
	}
	for _, sv := range rep.Skills {
		if !strings.Contains(r.stdout, sv.Skill) || !strings.Contains(r.stdout, sv.Verdict.String()) {
			t.Errorf("table lacks %s or its verdict %s", sv.Skill, sv.Verdict)
		}
		sp, ok := pf.Skills[sv.Skill]
		switch {
		case sv.Verdict.Accepted() && (!ok || sp.Version != 2 || sp.Params != sv.Candidate.Params):
			t.Errorf("%s accepted but the file has %+v", sv.Skill, sp)
		case !sv.Verdict.Accepted() && ok:
			t.Errorf("%s rejected (%s) but the file has an entry", sv.Skill, sv.Reason)
		}
	}
	if rep.Accepted == 0 {
		t.Fatal("nothing accepted against the built-in defaults")
	}

	r = refitCLI(t, dir, nil, "refit", "--from", "a.jsonl", "--current", "p.json", "--out", "p2.json", "--report", "r2.json")
	if r.code != 0 {
		t.Fatalf("second refit exit %d: %s", r.code, r.stderr)
	}
	rep2 := refitReport(t, filepath.Join(dir, "r2.json"))
	if rep2.CurrentVersion != 2 || rep2.Accepted != 0 || !strings.Contains(r.stdout, "no skill accepted") {
		t.Errorf("second refit: current %d, accepted %d:\n%s", rep2.CurrentVersion, rep2.Accepted, r.stdout)
	}
	if _, err := os.Stat(filepath.Join(dir, "p2.json")); !os.IsNotExist(err) {
		t.Error("a parameter file was written although nothing was accepted")
	}

	before := listDir(t, dir)
	r = refitCLI(t, dir, nil, "refit", "--from", "a.jsonl", "--dry-run", "--out", "p3.json")
	if r.code != 0 || !strings.Contains(r.stdout, "dry run:") || !strings.Contains(r.stderr, "ignored") {
		t.Errorf("dry run exit %d:\n%s\n%s", r.code, r.stdout, r.stderr)
	}
	if after := listDir(t, dir); strings.Join(after, ",") != strings.Join(before, ",") {
		t.Errorf("dry run changed the folder: %v → %v", before, after)
	}
}

// From the answers topic of a broker over TCP, publishing: the accepted
// skills land on the params topic as version 2, all of them; a second
// refit reads the set in force from the topic, accepts nothing and
// publishes nothing.
func TestCLIRefitTopicPublish(t *testing.T) {
	b, err := stream.StartBroker(stream.BrokerOptions{Addr: "127.0.0.1:0", Logger: zerolog.Nop()})
	if err != nil {
		t.Fatal(err)
	}
	defer b.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 60*time.Second)
	defer cancel()
	if err := stream.EnsureTopics(ctx, []string{b.Addr()}, stream.Topics("answers", "attain.mastery", "attain.deadletter", "attain.params", 3), zerolog.Nop()); err != nil {
		t.Fatal(err)
	}
	g, err := fitjob.NewGenerator(fitjob.Cohort{Learners: 300, Opportunities: 15, Seed: 5, Skills: fitjob.HarbourLane().Skills[:3]})
	if err != nil {
		t.Fatal(err)
	}
	var msgs []kafka.Message
	for a := range g.All() {
		v, _ := json.Marshal(a)
		msgs = append(msgs, kafka.Message{Key: []byte(a.Learner), Value: v})
	}
	msgs = append(msgs, kafka.Message{Key: []byte("x"), Value: []byte("not json")})
	w := &kafka.Writer{Addr: kafka.TCP(b.Addr()), Topic: "answers", Balancer: kafka.Murmur2Balancer{}, RequiredAcks: kafka.RequireAll, BatchSize: 1000, BatchTimeout: time.Millisecond}
	if err := w.WriteMessages(ctx, msgs...); err != nil {
		t.Fatal(err)
	}
	w.Close()

	dir := t.TempDir()
	r := refitCLI(t, dir, nil, "refit", "--from", "topic:answers", "--brokers", b.Addr(), "--publish", "--report", "r.json")
	if r.code != 0 {
		t.Fatalf("refit exit %d:\n%s\n%s", r.code, r.stdout, r.stderr)
	}
	t.Logf("refit:\n%s", r.stdout)
	for _, want := range []string{"partition", "malformed", "1 rejected"} {
		if !strings.Contains(r.stderr, want) {
			t.Errorf("stderr lacks %q:\n%s", want, r.stderr)
		}
	}
	rep := refitReport(t, filepath.Join(dir, "r.json"))
	if !rep.Published || rep.Topic != "attain.params" || rep.Version != 2 || rep.Data.Rejected != 1 || rep.Data.Answers != 300*15*3 {
		t.Fatalf("report: published %v to %q, version %d, data %+v", rep.Published, rep.Topic, rep.Version, rep.Data)
	}
	pf, err := stream.ReadParams(ctx, []string{b.Addr()}, "attain.params", nil, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	if pf.Version != 2 || len(pf.Skills) != rep.Accepted || rep.Accepted == 0 {
		t.Fatalf("params topic: version %d, %d skills; %d accepted", pf.Version, len(pf.Skills), rep.Accepted)
	}
	for _, sv := range rep.Skills {
		if sv.Verdict.Accepted() && (pf.Skills[sv.Skill].Params != sv.Candidate.Params || pf.Skills[sv.Skill].Version != 2) {
			t.Errorf("%s on the topic: %+v, accepted %v", sv.Skill, pf.Skills[sv.Skill], sv.Candidate.Params)
		}
	}

	r = refitCLI(t, dir, nil, "refit", "--from", "topic:answers", "--brokers", b.Addr(), "--publish", "--report", "r2.json")
	if r.code != 0 {
		t.Fatalf("second refit exit %d:\n%s", r.code, r.stderr)
	}
	rep2 := refitReport(t, filepath.Join(dir, "r2.json"))
	if rep2.CurrentVersion != 2 || rep2.Accepted != 0 || rep2.Published {
		t.Errorf("second refit: current %d, accepted %d, published %v", rep2.CurrentVersion, rep2.Accepted, rep2.Published)
	}
	for _, sv := range rep2.Skills {
		if sv.Current.Version != 2 && pf.Skills[sv.Skill].Version == 2 {
			t.Errorf("%s judged against version %d, want the topic's 2", sv.Skill, sv.Current.Version)
		}
	}
}

// From a processor's store: read while no processor holds it; refused,
// with the fix, while one does.
func TestCLIRefitStore(t *testing.T) {
	dir := t.TempDir()
	data := filepath.Join(dir, "data")
	st, err := state.OpenStore(data, state.StoreOptions{Logger: zerolog.Nop()})
	if err != nil {
		t.Fatal(err)
	}
	pt, err := st.Partition(0)
	if err != nil {
		t.Fatal(err)
	}
	g, _ := fitjob.NewGenerator(fitjob.Cohort{Learners: 120, Opportunities: 10, Seed: 2, Skills: fitjob.HarbourLane().Skills[:2]})
	off := int64(0)
	pf := state.NewParamFile()
	for a := range g.All() {
		if _, err := pt.Apply(a, off, pf); err != nil {
			t.Fatal(err)
		}
		off++
	}
	if err := pt.Commit(true); err != nil {
		t.Fatal(err)
	}
	// Held by this process: the child attain cannot open it.
	r := refitCLI(t, dir, nil, "refit", "--from", "store:"+data, "--dry-run")
	if r.code != 1 || !strings.Contains(r.stderr, "locked by a running processor") || !strings.Contains(r.stderr, "fix:") {
		t.Errorf("store held by another process: exit %d: %s", r.code, r.stderr)
	}
	if err := st.Close(); err != nil {
		t.Fatal(err)
	}
	r = refitCLI(t, dir, nil, "refit", "--from", "store:"+data, "--dry-run")
	if r.code != 0 || !strings.Contains(r.stdout, "store:"+data) || !strings.Contains(r.stdout, "2400 answers, 120 learners") {
		t.Errorf("store refit exit %d:\n%s\n%s", r.code, r.stdout, r.stderr)
	}
	r = refitCLI(t, dir, nil, "refit", "--from", "store:"+filepath.Join(dir, "nothing-here"), "--dry-run")
	if r.code != 1 || !strings.Contains(r.stderr, "no store") {
		t.Errorf("missing store: exit %d: %s", r.code, r.stderr)
	}
	if _, err := os.Stat(filepath.Join(dir, "nothing-here")); !os.IsNotExist(err) {
		t.Error("refit created a store where there was none")
	}
}

// Bad command lines name the flag and the fix, and leave nothing behind.
func TestCLIRefitBadFlags(t *testing.T) {
	src, _ := filepath.Abs("../../testdata/refit")
	too := filepath.Join(src, "too-few.jsonl")
	for _, tc := range []struct {
		args []string
		code int
		want string
	}{
		{[]string{"--from", too}, 2, "nothing to do with the result"},
		{[]string{"--from", "topic:answers", "--dry-run"}, 1, "needs Kafka brokers"},
		{[]string{"--from", too, "--publish"}, 1, "--publish needs Kafka brokers"},
		{[]string{"--from", too, "--out", "p.json", "--folds", "1"}, 1, "--folds = 1"},
		{[]string{"--from", too, "--out", "p.json", "--margin", "-1"}, 1, "--margin = -1"},
		{[]string{"--from", too, "--out", "p.json", "--order", "random"}, 1, `--order = "random"`},
		{[]string{"--from", too, "--out", "p.json"}, 1, "fewer than the minimum of 50"},
		{[]string{"--from", too, "--out", "p.json", "--current", "no-such.json"}, 1, "no-such.json"},
	} {
		dir := t.TempDir()
		r := refitCLI(t, dir, nil, append([]string{"refit"}, tc.args...)...)
		if r.code != tc.code || !strings.Contains(r.stderr, tc.want) {
			t.Errorf("%v: exit %d, stderr %q; want exit %d and %q", tc.args, r.code, r.stderr, tc.code, tc.want)
		}
		if names := listDir(t, dir); len(names) != 0 {
			t.Errorf("%v left %v", tc.args, names)
		}
	}
}

// The CronJob of deploy/kubernetes runs `attain refit` with flags this
// build knows, publishing from a topic, one job at a time.
func TestRefitCronJobManifest(t *testing.T) {
	raw, err := os.ReadFile("../../deploy/kubernetes/refit-cronjob.yaml")
	if err != nil {
		t.Fatal(err)
	}
	var cj struct {
		Kind string
		Spec struct {
			ConcurrencyPolicy string `yaml:"concurrencyPolicy"`
			JobTemplate       struct {
				Spec struct {
					Template struct {
						Spec struct {
							Containers []struct {
								Args []string
							}
						}
					}
				}
			} `yaml:"jobTemplate"`
		}
	}
	if err := yaml.Unmarshal(raw, &cj); err != nil {
		t.Fatal(err)
	}
	cs := cj.Spec.JobTemplate.Spec.Template.Spec.Containers
	if cj.Kind != "CronJob" || cj.Spec.ConcurrencyPolicy != "Forbid" || len(cs) != 1 {
		t.Fatalf("kind %q, concurrency %q, %d containers", cj.Kind, cj.Spec.ConcurrencyPolicy, len(cs))
	}
	args := cs[0].Args
	if len(args) == 0 || args[0] != "refit" || !slices.Contains(args, "--publish") || !slices.Contains(args, "topic:answers") {
		t.Fatalf("args %v", args)
	}
	help := refitCLI(t, t.TempDir(), nil, "refit", "-h")
	for _, a := range args[1:] {
		if strings.HasPrefix(a, "--") && !strings.Contains(help.stderr, "  -"+strings.TrimPrefix(a, "--")+" ") && !strings.Contains(help.stderr, "  -"+strings.TrimPrefix(a, "--")+"\n") {
			t.Errorf("the CronJob passes %s, which attain refit does not know", a)
		}
	}
}
