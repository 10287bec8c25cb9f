package fitjob

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/attain-dev/attain/state"
)

// Every rejected line is named with its line number and field, and the
// valid lines around it are kept.
func TestReadAnswersNamesLineAndField(t *testing.T) {
	var rejected []*LineError
	src := &FileSource{Path: "../testdata/refit/mixed.jsonl", Reject: func(e *LineError) { rejected = append(rejected, e) }}
	var got []string
	if err := src.Answers(context.Background(), func(a state.Answer) error {
		got = append(got, a.ID)
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	if strings.Join(got, ",") != "a1,a2,a9" {
		t.Errorf("valid answers %v, want a1,a2,a9", got)
	}
	want := []struct {
		line  int
		field string
	}{{3, ""}, {4, "correct"}, {6, "skills"}, {7, "correct"}, {8, "at"}, {9, "id"}}
	if len(rejected) != len(want) {
		t.Fatalf("rejected %d lines, want %d: %v", len(rejected), len(want), rejected)
	}
	for i, w := range want {
		e := rejected[i]
		if e.Line != w.line || e.Field != w.field {
			t.Errorf("rejection %d: line %d field %q, want line %d field %q (%v)", i, e.Line, e.Field, w.line, w.field, e)
		}
		msg := e.Error()
		if !strings.Contains(msg, "line ") || !strings.Contains(msg, "fix: ") || (w.field != "" && !strings.Contains(msg, `"`+w.field+`"`)) {
			t.Errorf("message %q does not name the line, field and fix", msg)
		}
		if !errors.Is(e, state.ErrBadAnswer) {
			t.Errorf("line %d: error does not wrap state.ErrBadAnswer", e.Line)
		}
	}
	if st := src.Stats; st.Lines != 10 || st.Blank != 1 || st.Answers != 3 || st.Rejected != 6 {
		t.Errorf("stats %+v, want 10 lines, 1 blank, 3 answers, 6 rejected", st)
	}
}

func TestRefitNothingToFit(t *testing.T) {
	ctx := context.Background()
	for _, tc := range []struct {
		file, want string
	}{
		{"empty.jsonl", "no valid answers"},
		{"all-bad.jsonl", "no valid answers"},
		{"too-few.jsonl", "payroll-deductions: 2 learners, fewer than the minimum of 20"},
	} {
		h, err := LoadHistory(ctx, &FileSource{Path: "../testdata/refit/" + tc.file})
		if err != nil {
			t.Fatal(err)
		}
		rep, err := Refit(ctx, h, RefitOptions{})
		if !errors.Is(err, ErrNothingToFit) || rep != nil {
			t.Errorf("%s: Refit = %v, %v; want ErrNothingToFit", tc.file, rep, err)
			continue
		}
		if !strings.Contains(err.Error(), tc.want) {
			t.Errorf("%s: %q does not say %q", tc.file, err, tc.want)
		}
	}
}

// Answers are ordered by `at` per learner, ties in file order; a repeated
// id of the same learner counts once (the first), of another learner it
// is a different answer.
func TestHistoryOrderAndDuplicates(t *testing.T) {
	lines := `{"id":"3","learner":"x","skills":["s"],"correct":false,"at":"2025-01-01T00:03:00Z"}
{"id":"1","learner":"x","skills":["s"],"correct":true,"at":"2025-01-01T00:01:00Z"}
{"id":"2a","learner":"x","skills":["s"],"correct":true,"at":"2025-01-01T00:02:00Z"}
{"id":"2b","learner":"x","skills":["s"],"correct":false,"at":"2025-01-01T00:02:00Z"}
{"id":"1","learner":"x","skills":["s"],"correct":false,"at":"2025-01-01T00:00:00Z"}
{"id":"1","learner":"y","skills":["s","t"],"correct":false,"at":"2025-01-01T00:00:00Z"}
`
	var hb HistoryBuilder
	if _, err := ReadAnswers(context.Background(), strings.NewReader(lines), &state.NativeDecoder{}, func(a state.Answer) error {
		hb.Add(a)
		return nil
	}, nil); err != nil {
		t.Fatal(err)
	}
	h := hb.History()
	if h.Duplicates != 1 || h.Answers() != 5 {
		t.Fatalf("duplicates %d answers %d; want 1, 5", h.Duplicates, h.Answers())
	}
	if strings.Join(h.Learners, ",") != "x,y" || strings.Join(h.Skills, ",") != "s,t" {
		t.Fatalf("learners %v skills %v", h.Learners, h.Skills)
	}
	d := h.SkillData(0, nil)
	if got := seqString(d.Seq(0)); got != "1100" {
		t.Errorf("x at s: %s, want 1100 (at order, tie in file order)", got)
	}
	if got := seqString(d.Seq(1)); got != "0" {
		t.Errorf("y at s: %s, want 0", got)
	}
	if td := h.SkillData(1, nil); td.Learners() != 1 || td.Answers() != 1 {
		t.Errorf("skill t: %d learners %d answers", td.Learners(), td.Answers())
	}
}

func seqString(bs []bool) string {
	var b strings.Builder
	for _, x := range bs {
		if x {
			b.WriteByte('1')
		} else {
			b.WriteByte('0')
		}
	}
	return b.String()
}

func cvHistory(t testing.TB, learners int, seed int64) (*History, *state.ParamFile) {
	g, err := NewGenerator(Cohort{Learners: learners, Opportunities: 15, Seed: seed,
		Skills: HarbourLane().Skills[:3]})
	if err != nil {
		t.Fatal(err)
	}
	var hb HistoryBuilder
	for a := range g.All() {
		hb.Add(a)
	}
	return hb.History(), g.Truth()
}

func refitNow() time.Time { return time.Date(2026, 1, 2, 3, 4, 5, 0, time.UTC) }

// The held-out metrics are exactly what an independent rebuild gives:
// fit each skill on the other folds' learners only, replay the fold's
// learners under those fits, pool the folds. Each answer is predicted once
// and only by a model that did not see its learner.
func TestRefitCrossValidationIsHeldOut(t *testing.T) {
	h, _ := cvHistory(t, 300, 9)
	opt := RefitOptions{Folds: 4, Seed: 3, Now: refitNow}
	rep, err := Refit(context.Background(), h, opt)
	if err != nil {
		t.Fatal(err)
	}
	if rep.Overall.N() != h.Answers() {
		t.Fatalf("overall scored %d answers, want every answer once (%d)", rep.Overall.N(), h.Answers())
	}
	folds := Folds(len(h.Learners), 4, 3)
	want := newEvaluation(len(h.Skills))
	for f := 0; f < 4; f++ {
		var train, held []int
		for l, g := range folds {
			if g == f {
				held = append(held, l)
			} else {
				train = append(train, l)
			}
		}
		ps := make([]state.Params, len(h.Skills))
		for s, name := range h.Skills {
			res, err := Fit(h.SkillData(s, train), Options{Seed: fitSeed(3, name, f)})
			if err != nil {
				t.Fatal(err)
			}
			ps[s] = res.Params
		}
		want.merge(h.evaluate(held, ps))
	}
	in := h.evaluate(nil, []state.Params{rep.Skills[0].Params, rep.Skills[1].Params, rep.Skills[2].Params})
	for s, sr := range rep.Skills {
		if sr.Decision != DecisionFitted || sr.Fit.Heldout == nil {
			t.Fatalf("%s: %s %s", sr.Skill, sr.Decision, sr.Reason)
		}
		m, _ := want.Skills[s].Metrics()
		if *sr.Fit.Heldout != m {
			t.Errorf("%s held-out %+v, independent rebuild %+v", sr.Skill, *sr.Fit.Heldout, m)
		}
		// Held out is worse than in sample, and better than chance.
		im, _ := in.Skills[s].Metrics()
		if m.AUC < 0.6 || m.LogLoss < im.LogLoss-1e-3 {
			t.Errorf("%s held-out AUC %.4f log-loss %.4f vs in-sample log-loss %.4f", sr.Skill, m.AUC, m.LogLoss, im.LogLoss)
		}
		if want := LogLik(h.SkillData(s, nil), sr.Params); sr.Fit.LogLik != want {
			t.Errorf("%s fit.loglik %v, want LogLik of all its answers %v", sr.Skill, sr.Fit.LogLik, want)
		}
		if sr.Fit.Learners != 300 || sr.Fit.Answers != 300*15 {
			t.Errorf("%s fit counts %d learners %d answers", sr.Skill, sr.Fit.Learners, sr.Fit.Answers)
		}
	}
	om, _ := want.Overall.Metrics()
	if got, _ := rep.Overall.Metrics(); got != om {
		t.Errorf("overall %+v, rebuild %+v", got, om)
	}
}

// The result does not depend on the number of workers, nor on the order of
// learners in the input.
func TestRefitDeterministic(t *testing.T) {
	h, _ := cvHistory(t, 120, 4)
	var outs [][]byte
	for _, w := range []int{1, 2, 7} {
		rep, err := Refit(context.Background(), h, RefitOptions{Workers: w, Seed: 8, Now: refitNow})
		if err != nil {
			t.Fatal(err)
		}
		b, _ := json.Marshal(rep.File)
		outs = append(outs, b)
	}
	if !bytes.Equal(outs[0], outs[1]) || !bytes.Equal(outs[0], outs[2]) {
		t.Error("different parameter files with 1, 2 and 7 workers")
	}
	// The same answers, learners fed in reverse order.
	var all []state.Answer
	g, _ := NewGenerator(Cohort{Learners: 120, Opportunities: 15, Seed: 4, Skills: HarbourLane().Skills[:3]})
	for a := range g.All() {
		all = append(all, a)
	}
	var hb HistoryBuilder
	for i := len(all) - 1; i >= 0; i-- {
		hb.Add(all[i])
	}
	rep, err := Refit(context.Background(), hb.History(), RefitOptions{Workers: 2, Seed: 8, Now: refitNow})
	if err != nil {
		t.Fatal(err)
	}
	b, _ := json.Marshal(rep.File)
	if !bytes.Equal(outs[0], b) {
		t.Error("different parameter file when the input is reversed")
	}
}

// Thin or uninformative skills are not fitted and say why; with a previous
// set they keep its entry (and its version), the default is kept and the
// version goes up by one.
func TestRefitThinSkillsAndPrevious(t *testing.T) {
	h0, _ := cvHistory(t, 60, 2)
	var hb HistoryBuilder
	for l, name := range h0.Learners {
		for i, st := range h0.steps[l] {
			hb.Add(state.Answer{ID: "a" + refitTestID(i), Learner: name, Skills: []string{h0.Skills[st.skills[0]]}, Correct: st.correct, At: time.Unix(0, st.at)})
		}
	}
	t0 := time.Date(2025, 9, 1, 0, 0, 0, 0, time.UTC)
	for i := range 5 { // a skill with 5 learners
		hb.Add(state.Answer{ID: "t", Learner: "thin-" + refitTestID(i), Skills: []string{"petty-cash"}, Correct: i%2 == 0, At: t0})
	}
	for i := range 30 { // a skill everyone gets right
		hb.Add(state.Answer{ID: "e", Learner: "easy-" + refitTestID(i), Skills: []string{"rounding"}, Correct: true, At: t0})
	}
	h := hb.History()
	prev := &state.ParamFile{Version: 7, Default: state.Params{Prior: 0.2, Learn: 0.2, Guess: 0.2, Slip: 0.2},
		Skills: map[string]state.SkillParams{"petty-cash": {Params: state.Params{Prior: 0.4, Learn: 0.3, Guess: 0.1, Slip: 0.1}, Version: 5}}}
	rep, err := Refit(context.Background(), h, RefitOptions{Previous: prev, Now: refitNow})
	if err != nil {
		t.Fatal(err)
	}
	f := rep.File
	if f.Version != 8 || f.Default != prev.Default || !f.Created.Equal(refitNow()) {
		t.Errorf("version %d default %v created %v", f.Version, f.Default, f.Created)
	}
	byName := map[string]SkillReport{}
	for _, sr := range rep.Skills {
		byName[sr.Skill] = sr
	}
	if sr := byName["petty-cash"]; sr.Decision != DecisionKeptPrevious || !strings.Contains(sr.Reason, "5 learners") {
		t.Errorf("petty-cash: %s (%s)", sr.Decision, sr.Reason)
	}
	if sp, ok := f.Skills["petty-cash"]; !ok || sp.Version != 5 || sp.Params != prev.Skills["petty-cash"].Params {
		t.Errorf("petty-cash entry %+v, want the previous one with version 5", sp)
	}
	if sr := byName["rounding"]; sr.Decision != DecisionKeptDefault || !strings.Contains(sr.Reason, "all 30 answers are correct") {
		t.Errorf("rounding: %s (%s)", sr.Decision, sr.Reason)
	}
	if _, ok := f.Skills["rounding"]; ok {
		t.Error("rounding has an entry; want the default to serve it")
	}
	for _, s := range h0.Skills {
		if byName[s].Decision != DecisionFitted || f.Skills[s].Fit == nil || f.Skills[s].Version != 0 {
			t.Errorf("%s: %s", s, byName[s].Decision)
		}
	}
	if err := f.Validate(); err != nil {
		t.Error(err)
	}
}

func refitTestID(i int) string { return string(rune('a'+i/26)) + string(rune('a'+i%26)) }

// A refit is written atomically and reads back as a valid parameter file.
func TestRefitFileRoundTrip(t *testing.T) {
	h, _ := cvHistory(t, 80, 6)
	rep, err := Refit(context.Background(), h, RefitOptions{Now: refitNow})
	if err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "params.json")
	if err := rep.File.WriteFile(path); err != nil {
		t.Fatal(err)
	}
	back, err := state.LoadParamFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if len(back.Skills) != 3 || back.Skills["trial-balance"].Fit.Heldout == nil {
		t.Errorf("read back %+v", back)
	}
	ents, _ := os.ReadDir(filepath.Dir(path))
	if len(ents) != 1 {
		t.Errorf("%d files in the folder, want only the parameter file", len(ents))
	}
}

func TestRefitStopsWithContext(t *testing.T) {
	h, _ := cvHistory(t, 100, 1)
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := Refit(ctx, h, RefitOptions{}); !errors.Is(err, context.Canceled) {
		t.Errorf("Refit with a cancelled context: %v", err)
	}
}

// BenchmarkRefitHarbourLane: the default cohort (2,000 learners × 6 skills
// × 30 opportunities), in memory, 5-fold cross-validation.
func BenchmarkRefitHarbourLane(b *testing.B) {
	g, _ := NewGenerator(Cohort{Seed: 1})
	var hb HistoryBuilder
	for a := range g.All() {
		hb.Add(a)
	}
	h := hb.History()
	b.ResetTimer()
	for b.Loop() {
		if _, err := Refit(context.Background(), h, RefitOptions{Seed: 1}); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkLoadHistory: reading the default cohort from its JSON-lines file.
func BenchmarkLoadHistory(b *testing.B) {
	path := filepath.Join(b.TempDir(), "answers.jsonl")
	f, err := os.Create(path)
	if err != nil {
		b.Fatal(err)
	}
	n, err := WriteCohort(f, Cohort{Seed: 1})
	f.Close()
	if err != nil {
		b.Fatal(err)
	}
	b.ResetTimer()
	for b.Loop() {
		if _, err := LoadHistory(context.Background(), &FileSource{Path: path}); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(n)*float64(b.N)/b.Elapsed().Seconds(), "answers/s")
}

// BenchmarkGenerator: drawing the default cohort's answers.
func BenchmarkGenerator(b *testing.B) {
	var n int
	for b.Loop() {
		g, _ := NewGenerator(Cohort{Seed: 1})
		for range g.All() {
			n++
		}
	}
	b.ReportMetric(float64(n)/b.Elapsed().Seconds(), "answers/s")
}
