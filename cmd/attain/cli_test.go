package main

import (
	"bytes"
	"context"
	"errors"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strings"
	"testing"

	"github.com/attain-dev/attain/state"
)

// End-to-end tests of the binary: the test binary re-runs itself as
// `attain` (TestCLIHelperProcess), so what runs is main's own dispatch with
// real files, exit codes, stdout and stderr.

const cliHelperEnv = "CLI_HELPER_PROCESS_FOR_ATTAIN_TESTS"

// TestCLIHelperProcess is not a test: it is the entry point of the child
// processes started by attainCLI, and returns at once otherwise.
func TestCLIHelperProcess(t *testing.T) {
	if os.Getenv(cliHelperEnv) != "1" {
		return
	}
	args := os.Args
	for i, a := range args {
		if a == "--" {
			args = args[i+1:]
			break
		}
	}
	os.Exit(run(context.Background(), args, os.Stdout, os.Stderr))
}

type cliResult struct {
	stdout, stderr string
	code           int
}

// attainCLI runs `attain args...` in dir with extra environment variables.
func attainCLI(t *testing.T, dir string, env []string, args ...string) cliResult {
	t.Helper()
	cmd := exec.Command(os.Args[0], append([]string{"-test.run=^TestCLIHelperProcess$", "--"}, args...)...)
	cmd.Dir = dir
	cmd.Env = append(append(os.Environ(), cliHelperEnv+"=1"), env...)
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

func listDir(t *testing.T, dir string) []string {
	t.Helper()
	ents, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	var names []string
	for _, e := range ents {
		names = append(names, e.Name())
	}
	return names
}

// simulate then refit recovers the true parameters of the default
// scenario (2,000 learners × 30 opportunities at six skills; ±0.03, the
// required check) and prints the per-skill table.
func TestCLISimulateThenRefitRecovers(t *testing.T) {
	dir := t.TempDir()
	r := attainCLI(t, dir, nil, "simulate", "--out", "answers.jsonl", "--seed", "7")
	if r.code != 0 {
		t.Fatalf("simulate exit %d: %s", r.code, r.stderr)
	}
	if !strings.Contains(r.stdout, "wrote 360000 answers") {
		t.Errorf("simulate said %q", r.stdout)
	}
	truth, err := state.LoadParamFile(filepath.Join(dir, "answers.jsonl.truth.json"))
	if err != nil {
		t.Fatal(err)
	}
	r = attainCLI(t, dir, nil, "refit", "--from", "answers.jsonl", "--out", "params.json")
	if r.code != 0 {
		t.Fatalf("refit exit %d: %s", r.code, r.stderr)
	}
	t.Logf("refit:\n%s", r.stdout)
	got, err := state.LoadParamFile(filepath.Join(dir, "params.json"))
	if err != nil {
		t.Fatal(err)
	}
	// Version 2: the processors already serve version 1 (the built-in
	// defaults), so a refit against them is the next version.
	if got.Version != 2 || len(got.Skills) != 6 || len(truth.Skills) != 6 {
		t.Fatalf("version %d, %d skills fitted, %d true", got.Version, len(got.Skills), len(truth.Skills))
	}
	for name, want := range truth.Skills {
		sp, ok := got.Skills[name]
		if !ok {
			t.Errorf("%s not fitted", name)
			continue
		}
		if !strings.Contains(r.stdout, name) {
			t.Errorf("table has no row for %s", name)
		}
		g, w := sp.Params, want.Params
		for _, f := range []struct {
			n    string
			g, w float64
		}{{"prior", g.Prior, w.Prior}, {"learn", g.Learn, w.Learn}, {"guess", g.Guess, w.Guess}, {"slip", g.Slip, w.Slip}, {"forget", g.Forget, w.Forget}} {
			if math.Abs(f.g-f.w) > 0.03 {
				t.Errorf("%s %s = %.4f, truth %.4f", name, f.n, f.g, f.w)
			}
		}
		if sp.Fit == nil || sp.Fit.Heldout == nil || sp.Fit.Learners != 2000 || sp.Fit.Answers != 60000 || !(sp.Fit.Heldout.AUC > 0.6) {
			t.Errorf("%s fit info %+v", name, sp.Fit)
		}
	}
	for _, col := range []string{"held-out AUC", "held-out log-loss", "verdict", "overall, held out"} {
		if !strings.Contains(r.stdout, col) {
			t.Errorf("table lacks %q", col)
		}
	}
}

var createdLine = regexp.MustCompile(`(?m)^  "created": ".*",$`)

// One core or two: byte-identical parameter files apart from `created`.
func TestCLIRefitSameOnAnyNumberOfCores(t *testing.T) {
	dir := t.TempDir()
	if r := attainCLI(t, dir, nil, "simulate", "--out", "a.jsonl", "--learners", "300", "--seed", "3"); r.code != 0 {
		t.Fatalf("simulate: %s", r.stderr)
	}
	var files [][]byte
	for _, procs := range []string{"1", "2"} {
		out := "p" + procs + ".json"
		if r := attainCLI(t, dir, []string{"GOMAXPROCS=" + procs}, "refit", "--from", "a.jsonl", "--out", out, "--seed", "5"); r.code != 0 {
			t.Fatalf("refit GOMAXPROCS=%s: %s", procs, r.stderr)
		}
		b, err := os.ReadFile(filepath.Join(dir, out))
		if err != nil {
			t.Fatal(err)
		}
		if !createdLine.Match(b) {
			t.Fatalf("no created line in %s", b)
		}
		files = append(files, createdLine.ReplaceAll(b, nil))
	}
	if !bytes.Equal(files[0], files[1]) {
		t.Errorf("GOMAXPROCS 1 and 2 wrote different parameter files:\n%s\n---\n%s", files[0], files[1])
	}
}

// Bad input: each rejected line is named with its number and field; when
// nothing can be fitted the exit code is non-zero and no parameter file (not
// even a temporary one) is left.
func TestCLIRefitBadInput(t *testing.T) {
	src, _ := filepath.Abs("../../testdata/refit")
	for _, tc := range []struct {
		name   string
		args   []string
		code   int
		stderr []string
	}{
		{"malformed and missing fields", []string{"--from", filepath.Join(src, "mixed.jsonl")}, 1, []string{
			"line 3: not valid JSON",
			`line 4: field "correct": missing; fix: set "correct" to true or false`,
			`line 6: field "skills": empty list`,
			`line 7: field "correct": must be a JSON boolean`,
			`line 8: field "at": "yesterday" is not an RFC 3339 time`,
			`line 9: field "id": missing`,
			"6 of 10 lines rejected, 3 answers read",
			"nothing to fit",
			"no parameter file written",
		}},
		{"empty file", []string{"--from", filepath.Join(src, "empty.jsonl")}, 1, []string{"is empty", "nothing to fit: no valid answers", "no parameter file written"}},
		{"only bad lines", []string{"--from", filepath.Join(src, "all-bad.jsonl")}, 1, []string{
			"line 1: not valid JSON", `line 2: field "skills": missing`, `line 3: field "skills": empty list`, "no valid answers"}},
		{"too few learners", []string{"--from", filepath.Join(src, "too-few.jsonl")}, 1, []string{
			"payroll-deductions: 2 learners, fewer than the minimum of 50", "no parameter file written"}},
		{"missing file", []string{"--from", filepath.Join(src, "no-such-file.jsonl")}, 1, []string{"no-such-file.jsonl", "no such file"}},
		{"source not yet available", []string{"--from", "topic:answers"}, 1, []string{"needs Kafka brokers", "fix: give --brokers"}},
		{"no --from", nil, 2, []string{"--from is required"}},
		{"bad --folds", []string{"--from", filepath.Join(src, "too-few.jsonl"), "--folds", "0"}, 1, []string{"--folds = 0"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			r := attainCLI(t, dir, nil, append([]string{"refit", "--out", "params.json"}, tc.args...)...)
			if r.code != tc.code {
				t.Errorf("exit %d, want %d; stderr:\n%s", r.code, tc.code, r.stderr)
			}
			for _, want := range tc.stderr {
				if !strings.Contains(r.stderr, want) {
					t.Errorf("stderr lacks %q:\n%s", want, r.stderr)
				}
			}
			if names := listDir(t, dir); len(names) != 0 {
				t.Errorf("left behind %v", names)
			}
		})
	}
}

// Bad lines inside a good history are reported (the first ten, then a
// count) and skipped; the rest is fitted.
func TestCLIRefitSkipsBadLines(t *testing.T) {
	dir := t.TempDir()
	if r := attainCLI(t, dir, nil, "simulate", "--out", "a.jsonl", "--learners", "100", "--opportunities", "10", "--skills", "trial-balance,journal-entries"); r.code != 0 {
		t.Fatalf("simulate: %s", r.stderr)
	}
	b, err := os.ReadFile(filepath.Join(dir, "a.jsonl"))
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.SplitAfter(string(b), "\n")
	var out strings.Builder
	for i, l := range lines {
		out.WriteString(l)
		if i < 12 {
			out.WriteString(`{"id":"x","learner":"hl-09999","skills":["trial-balance"],"at":"2025-09-01T18:00:00Z"}` + "\n")
		}
	}
	if err := os.WriteFile(filepath.Join(dir, "a.jsonl"), []byte(out.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	r := attainCLI(t, dir, nil, "refit", "--from", "a.jsonl", "--out", "p.json")
	if r.code != 0 {
		t.Fatalf("exit %d: %s", r.code, r.stderr)
	}
	for _, want := range []string{`line 2: field "correct": missing`, `line 20: field "correct": missing`, "… and 2 more rejected lines", "12 of 2012 lines rejected, 2000 answers read"} {
		if !strings.Contains(r.stderr, want) {
			t.Errorf("stderr lacks %q:\n%s", want, r.stderr)
		}
	}
	if strings.Contains(r.stderr, "line 22:") {
		t.Errorf("more than ten rejected lines printed:\n%s", r.stderr)
	}
	pf, err := state.LoadParamFile(filepath.Join(dir, "p.json"))
	if err != nil {
		t.Fatal(err)
	}
	if len(pf.Skills) != 2 || pf.Skills["trial-balance"].Fit.Learners != 100 {
		t.Errorf("fitted %+v", pf.Skills)
	}
	// --previous: judged against the set just fitted on the same answers,
	// no candidate is better, so nothing is accepted and no file written.
	r = attainCLI(t, dir, nil, "refit", "--from", "a.jsonl", "--out", "p2.json", "--previous", "p.json")
	if r.code != 0 {
		t.Fatalf("exit %d: %s", r.code, r.stderr)
	}
	if !strings.Contains(r.stdout+r.stderr, "0 accepted") {
		t.Errorf("refit against its own fit accepted something:\n%s\n%s", r.stdout, r.stderr)
	}
	if _, err := os.Stat(filepath.Join(dir, "p2.json")); !os.IsNotExist(err) {
		t.Errorf("p2.json written although nothing was accepted (stat: %v)", err)
	}
}

func TestCLISimulateBadFlags(t *testing.T) {
	for _, tc := range []struct {
		args []string
		code int
		want string
	}{
		{[]string{"simulate"}, 2, "--out is required"},
		{[]string{"simulate", "--out", "a.jsonl", "--skills", "trial-balance,,payroll-deductions"}, 1, "empty skill name"},
		{[]string{"simulate", "--out", "a.jsonl", "--learners", "0"}, 1, "--learners = 0"},
		{[]string{"simulate", "--out", "a.jsonl", "--no-such-flag"}, 2, "no-such-flag"},
	} {
		dir := t.TempDir()
		r := attainCLI(t, dir, nil, tc.args...)
		if r.code != tc.code || !strings.Contains(r.stderr, tc.want) {
			t.Errorf("%v: exit %d, stderr %q; want exit %d and %q", tc.args, r.code, r.stderr, tc.code, tc.want)
		}
		if names := listDir(t, dir); len(names) != 0 {
			t.Errorf("%v left %v", tc.args, names)
		}
	}
}
