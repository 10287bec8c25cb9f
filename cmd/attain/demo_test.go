package main

import (
	"bytes"
	"context"
	"errors"
	"os"
	"path/filepath"
	"regexp"
	"runtime"
	"runtime/pprof"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/attain-dev/attain/fitjob"
)

// The demo runs in-process against its own embedded broker (kfake over
// TCP on 127.0.0.1) and a Pebble store in a temporary directory: nothing
// here is mocked.

// demoNumber reads the first capture group of re in out as a number
// (thousands separators allowed).
func demoNumber(t *testing.T, out string, re string) int64 {
	t.Helper()
	m := regexp.MustCompile(re).FindStringSubmatch(out)
	if m == nil {
		t.Fatalf("no match for %q in the output:\n%s", re, out)
	}
	n, err := strconv.ParseInt(strings.ReplaceAll(m[1], ",", ""), 10, 64)
	if err != nil {
		t.Fatalf("%q: %v", m[1], err)
	}
	return n
}

// checkNoLeak fails when more goroutines run than before, once a grace
// period has let stopped ones exit, and shows what still runs.
func checkNoLeak(t *testing.T, before int) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for runtime.NumGoroutine() > before && time.Now().Before(deadline) {
		time.Sleep(50 * time.Millisecond)
	}
	if n := runtime.NumGoroutine(); n > before {
		var b bytes.Buffer
		pprof.Lookup("goroutine").WriteTo(&b, 1)
		t.Errorf("%d goroutines after the demo, %d before:\n%s", n, before, b.String())
	}
}

// checkAccounts checks the summary's input accounting: every message
// produced was applied or dead-lettered, none twice, and the dead letters
// are the malformed messages injected among the answers produced. total
// is the cohort's size: the demo injects its three malformed messages
// before the answers at a fifth, a half and four fifths of it.
func checkAccounts(t *testing.T, out string, total int64) (produced, answers int64) {
	t.Helper()
	produced = demoNumber(t, out, `input messages: ([\d,]+) produced`)
	answers = demoNumber(t, out, `produced \(([\d,]+) answers \+ \d+ malformed\)`)
	malformed := demoNumber(t, out, `answers \+ (\d+) malformed\)`)
	applied := demoNumber(t, out, `\n  applied ([\d,]+) \+ duplicates`)
	dups := demoNumber(t, out, `duplicates ([\d,]+) \+ dead-lettered`)
	dead := demoNumber(t, out, `\ndead letters: ([\d,]+) \(see attain\.deadletter\)`)
	reasons := []string{`malformed: not valid JSON`, `invalid: field "correct": missing`, `invalid: field "skills": empty list`}
	var want int64
	for _, at := range []int64{total / 5, total / 2, total * 4 / 5} {
		if answers > at {
			want++
		}
	}
	if malformed != want || dead != want {
		t.Errorf("malformed messages produced %d, dead letters %d; want %d for %d answers of %d", malformed, dead, want, answers, total)
	}
	if applied != produced-dead {
		t.Errorf("applied %d, want produced %d − dead letters %d = %d", applied, produced, dead, produced-dead)
	}
	if dups != 0 {
		t.Errorf("duplicates = %d, want 0 (every answer id is distinct)", dups)
	}
	if produced != answers+malformed {
		t.Errorf("produced %d, want answers %d + malformed %d", produced, answers, malformed)
	}
	// The dead letters were read back from the dead-letter topic, each
	// with the reason the decoder gave.
	for _, r := range reasons[:want] {
		if !strings.Contains(out, r) {
			t.Errorf("the summary lists no dead letter with %q", r)
		}
	}
	return produced, answers
}

// A whole demo of 40 learners: every answer produced is applied, the
// three malformed ones are dead-lettered, each of the six skills has its
// row with every learner and every answer, and nothing keeps running.
func TestDemoRunsToTheEnd(t *testing.T) {
	before := runtime.NumGoroutine()
	var stdout, stderr bytes.Buffer
	t0 := time.Now()
	err := runDemo(context.Background(), []string{"--learners", "40", "--speed", "20", "--duration", "10s"}, &stdout, &stderr)
	took := time.Since(t0)
	out := stdout.String()
	if err != nil {
		t.Fatalf("demo: %v\nstdout:\n%s\nstderr:\n%s", err, out, stderr.String())
	}
	t.Logf("the demo took %v", took)

	// 40 learners × 6 skills × 30 opportunities (fitjob.Cohort defaults).
	const learners, perSkill = 40, 40 * 30
	_, answers := checkAccounts(t, out, 6*perSkill)
	if answers != 6*perSkill {
		t.Errorf("answers = %d, want 40 learners × 6 skills × 30 = %d", answers, 6*perSkill)
	}
	if !strings.Contains(out, "\nSummary\n") {
		t.Errorf("the summary does not say the run completed:\n%s", out)
	}
	for _, sk := range fitjob.HarbourLane().Skills {
		// skill, learners, answers, mastered, stuck, median.
		re := regexp.MustCompile(`(?m)^` + regexp.QuoteMeta(sk.Skill) + ` +(\d+) +([\d,]+) +(\d+) +(\d+) +([\d.]+|-)$`)
		m := re.FindStringSubmatch(out)
		if m == nil {
			t.Errorf("the summary has no row for skill %s:\n%s", sk.Skill, out)
			continue
		}
		if m[1] != strconv.Itoa(learners) || m[2] != "1,200" {
			t.Errorf("skill %s: learners %s, answers %s; want %d and 1,200", sk.Skill, m[1], m[2], learners)
		}
		mastered, _ := strconv.Atoi(m[3])
		stuck, _ := strconv.Atoi(m[4])
		if mastered > learners || stuck > learners {
			t.Errorf("skill %s: mastered %d, stuck %d: more than the %d learners", sk.Skill, mastered, stuck, learners)
		}
		// The true parameters are listed beside the skill's name.
		p := sk.Params
		truth := regexp.MustCompile(`(?m)^` + regexp.QuoteMeta(sk.Skill) + ` +` + strconv.FormatFloat(p.Prior, 'f', 2, 64) +
			` +` + strconv.FormatFloat(p.Learn, 'f', 2, 64) + ` +` + strconv.FormatFloat(p.Guess, 'f', 2, 64) +
			` +` + strconv.FormatFloat(p.Slip, 'f', 2, 64) + ` +`)
		if !truth.MatchString(out) {
			t.Errorf("the summary does not list skill %s's true parameters %+v", sk.Skill, p)
		}
	}
	// The easy skill is mastered by more learners than the one few
	// learners ever master (the scenario's design: prior 0.50 and learn
	// 0.20 against 0.05 and 0.01).
	easy := demoNumber(t, out, `(?m)^journal-entries +\d+ +[\d,]+ +(\d+)`)
	hard := demoNumber(t, out, `(?m)^payroll-deductions +\d+ +[\d,]+ +(\d+)`)
	if easy <= hard {
		t.Errorf("journal-entries mastered by %d learners, payroll-deductions by %d: want more for the easy skill", easy, hard)
	}
	if reached := demoNumber(t, out, `attain\.mastery: ([\d,]+) reached`); reached < easy {
		t.Errorf("%d reached events read back, fewer than the %d learners who mastered journal-entries", reached, easy)
	}
	checkSwap(t, out, 6*perSkill/2)
	if !strings.Contains(out, "data removed") {
		t.Errorf("the summary does not say the data directory was removed:\n%s", out)
	}
	if strings.Contains(out, "\x1b[") {
		t.Errorf("ANSI control sequences in the output to a non-terminal")
	}
	checkNoLeak(t, before)
}

// Ctrl-C (the context ending) while the cohort is produced ends the demo
// early with the same summary, once what was produced has been applied.
func TestDemoInterrupted(t *testing.T) {
	before := runtime.NumGoroutine()
	dir := filepath.Join(t.TempDir(), "kept")
	// 6 s of producing, interrupted after about 2.5 s: between the first
	// and the second malformed message.
	ctx, cancel := context.WithTimeout(context.Background(), 2500*time.Millisecond)
	defer cancel()
	var stdout, stderr bytes.Buffer
	err := runDemo(ctx, []string{"--learners", "40", "--duration", "6s", "--keep", dir}, &stdout, &stderr)
	out := stdout.String()
	if err != nil {
		t.Fatalf("demo: %v\nstdout:\n%s\nstderr:\n%s", err, out, stderr.String())
	}
	if !strings.Contains(out, "Summary (interrupted: the answers produced so far, all of them applied)") {
		t.Fatalf("no interrupted summary:\n%s", out)
	}
	_, answers := checkAccounts(t, out, 40*6*30)
	if answers <= 0 || answers >= 40*6*30 {
		t.Errorf("answers produced before the interrupt = %d, want some but not all of %d", answers, 40*6*30)
	}
	for _, sk := range fitjob.HarbourLane().Skills {
		if !regexp.MustCompile(`(?m)^` + regexp.QuoteMeta(sk.Skill) + ` +\d+ +[\d,]+ `).MatchString(out) {
			t.Errorf("the summary has no row for skill %s", sk.Skill)
		}
	}
	// --keep keeps the store, the broker's data and the log.
	if _, err := os.Stat(filepath.Join(dir, "demo.log")); err != nil {
		t.Errorf("--keep: %v", err)
	}
	if !strings.Contains(out, "data kept in "+dir) {
		t.Errorf("the output does not say where the data was kept:\n%s", out)
	}
	checkNoLeak(t, before)
}

func TestDemoBadFlags(t *testing.T) {
	full := t.TempDir()
	if err := os.WriteFile(filepath.Join(full, "x"), nil, 0o644); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		args []string
		want string // in the error; "" = a usage error
	}{
		{[]string{"--learners", "0"}, "--learners = 0: must be 1 or more"},
		{[]string{"--speed", "0"}, "--speed = 0: must be a number above 0"},
		{[]string{"--speed", "NaN"}, "--speed = NaN: must be a number above 0"},
		{[]string{"--duration", "-1s"}, "--duration = -1s: must be above 0"},
		{[]string{"--keep", full}, "--keep " + full + ": the directory is not empty"},
		{[]string{"extra"}, ""},
		{[]string{"--no-such-flag"}, ""},
	} {
		var stdout, stderr bytes.Buffer
		err := runDemo(context.Background(), tc.args, &stdout, &stderr)
		switch {
		case tc.want == "" && !errors.Is(err, errUsage):
			t.Errorf("%v: err = %v, want a usage error", tc.args, err)
		case tc.want != "" && (err == nil || !strings.Contains(err.Error(), tc.want)):
			t.Errorf("%v: err = %v, want one containing %q", tc.args, err, tc.want)
		}
	}
}

// checkSwap checks the half-way refit in the summary: version 1 gave way
// to version 2 once the first half (half answers) was applied; the table
// lists every skill with its parameters before, after and the truth; the
// events on answers before the swap all carry version 1 and those after
// it all version 2, some of each.
func checkSwap(t *testing.T, out string, half int64) {
	t.Helper()
	if at := demoNumber(t, out, `(?m)^params v1 → v2 at answer ([\d,]+): \d+ of 6 skills refitted$`); at != half {
		t.Errorf("the swap came at answer %d, want %d (the first half)", at, half)
	}
	accepted := 0
	f := func(x float64) string { return strings.TrimPrefix(strconv.FormatFloat(x, 'f', 2, 64), "0") }
	num := `(\.\d\d|1\.00)`
	for _, sk := range fitjob.HarbourLane().Skills {
		// skill[*], then per parameter: v1 → v2 truth.
		p := sk.Params
		re := regexp.MustCompile(`(?m)^` + regexp.QuoteMeta(sk.Skill) + `(\*?) +` +
			`\.30→` + num + ` ` + regexp.QuoteMeta(f(p.Prior)) + ` +` +
			`\.10→` + num + ` ` + regexp.QuoteMeta(f(p.Learn)) + ` +` +
			`\.20→` + num + ` ` + regexp.QuoteMeta(f(p.Guess)) + ` +` +
			`\.10→` + num + ` ` + regexp.QuoteMeta(f(p.Slip)) + `$`)
		m := re.FindStringSubmatch(out)
		if m == nil {
			t.Errorf("the swap table has no row for %s with v1's defaults and the truth %+v:\n%s", sk.Skill, p, out)
			continue
		}
		if m[1] == "" {
			accepted++
		} else if m[2] != ".30" || m[3] != ".10" || m[4] != ".20" || m[5] != ".10" {
			t.Errorf("%s was rejected but its v2 parameters changed: %v", sk.Skill, m[2:])
		}
	}
	if got := demoNumber(t, out, `(?m)^params v1 → v2 at answer [\d,]+: (\d+) of 6`); got != int64(accepted) {
		t.Errorf("%d skills said refitted, %d rows without the rejected mark", got, accepted)
	}
	m := regexp.MustCompile(`(?m)^events by params_version: on answers before the swap (.*); after it (.*)$`).FindStringSubmatch(out)
	if m == nil {
		t.Fatalf("no events-by-version line:\n%s", out)
	}
	if !regexp.MustCompile(`^v1 [\d,]+$`).MatchString(m[1]) || !regexp.MustCompile(`^v2 [\d,]+$`).MatchString(m[2]) {
		t.Errorf("events by version: before the swap %q (want only v1), after it %q (want only v2)", m[1], m[2])
	}
}
