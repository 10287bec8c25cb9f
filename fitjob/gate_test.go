package fitjob

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/attain-dev/attain/state"
)

// sliceSource is a Source over answers in memory.
type sliceSource []state.Answer

func (sliceSource) Name() string { return "test answers" }
func (s sliceSource) Answers(ctx context.Context, fn func(state.Answer) error) error {
	for _, a := range s {
		if err := fn(a); err != nil {
			return err
		}
	}
	return nil
}

func cohortAnswers(t testing.TB, c Cohort) ([]state.Answer, *state.ParamFile) {
	t.Helper()
	g, err := NewGenerator(c)
	if err != nil {
		t.Fatal(err)
	}
	var as []state.Answer
	for a := range g.All() {
		as = append(as, a)
	}
	return as, g.Truth()
}

func gatedRefit(t testing.TB, src Source, opt GatedRefitOptions) *GateReport {
	t.Helper()
	if opt.Now == nil {
		opt.Now = refitNow
	}
	if opt.Sorter.Dir == "" {
		opt.Sorter.Dir = t.TempDir()
	}
	rep, err := GatedRefit(context.Background(), src, opt)
	if err != nil {
		t.Fatal(err)
	}
	return rep
}

// The required check: a gated refit of 2,000 simulated learners × 30
// opportunities at the six Harbour Lane skills, judged against the
// built-in default set, accepts every skill, and every accepted parameter
// is within ±0.03 of the truth (the model core's tolerance,
// TestRefitRecoversHarbourLane). The report lists every skill with its
// verdict, and the new set is version 2 with each accepted entry at
// version 2.
func TestGatedRefitRecoversHarbourLane(t *testing.T) {
	as, truth := cohortAnswers(t, Cohort{Learners: 2000, Opportunities: 30, Seed: 2024})
	rep := gatedRefit(t, sliceSource(as), GatedRefitOptions{Seed: 5})
	if len(rep.Skills) != 6 || rep.Accepted != 6 || rep.Rejected != 0 {
		t.Fatalf("%d skills, %d accepted, %d rejected", len(rep.Skills), rep.Accepted, rep.Rejected)
	}
	if rep.CurrentVersion != 1 || rep.Version != 2 || rep.File == nil || rep.File.Version != 2 {
		t.Fatalf("versions: current %d, new %d, file %+v", rep.CurrentVersion, rep.Version, rep.File)
	}
	if rep.Data.Answers != 360_000 || rep.Data.Learners != 2000 || rep.Data.Duplicates != 0 {
		t.Errorf("data %+v", rep.Data)
	}
	for _, sv := range rep.Skills {
		want := truth.Skills[sv.Skill].Params
		if sv.Verdict != VerdictAccepted || sv.Candidate == nil {
			t.Errorf("%s: %s (%s)", sv.Skill, sv.Verdict, sv.Reason)
			continue
		}
		got := sv.Candidate.Params
		t.Logf("%-27s fitted %v\n%27s truth  %v; held-out log-loss %.4f vs default %.4f", sv.Skill, got, "", want,
			sv.Candidate.Heldout.LogLoss, sv.Current.Heldout.LogLoss)
		for _, f := range []struct {
			name      string
			got, want float64
		}{{"prior", got.Prior, want.Prior}, {"learn", got.Learn, want.Learn}, {"guess", got.Guess, want.Guess}, {"slip", got.Slip, want.Slip}, {"forget", got.Forget, want.Forget}} {
			if math.Abs(f.got-f.want) > 0.03 {
				t.Errorf("%s %s = %.4f, truth %.4f: off by more than 0.03", sv.Skill, f.name, f.got, f.want)
			}
		}
		sp, ok := rep.Publish[sv.Skill]
		if !ok || sp.Version != 2 || sp.Params != got || sp.Fit == nil || sp.Fit.Heldout == nil || sp.Fit.Learners != 2000 || sp.Fit.Answers != 60000 {
			t.Errorf("%s: published entry %+v", sv.Skill, sp)
		}
		if rep.File.Skills[sv.Skill].Params != got {
			t.Errorf("%s: new set holds %v", sv.Skill, rep.File.Skills[sv.Skill].Params)
		}
		if sv.LogLossGain == nil || *sv.LogLossGain <= 0 || !strings.Contains(sv.Reason, "better") {
			t.Errorf("%s: gain %v, reason %q", sv.Skill, sv.LogLossGain, sv.Reason)
		}
		if sv.First.IsZero() || !sv.Last.After(sv.First) || sv.Current.Version != 1 || sv.Current.Fitted {
			t.Errorf("%s: range %v–%v, current %+v", sv.Skill, sv.First, sv.Last, sv.Current)
		}
	}
	if err := rep.File.Validate(); err != nil {
		t.Error(err)
	}
}

// The three rejections, each constructed, plus the margin: one report with
// a skill of too few learners, a skill whose candidate is degenerate and a
// skill whose candidate predicts held-out learners worse than the set in
// force. Rejected skills keep their entry in the new set; the accepted one
// replaces its entry.
func TestGateRejects(t *testing.T) {
	t0 := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC)
	var as []state.Answer
	add := func(learner, skill string, seq string) {
		for i, c := range seq {
			as = append(as, state.Answer{ID: fmt.Sprintf("%s-%d", skill, i), Learner: learner, Skills: []string{skill},
				Correct: c == '1', At: t0.Add(time.Duration(len(as)) * time.Second)})
		}
	}
	// too little data: 12 learners.
	for i := range 12 {
		add(fmt.Sprintf("t%03d", i), "petty-cash", "0101101111")
	}
	// degenerate: learners who start right and then go wrong. With the
	// bounds opened to guess, slip ≤ 1, the best BKT fit says mastery makes
	// wrong answers likely.
	for i := range 80 {
		seq := strings.Repeat("1", 3+i%4) + strings.Repeat("0", 6+i%5)
		add(fmt.Sprintf("d%03d", i), "rounding", seq)
	}
	// worse than the set in force: answers drawn from the set in force, and
	// the candidate held to learn ≤ 0.01 (the bounds) while the truth
	// learns at 0.2, so no fold fit can predict as well.
	g, err := NewGenerator(Cohort{Learners: 300, Opportunities: 15, Seed: 8, Skills: []SkillTruth{
		{"trial-balance", state.Params{Prior: 0.2, Learn: 0.2, Guess: 0.2, Slip: 0.1}},
	}})
	if err != nil {
		t.Fatal(err)
	}
	for a := range g.All() {
		as = append(as, a)
	}
	current := &state.ParamFile{Version: 4, Default: state.DefaultParams(), Skills: map[string]state.SkillParams{
		"trial-balance": {Params: state.Params{Prior: 0.2, Learn: 0.2, Guess: 0.2, Slip: 0.1}, Version: 3},
		"petty-cash":    {Params: state.Params{Prior: 0.4, Learn: 0.1, Guess: 0.2, Slip: 0.1}},
	}}
	b := DefaultBounds()
	b.Hi.Guess, b.Hi.Slip, b.Hi.Learn = 1-1e-6, 1-1e-6, 0.01
	rep := gatedRefit(t, sliceSource(as), GatedRefitOptions{Seed: 1, Current: current, Fit: Options{Bounds: b}})

	want := map[string]struct {
		v    Verdict
		says []string
	}{
		"petty-cash":    {VerdictTooLittleData, []string{"12 learners, fewer than the minimum of 50"}},
		"rounding":      {VerdictDegenerate, []string{"guess"}},
		"trial-balance": {VerdictNotBetter, []string{"held-out log-loss", "in force", "worse"}},
	}
	if len(rep.Skills) != len(want) {
		t.Fatalf("%d skills in the report, want %d", len(rep.Skills), len(want))
	}
	for _, sv := range rep.Skills {
		w := want[sv.Skill]
		if sv.Verdict != w.v {
			t.Errorf("%s: %s (%s), want %s", sv.Skill, sv.Verdict, sv.Reason, w.v)
		}
		for _, s := range w.says {
			if !strings.Contains(sv.Reason, s) {
				t.Errorf("%s: reason %q does not say %q", sv.Skill, sv.Reason, s)
			}
		}
		t.Logf("%s: %s: %s", sv.Skill, sv.Verdict, sv.Reason)
	}
	if sv, _ := rep.Skill("rounding"); sv.Candidate == nil || (sv.Candidate.Params.Guess < 0.5 && sv.Candidate.Params.Slip < 0.5) {
		t.Errorf("rounding candidate %+v is not the degenerate one", sv.Candidate)
	}
	if sv, _ := rep.Skill("trial-balance"); sv.LogLossGain == nil || *sv.LogLossGain >= 0 ||
		sv.Candidate.Heldout.LogLoss <= sv.Current.Heldout.LogLoss || sv.Current.Heldout.Answers != sv.Candidate.Heldout.Answers ||
		sv.Current.Heldout.Answers != 300*15 || sv.Current.Version != 3 {
		t.Errorf("trial-balance: gain %v, candidate %+v, current %+v", sv.LogLossGain, sv.Candidate.Heldout, sv.Current)
	}
	if rep.Accepted != 0 || rep.File != nil || rep.Version != 0 || len(rep.Publish) != 0 {
		t.Errorf("accepted %d, file %v, version %d, publish %v: want nothing new", rep.Accepted, rep.File, rep.Version, rep.Publish)
	}

	// The margin: against the default set the candidate is clearly better,
	// yet a margin larger than its gain rejects it, naming refit.margin.
	rep = gatedRefit(t, sliceSource(as), GatedRefitOptions{Seed: 1, Gate: GateOptions{Margin: 0.5}})
	if sv, _ := rep.Skill("trial-balance"); sv.Verdict != VerdictNotBetter || !strings.Contains(sv.Reason, "short of the margin 0.5") || *sv.LogLossGain <= 0 {
		t.Errorf("with margin 0.5: %s (%s)", sv.Verdict, sv.Reason)
	}
}

// The new set is the set in force with the accepted skills replaced: kept
// entries keep the version they belong to (made explicit, so that a
// processor does not re-derive them), accepted ones get the new version,
// the default stays.
func TestGatedRefitNewSet(t *testing.T) {
	as, _ := cohortAnswers(t, Cohort{Learners: 200, Opportunities: 12, Seed: 6, Skills: HarbourLane().Skills[:1]})
	t0 := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC)
	for i := range 5 { // too little data
		as = append(as, state.Answer{ID: "x", Learner: fmt.Sprint("p", i), Skills: []string{"petty-cash"}, Correct: i%2 == 0, At: t0})
	}
	def := state.Params{Prior: 0.25, Learn: 0.15, Guess: 0.25, Slip: 0.15}
	current := &state.ParamFile{Version: 4, Default: def, Skills: map[string]state.SkillParams{
		"petty-cash": {Params: state.Params{Prior: 0.4, Learn: 0.1, Guess: 0.2, Slip: 0.1}, Version: 3},
		"rounding":   {Params: state.Params{Prior: 0.5, Learn: 0.1, Guess: 0.2, Slip: 0.1}},
	}}
	rep := gatedRefit(t, sliceSource(as), GatedRefitOptions{Seed: 2, Current: current})
	if rep.Accepted != 1 || rep.Rejected != 1 || rep.Version != 5 || rep.CurrentVersion != 4 {
		t.Fatalf("accepted %d rejected %d version %d current %d", rep.Accepted, rep.Rejected, rep.Version, rep.CurrentVersion)
	}
	f := rep.File
	if f.Version != 5 || f.Default != def || !f.Created.Equal(refitNow()) {
		t.Errorf("new set version %d default %v created %v", f.Version, f.Default, f.Created)
	}
	if sp := f.Skills["petty-cash"]; sp.Version != 3 || sp.Params != current.Skills["petty-cash"].Params {
		t.Errorf("petty-cash %+v, want the entry in force at version 3", sp)
	}
	if sp := f.Skills["rounding"]; sp.Version != 4 {
		t.Errorf("rounding (not in the history) %+v, want the entry in force with version 4 made explicit", sp)
	}
	je := f.Skills["journal-entries"]
	if je.Version != 5 || je.Fit == nil || len(rep.Publish) != 1 || rep.Publish["journal-entries"] != je {
		t.Errorf("journal-entries %+v, publish %v", je, rep.Publish)
	}
	if sv, _ := rep.Skill("petty-cash"); sv.Current.Version != 3 || !sv.Current.Fitted || sv.Candidate != nil {
		t.Errorf("petty-cash verdict %+v", sv)
	}
	if current.Skills["rounding"].Version != 0 {
		t.Error("the set in force was modified")
	}
	if _, err := GatedRefit(context.Background(), sliceSource(as), GatedRefitOptions{Current: current, Version: 4, Sorter: SorterOptions{Dir: t.TempDir()}}); !errors.Is(err, ErrGateOptions) {
		t.Errorf("version 4 over 4 in force: %v", err)
	}
}

// Each check on its own, on constructed candidates, at its boundary.
func TestGateChecks(t *testing.T) {
	g := GateOptions{MinLearners: 50, MinAnswers: 500, Margin: 0.01}
	good := state.Params{Prior: 0.3, Learn: 0.1, Guess: 0.2, Slip: 0.1}
	for _, tc := range []struct {
		name string
		c    Candidate
		want Verdict
		says string
	}{
		{"enough", Candidate{Learners: 50, Answers: 500, Correct: 250, Params: good, HeldoutLogLoss: 0.5, CurrentLogLoss: 0.51}, VerdictAccepted, "0.01000 better"},
		{"49 learners", Candidate{Learners: 49, Answers: 5000, Correct: 250, Params: good}, VerdictTooLittleData, "49 learners, fewer than the minimum of 50"},
		{"499 answers", Candidate{Learners: 50, Answers: 499, Correct: 250, Params: good}, VerdictTooLittleData, "499 answers, fewer than the minimum of 500"},
		{"all correct", Candidate{Learners: 50, Answers: 500, Correct: 500, Params: good}, VerdictTooLittleData, "all 500 answers are correct"},
		{"fit failed", Candidate{Learners: 50, Answers: 500, Correct: 5, FitErr: ErrZeroLikelihood}, VerdictFitFailed, "impossible"},
		{"guess 0.5", Candidate{Learners: 50, Answers: 500, Correct: 250, Params: state.Params{Prior: 0.3, Learn: 0.1, Guess: 0.5, Slip: 0.1}}, VerdictDegenerate, "guess = 0.5000 ≥ 0.5"},
		{"slip 0.6", Candidate{Learners: 50, Answers: 500, Correct: 250, Params: state.Params{Prior: 0.3, Learn: 0.1, Guess: 0.2, Slip: 0.6}}, VerdictDegenerate, "slip = 0.6000"},
		{"guess+slip 1", Candidate{Learners: 50, Answers: 500, Correct: 250, Params: state.Params{Prior: 0.3, Learn: 0.1, Guess: 0.45, Slip: 0.55}}, VerdictDegenerate, "guess+slip"},
		{"NaN learn", Candidate{Learners: 50, Answers: 500, Correct: 250, Params: state.Params{Prior: 0.3, Learn: math.NaN(), Guess: 0.2, Slip: 0.1}}, VerdictDegenerate, "learn"},
		{"short of margin", Candidate{Learners: 50, Answers: 500, Correct: 250, Params: good, HeldoutLogLoss: 0.5, CurrentLogLoss: 0.505}, VerdictNotBetter, "short of the margin 0.01"},
		{"worse", Candidate{Learners: 50, Answers: 500, Correct: 250, Params: good, HeldoutLogLoss: 0.6, CurrentLogLoss: 0.5}, VerdictNotBetter, "0.10000 worse"},
	} {
		v, why := g.Judge(tc.c)
		if v != tc.want || !strings.Contains(why, tc.says) {
			t.Errorf("%s: %s %q, want %s and %q", tc.name, v, why, tc.want, tc.says)
		}
	}
	if err := (GateOptions{MinLearners: -1, Margin: math.NaN()}).Validate(); !errors.Is(err, ErrGateOptions) ||
		!strings.Contains(err.Error(), "min learners = -1") || !strings.Contains(err.Error(), "margin = NaN") {
		t.Errorf("Validate: %v", err)
	}
	if _, err := GatedRefit(context.Background(), sliceSource(nil), GatedRefitOptions{Folds: 1}); !errors.Is(err, ErrGateOptions) || !strings.Contains(err.Error(), "folds = 1") {
		t.Errorf("folds 1: %v", err)
	}
	if _, err := GatedRefit(context.Background(), sliceSource(nil), GatedRefitOptions{Sorter: SorterOptions{Dir: t.TempDir()}}); !errors.Is(err, ErrNothingToFit) {
		t.Errorf("no answers: %v", err)
	}
}

// The held-out log-losses are exactly what an independent rebuild gives:
// per fold, fit on the other folds' learners, predict the fold's learners
// by that fit and by the set in force; pool the folds.
func TestGatedRefitHeldOutIsIndependent(t *testing.T) {
	as, _ := cohortAnswers(t, Cohort{Learners: 240, Opportunities: 12, Seed: 3, Skills: HarbourLane().Skills[:2]})
	rep := gatedRefit(t, sliceSource(as), GatedRefitOptions{Seed: 9, Folds: 4})
	var hb HistoryBuilder
	for _, a := range as {
		hb.Add(a)
	}
	h := hb.History()
	def := state.DefaultParams()
	for s, name := range h.Skills {
		d := h.SkillData(s, nil)
		folds := learnerFolds(h.Learners, 4, 9)
		var cand, cur Scores
		for f := range 4 {
			var train, held []int
			for l, g := range folds {
				if g == f {
					held = append(held, l)
				} else {
					train = append(train, l)
				}
			}
			r, err := Fit(d.Subset(train), Options{Seed: fitSeed(9, name, f)})
			if err != nil {
				t.Fatal(err)
			}
			pol := state.DefaultPolicy()
			for _, l := range held {
				rc, rd := state.NewRecord(r.Params, 0), state.NewRecord(def, 0)
				for _, c := range d.Seq(l) {
					cand.Add(rc.Apply(r.Params, c, 0, pol).PCorrect, c)
					cur.Add(rd.Apply(def, c, 0, pol).PCorrect, c)
				}
			}
		}
		sv, _ := rep.Skill(name)
		if sv.Candidate == nil || sv.Candidate.Heldout.LogLoss != cand.LogLoss() || sv.Current.Heldout.LogLoss != cur.LogLoss() ||
			*sv.Candidate.Heldout.AUC != cand.AUC() || sv.Candidate.Heldout.Answers != 240*12 {
			t.Errorf("%s: report %+v / %+v, rebuild log-loss %v / %v", name, sv.Candidate.Heldout, sv.Current.Heldout, cand.LogLoss(), cur.LogLoss())
		}
		full, err := Fit(d, Options{Seed: fitSeed(9, name, -1)})
		if err != nil {
			t.Fatal(err)
		}
		if sv.Candidate.Params != full.Params || sv.Candidate.LogLik != full.LogLik {
			t.Errorf("%s: candidate %v, fit on all learners %v", name, sv.Candidate.Params, full.Params)
		}
	}
	// Folds: sizes differ by at most one.
	sizes := make([]int, 4)
	for _, f := range learnerFolds(h.Learners, 4, 9) {
		sizes[f]++
	}
	if slices.Max(sizes)-slices.Min(sizes) > 1 {
		t.Errorf("fold sizes %v", sizes)
	}
}

// Same report for 1 and 3 workers and for the answers in another order
// across learners; the JSON report round-trips.
func TestGatedRefitDeterministic(t *testing.T) {
	as, _ := cohortAnswers(t, Cohort{Learners: 150, Opportunities: 12, Seed: 4, Skills: HarbourLane().Skills[:3]})
	rev := slices.Clone(as)
	slices.Reverse(rev)
	// Reversed overall, but each learner's answers keep their `at`, so
	// History order (by `at`) is unchanged.
	var outs [][]byte
	for i, src := range []sliceSource{as, as, rev} {
		rep := gatedRefit(t, src, GatedRefitOptions{Seed: 8, Workers: []int{1, 3, 2}[i]})
		rep.ReadSeconds, rep.ElapsedSeconds = 0, 0
		b, err := rep.MarshalIndent()
		if err != nil {
			t.Fatal(err)
		}
		fb, _ := json.Marshal(rep.File)
		outs = append(outs, append(b, fb...))
	}
	if !bytes.Equal(outs[0], outs[1]) || !bytes.Equal(outs[0], outs[2]) {
		t.Error("different reports for 1 and 3 workers or reversed input")
	}
	rep := gatedRefit(t, sliceSource(as), GatedRefitOptions{Seed: 8})
	b, _ := rep.MarshalIndent()
	var back GateReport
	if err := json.Unmarshal(b, &back); err != nil || len(back.Skills) != 3 || back.Skills[0].Candidate == nil || back.Skills[0].Current.Heldout == nil {
		t.Errorf("report read back: %v, %+v", err, back)
	}
}

// A cancelled refit returns the context's error and leaves no scratch
// directory behind.
func TestGatedRefitCancelled(t *testing.T) {
	as, _ := cohortAnswers(t, Cohort{Learners: 200, Opportunities: 10, Seed: 4})
	dir := t.TempDir()
	ctx, cancel := context.WithCancel(context.Background())
	n := 0
	src := sliceSource(as)
	_, err := GatedRefit(ctx, funcSource(func(fn func(state.Answer) error) error {
		return src.Answers(ctx, func(a state.Answer) error {
			if n++; n == 5000 {
				cancel()
			}
			if err := ctx.Err(); err != nil {
				return err
			}
			return fn(a)
		})
	}), GatedRefitOptions{Sorter: SorterOptions{Dir: dir}})
	if !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled while reading: %v", err)
	}
	// Cancelled once the answers are read: while grouping or fitting.
	big, _ := cohortAnswers(t, Cohort{Learners: 1000, Opportunities: 20, Seed: 4})
	ctx2, cancel2 := context.WithCancel(context.Background())
	defer cancel2()
	_, err = GatedRefit(ctx2, funcSource(func(fn func(state.Answer) error) error {
		err := sliceSource(big).Answers(ctx2, fn)
		time.AfterFunc(20*time.Millisecond, cancel2)
		return err
	}), GatedRefitOptions{Sorter: SorterOptions{Dir: dir}})
	if !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled after reading: %v", err)
	}
	if ents, _ := os.ReadDir(dir); len(ents) != 0 {
		t.Errorf("left in the scratch folder: %v", ents)
	}
}

type funcSource func(fn func(state.Answer) error) error

func (funcSource) Name() string { return "func" }
func (f funcSource) Answers(_ context.Context, fn func(state.Answer) error) error {
	return f(fn)
}

// Screening (DefaultScreenAnswers): the starts run on a subsample, one EM
// on all the data from the best; it ends in the same optimum as the starts
// run on all the data: log-likelihood within twice EM's relative stopping
// tolerance (1e-6, defaultTol), every parameter within 0.005.
func TestScreenedFitAgrees(t *testing.T) {
	truth, err := PickSkills(HarbourLane(), []string{"s-a", "s-b", "s-c", "s-d", "s-e", "s-f"}, 5)
	if err != nil {
		t.Fatal(err)
	}
	for i, sk := range truth {
		d := emSim(rand.New(rand.NewPCG(uint64(i), 9)), sk.Params, 5000, 10)
		full, err := Fit(d, Options{Seed: 1})
		if err != nil {
			t.Fatal(err)
		}
		o := GatedRefitOptions{ScreenAnswers: DefaultScreenAnswers}
		r, screened, err := o.fit(d, 1)
		if err != nil || !screened {
			t.Fatalf("%s: screened %v, %v", sk.Skill, screened, err)
		}
		if rel := math.Abs(r.LogLik-full.LogLik) / math.Abs(full.LogLik); rel > 2*defaultTol {
			t.Errorf("%s: screened log-lik %.4f, full %.4f (relative %.2g)", sk.Skill, r.LogLik, full.LogLik, rel)
		}
		for _, f := range [][3]any{{"prior", r.Params.Prior, full.Params.Prior}, {"learn", r.Params.Learn, full.Params.Learn},
			{"guess", r.Params.Guess, full.Params.Guess}, {"slip", r.Params.Slip, full.Params.Slip}} {
			if math.Abs(f[1].(float64)-f[2].(float64)) > 0.005 {
				t.Errorf("%s %s: screened %.4f, full %.4f", sk.Skill, f[0], f[1], f[2])
			}
		}
	}
}
