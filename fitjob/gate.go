package fitjob

import (
	"context"
	"errors"
	"fmt"
	"hash/fnv"
	"math"
	"math/rand/v2"
	"runtime"
	"slices"
	"strings"
	"sync"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/state"
)

// The gate: a refitted skill's candidate parameters replace the ones in
// force only when
//
//  1. the skill has enough data: at least MinLearners learners and
//     MinAnswers answers, not all of one outcome;
//  2. the candidate is not degenerate: it validates (state.Params.Validate:
//     probabilities, guess + slip < 1) and guess and slip are both below
//     0.5, so that P(correct | mastered) = 1 − slip > 0.5 > guess =
//     P(correct | not mastered) (the condition DefaultBounds enforces; see
//     its comment for the sources);
//  3. its held-out log-loss — each fold's learners predicted by a fit made
//     without them — is at least Margin below the log-loss of the set in
//     force on the same learners' same answers.
//
// The checks run in that order and the first that fails names the verdict.
// The set in force is scored on every learner, each of whom is held out in
// exactly one fold, so both log-losses are means over the same answers. A
// set in force that was itself fitted on these learners is scored in
// sample, which favours keeping it: the gate errs towards no change.

// Defaults of GateOptions: config's refit.min_learners and
// refit.min_answers (our choice, no published source: with 5 folds, 50
// learners leave 10 to hold out in each; 500 answers is 10 per learner).
const (
	DefaultGateMinLearners = 50
	DefaultGateMinAnswers  = 500
)

// GateOptions are the gate's thresholds.
type GateOptions struct {
	MinLearners int // 0 → DefaultGateMinLearners
	MinAnswers  int // 0 → DefaultGateMinAnswers
	// Margin is how much lower (in nats per answer) the candidate's held-out
	// log-loss must be than the current set's; 0 accepts any candidate that
	// is not worse.
	Margin float64
}

func (g GateOptions) withDefaults() GateOptions {
	if g.MinLearners == 0 {
		g.MinLearners = DefaultGateMinLearners
	}
	if g.MinAnswers == 0 {
		g.MinAnswers = DefaultGateMinAnswers
	}
	return g
}

// Validate reports every bad option at once.
func (g GateOptions) Validate() error {
	var errs []error
	if g.MinLearners < 0 {
		errs = append(errs, fmt.Errorf("%w: min learners = %d: must be 1 or more (0 for the default %d)", ErrGateOptions, g.MinLearners, DefaultGateMinLearners))
	}
	if g.MinAnswers < 0 {
		errs = append(errs, fmt.Errorf("%w: min answers = %d: must be 1 or more (0 for the default %d)", ErrGateOptions, g.MinAnswers, DefaultGateMinAnswers))
	}
	if !(g.Margin >= 0) || math.IsInf(g.Margin, 1) {
		errs = append(errs, fmt.Errorf("%w: margin = %v: must be a finite number ≥ 0", ErrGateOptions, g.Margin))
	}
	return errors.Join(errs...)
}

// ErrGateOptions is wrapped by every error that rejects gate or gated-refit
// options.
var ErrGateOptions = errors.New("attain: invalid refit options")

// Verdict is what the gate decided for one skill. Its values are stable
// codes for the refit report.
type Verdict string

const (
	VerdictAccepted      Verdict = "accepted"
	VerdictTooLittleData Verdict = "too-little-data"
	VerdictDegenerate    Verdict = "degenerate"
	VerdictNotBetter     Verdict = "not-better"
	// VerdictFitFailed: EM returned an error (e.g. every start gave the
	// data probability zero).
	VerdictFitFailed Verdict = "fit-failed"
)

// Accepted reports whether the verdict lets the candidate replace the set
// in force.
func (v Verdict) Accepted() bool { return v == VerdictAccepted }

// String is the verdict as printed: "accepted" or "rejected (…)".
func (v Verdict) String() string {
	switch v {
	case VerdictAccepted:
		return "accepted"
	case VerdictTooLittleData:
		return "rejected (too little data)"
	case VerdictDegenerate:
		return "rejected (degenerate)"
	case VerdictNotBetter:
		return "rejected (not better)"
	case VerdictFitFailed:
		return "rejected (fit failed)"
	}
	return "rejected (" + string(v) + ")"
}

// CheckData is gate check 1: VerdictAccepted when the skill has enough
// data, else VerdictTooLittleData with the figures.
func (g GateOptions) CheckData(learners, answers, correct int) (Verdict, string) {
	g = g.withDefaults()
	switch {
	case learners < g.MinLearners:
		return VerdictTooLittleData, fmt.Sprintf("%d learners, fewer than the minimum of %d (refit.min_learners)", learners, g.MinLearners)
	case answers < g.MinAnswers:
		return VerdictTooLittleData, fmt.Sprintf("%d answers, fewer than the minimum of %d (refit.min_answers)", answers, g.MinAnswers)
	case correct == 0:
		return VerdictTooLittleData, fmt.Sprintf("all %d answers are wrong: guess and slip cannot be told apart", answers)
	case correct == answers:
		return VerdictTooLittleData, fmt.Sprintf("all %d answers are correct: guess and slip cannot be told apart", answers)
	}
	return VerdictAccepted, ""
}

// CheckDegenerate is gate check 2: VerdictAccepted when p is a usable
// model, else VerdictDegenerate with the reason.
func CheckDegenerate(skill string, p state.Params) (Verdict, string) {
	if err := p.Validate(skill); err != nil {
		return VerdictDegenerate, joinLines(err)
	}
	switch {
	case p.Guess >= 0.5:
		return VerdictDegenerate, fmt.Sprintf("guess = %.4f ≥ 0.5: a learner who has not mastered the skill answers correctly at least as often as not", p.Guess)
	case p.Slip >= 0.5:
		return VerdictDegenerate, fmt.Sprintf("slip = %.4f ≥ 0.5: a learner who has mastered the skill answers wrongly at least as often as not", p.Slip)
	}
	return VerdictAccepted, ""
}

// CheckHeldout is gate check 3 on the two held-out log-losses (same
// answers): VerdictAccepted when candidate ≤ current − Margin, else
// VerdictNotBetter with the figures.
func (g GateOptions) CheckHeldout(candidate, current float64) (Verdict, string) {
	if math.IsNaN(candidate) || math.IsNaN(current) {
		return VerdictNotBetter, "held-out log-loss undefined (no held-out answers)"
	}
	gain := current - candidate
	if gain >= g.Margin {
		return VerdictAccepted, fmt.Sprintf("held-out log-loss %.5f vs %.5f in force (%.5f better, margin %g)", candidate, current, gain, g.Margin)
	}
	if gain < 0 {
		return VerdictNotBetter, fmt.Sprintf("held-out log-loss %.5f vs %.5f in force: %.5f worse (margin %g, refit.margin)", candidate, current, -gain, g.Margin)
	}
	return VerdictNotBetter, fmt.Sprintf("held-out log-loss %.5f vs %.5f in force: %.5f better, short of the margin %g (refit.margin)", candidate, current, gain, g.Margin)
}

// Candidate is everything the gate looks at for one skill.
type Candidate struct {
	Skill                      string
	Learners, Answers, Correct int
	Params                     state.Params // the fit on all the skill's learners
	FitErr                     error        // the fit failed; Params is meaningless
	// HeldoutLogLoss of the candidate (fold fits on held-out learners) and
	// CurrentLogLoss of the set in force, over the same answers.
	HeldoutLogLoss, CurrentLogLoss float64
}

// Judge runs the three checks in order on c.
func (g GateOptions) Judge(c Candidate) (Verdict, string) {
	if v, why := g.CheckData(c.Learners, c.Answers, c.Correct); !v.Accepted() {
		return v, why
	}
	if c.FitErr != nil {
		return VerdictFitFailed, c.FitErr.Error()
	}
	if v, why := CheckDegenerate(c.Skill, c.Params); !v.Accepted() {
		return v, why
	}
	return g.CheckHeldout(c.HeldoutLogLoss, c.CurrentLogLoss)
}

func joinLines(err error) string { return strings.ReplaceAll(err.Error(), "\n", "; ") }

// DefaultScreenAnswers is GatedRefitOptions.ScreenAnswers when 0: a fit
// of more answers than this runs EM's starts (the default one and the
// random ones) on a seeded subsample of the learners holding about this
// many answers, then one EM on all the data from the best of them. Our
// choice, measured (TestScreenedFitAgrees; refit_bench_test.go): on 80
// simulated skills of 20,000 and 50,000 answers the screened fit ended in
// the same optimum as the start set run on all the data — log-likelihoods
// within EM's own stopping tolerance (relative 1e-6), parameters within
// 0.005 — and on 50,000 answers it costs about a third as much.
const DefaultScreenAnswers = 10_000

// GatedRefitOptions configure GatedRefit. The zero value is usable.
type GatedRefitOptions struct {
	Gate GateOptions
	// Folds of the learner-wise cross-validation that gives the held-out
	// log-loss (0 → DefaultFolds; at least 2).
	Folds int
	// Seed of the fold split and of every fit (per skill and fold, as
	// Refit derives them).
	Seed int64
	// Fit are the EM options of every fit; Seed is replaced per fit.
	Fit Options
	// ScreenAnswers: see DefaultScreenAnswers (0 → default; < 0 → every
	// start on all the data).
	ScreenAnswers int
	// Current is the set in force (nil → state.NewParamFile()): candidates
	// are judged against it and the new set is it with the accepted skills
	// replaced.
	Current *state.ParamFile
	// Version of the new set (0 → Current.Version + 1); must be above
	// Current.Version.
	Version int64
	// Workers fitting skills in parallel (0 → runtime.GOMAXPROCS(0)); the
	// result does not depend on it. Each holds one skill's data.
	Workers int
	// Sorter configures the on-disk grouping of the source's answers.
	Sorter SorterOptions
	// Now stamps the new set and the report (nil → time.Now).
	Now    func() time.Time
	Logger zerolog.Logger
}

func (o *GatedRefitOptions) normalise() error {
	var errs []error
	if err := o.Gate.Validate(); err != nil {
		errs = append(errs, err)
	}
	o.Gate = o.Gate.withDefaults()
	if o.Folds == 0 {
		o.Folds = DefaultFolds
	}
	if o.Folds < 2 {
		errs = append(errs, fmt.Errorf("%w: folds = %d: the gate needs held-out learners, so at least 2 (refit.folds)", ErrGateOptions, o.Folds))
	}
	if o.ScreenAnswers == 0 {
		o.ScreenAnswers = DefaultScreenAnswers
	}
	if o.Current == nil {
		o.Current = state.NewParamFile()
	}
	if err := o.Current.Validate(); err != nil {
		errs = append(errs, fmt.Errorf("%w: the set in force: %s", ErrGateOptions, joinLines(err)))
	}
	if o.Version == 0 {
		o.Version = o.Current.Version + 1
	}
	if o.Version <= o.Current.Version {
		errs = append(errs, fmt.Errorf("%w: version = %d: must be above the version in force, %d", ErrGateOptions, o.Version, o.Current.Version))
	}
	if o.Workers <= 0 {
		o.Workers = runtime.GOMAXPROCS(0)
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	if _, err := o.Fit.normalised(); err != nil {
		errs = append(errs, err)
	}
	return errors.Join(errs...)
}

// GatedRefit reads every answer of src into a Sorter on disk, fits every
// skill (on all its learners, and once per fold without that fold's
// learners), puts each candidate through the gate, and returns the report
// with the new parameter set (report.File; nil when no skill was accepted).
// Nothing is written or published here. A *StoreSource hands over whole
// sequences (its history is already de-duplicated and in order).
//
// It returns ErrNothingToFit (wrapped) when the source holds no answers.
// Fits run on opt.Workers goroutines, which GatedRefit starts and waits
// for; when ctx ends, it stops and returns ctx's error.
func GatedRefit(ctx context.Context, src Source, opt GatedRefitOptions) (*GateReport, error) {
	start := time.Now()
	if err := opt.normalise(); err != nil {
		return nil, err
	}
	srt, err := NewSorter(opt.Sorter)
	if err != nil {
		return nil, err
	}
	defer srt.Close()
	if ss, ok := src.(*StoreSource); ok {
		err = ss.Sequences(ctx, srt.AddSequence)
	} else {
		err = src.Answers(ctx, srt.Add)
	}
	if err != nil {
		return nil, fmt.Errorf("attain: reading %s: %w", src.Name(), err)
	}
	read := time.Since(start)
	if err := srt.Finish(ctx); err != nil {
		return nil, err
	}
	rep, err := refitSorted(ctx, srt, src.Name(), opt)
	if err != nil {
		return nil, err
	}
	rep.ReadSeconds = read.Seconds()
	rep.ElapsedSeconds = time.Since(start).Seconds()
	opt.Logger.Info().Str("source", src.Name()).Int("skills", len(rep.Skills)).Int("accepted", rep.Accepted).
		Int64("answers", rep.Data.Answers).Int64("learners", rep.Data.Learners).Int64("version", rep.Version).
		Float64("elapsed_s", rep.ElapsedSeconds).Msg("refit done")
	return rep, nil
}

// skillJob is one skill's work: its data (owned by the job) and, once
// done, its verdict.
type skillJob struct {
	skill    string
	data     *Data
	learners []string
	correct  int
	first    time.Time
	last     time.Time
	out      SkillVerdict
	accepted *state.SkillParams
}

// refitSorted fits and gates every skill of a finished sorter.
func refitSorted(ctx context.Context, srt *Sorter, source string, opt GatedRefitOptions) (*GateReport, error) {
	st := srt.Stats()
	if st.Answers == 0 {
		return nil, fmt.Errorf("%w: no valid answers", ErrNothingToFit)
	}
	now := opt.Now().UTC().Truncate(time.Second)
	var (
		jobs []*skillJob // appended by this goroutine only
		wg   sync.WaitGroup
		next = make(chan *skillJob)
	)
	wctx, cancel := context.WithCancel(ctx)
	defer cancel()
	for range opt.Workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for j := range next {
				if wctx.Err() != nil {
					continue
				}
				opt.judge(j, now)
				j.data, j.learners = nil, nil // only the verdict is kept
			}
		}()
	}
	err := srt.Skills(wctx, func(in *SkillInput) error {
		j := &skillJob{
			skill: in.Skill, correct: in.Correct, first: in.First, last: in.Last,
			data:     &Data{Obs: slices.Clone(in.Data.Obs), Ends: slices.Clone(in.Data.Ends)},
			learners: slices.Clone(in.Learners),
		}
		jobs = append(jobs, j)
		select {
		case next <- j:
			return nil
		case <-wctx.Done():
			return wctx.Err()
		}
	})
	close(next)
	wg.Wait()
	if err == nil {
		err = ctx.Err()
	}
	if err != nil {
		return nil, err
	}
	st = srt.Stats() // final once Skills has run

	cur := opt.Current
	rep := &GateReport{
		Created: now, Source: source, CurrentVersion: cur.Version,
		Options: ReportOptions{
			Folds: opt.Folds, Seed: opt.Seed, MinLearners: opt.Gate.MinLearners, MinAnswers: opt.Gate.MinAnswers,
			Margin: opt.Gate.Margin, FitForget: opt.Fit.FitForget, Starts: startsOf(opt.Fit), ScreenAnswers: opt.ScreenAnswers,
		},
		Data: ReportData{
			Answers: st.Answers, Learners: st.Learners, Duplicates: st.Duplicates, MultiSkill: st.MultiSkill,
			First: st.First, Last: st.Last, ScratchBytes: st.DiskBytes,
		},
	}
	pf := &state.ParamFile{Version: opt.Version, Created: now, Default: cur.Default, Skills: map[string]state.SkillParams{}}
	for name, sp := range cur.Skills {
		if sp.Version == 0 {
			sp.Version = cur.Version // it stays what it was
		}
		pf.Skills[name] = sp
	}
	rep.Publish = map[string]state.SkillParams{}
	for _, j := range jobs {
		rep.Skills = append(rep.Skills, j.out)
		if j.accepted != nil {
			pf.Skills[j.skill] = *j.accepted
			rep.Publish[j.skill] = *j.accepted
			rep.Accepted++
		} else {
			rep.Rejected++
		}
		opt.Logger.Info().Str("skill", j.skill).Str("verdict", string(j.out.Verdict)).Str("reason", j.out.Reason).
			Int("learners", j.out.Learners).Int("answers", j.out.Answers).Msg("refit verdict")
	}
	if rep.Accepted > 0 {
		if err := pf.Validate(); err != nil {
			return nil, fmt.Errorf("attain: refit produced an invalid parameter set: %s", joinLines(err))
		}
		rep.File, rep.Version = pf, pf.Version
	}
	return rep, nil
}

func startsOf(o Options) int {
	if o.Init != nil {
		return 0
	}
	if o.Starts == 0 {
		return defaultStarts
	}
	return o.Starts
}

// judge fits one skill, cross-validates it and puts it through the gate.
func (o *GatedRefitOptions) judge(j *skillJob, now time.Time) {
	d := j.data
	curP, curV := o.Current.For(j.skill)
	sv := SkillVerdict{
		Skill: j.skill, Learners: d.Learners(), Answers: d.Answers(), Correct: j.correct,
		First: j.first, Last: j.last,
		Current: ParamsEval{Params: curP, Version: curV},
	}
	_, sv.Current.Fitted = o.Current.Skills[j.skill]
	defer func() { j.out = sv }()
	c := Candidate{Skill: j.skill, Learners: sv.Learners, Answers: sv.Answers, Correct: sv.Correct}
	if v, why := o.Gate.CheckData(c.Learners, c.Answers, c.Correct); !v.Accepted() {
		sv.Verdict, sv.Reason = v, why
		return
	}

	full, screened, err := o.fit(d, fitSeed(o.Seed, j.skill, -1))
	if err != nil {
		c.FitErr = err
		sv.Verdict, sv.Reason = o.Gate.Judge(c)
		return
	}
	c.Params = full.Params
	cand := &CandidateEval{
		Params: full.Params, LogLik: full.LogLik, Iterations: full.Iterations, Converged: full.Converged,
		Screened: screened, Warnings: slices.Clone(full.Warnings),
	}
	sv.Candidate = cand
	if v, why := CheckDegenerate(j.skill, full.Params); !v.Accepted() {
		sv.Verdict, sv.Reason = v, why
		return
	}

	// Cross-validation by learner: each fold's learners are predicted by a
	// fit on the other folds' learners, and by the set in force.
	folds := learnerFolds(j.learners, o.Folds, o.Seed)
	var candS, curS Scores
	train, held := make([]int, 0, len(folds)), make([]int, 0, len(folds)/o.Folds+1)
	for f := range o.Folds {
		train, held = train[:0], held[:0]
		for l, g := range folds {
			if g == f {
				held = append(held, l)
			} else {
				train = append(train, l)
			}
		}
		if len(held) == 0 {
			continue
		}
		fp := curP
		td := d.Subset(train)
		if why := unfittable(td); why != "" {
			cand.Warnings = append(cand.Warnings, fmt.Sprintf("fold %d: training learners not fitted (%s); its held-out learners scored under the set in force", f+1, why))
		} else if r, _, err := o.fit(td, fitSeed(o.Seed, j.skill, f)); err != nil {
			cand.Warnings = append(cand.Warnings, fmt.Sprintf("fold %d: fit failed (%v); its held-out learners scored under the set in force", f+1, err))
		} else {
			fp = r.Params
		}
		scoreLearners(d, held, fp, &candS)
		scoreLearners(d, held, curP, &curS)
	}
	cand.Heldout = heldoutOf(&candS)
	sv.Current.Heldout = heldoutOf(&curS)
	c.HeldoutLogLoss, c.CurrentLogLoss = math.NaN(), math.NaN()
	if cand.Heldout != nil && sv.Current.Heldout != nil {
		c.HeldoutLogLoss, c.CurrentLogLoss = cand.Heldout.LogLoss, sv.Current.Heldout.LogLoss
	}
	sv.Verdict, sv.Reason = o.Gate.Judge(c)
	if !math.IsNaN(c.HeldoutLogLoss) && !math.IsNaN(c.CurrentLogLoss) {
		gain := c.CurrentLogLoss - c.HeldoutLogLoss
		sv.LogLossGain = &gain
	}
	if !sv.Verdict.Accepted() {
		return
	}
	fi := &state.FitInfo{
		Learners: sv.Learners, Answers: sv.Answers, LogLik: full.LogLik,
		Iterations: full.Iterations, Converged: full.Converged, Warnings: slices.Clone(cand.Warnings),
	}
	if h := cand.Heldout; h.AUC != nil {
		fi.Heldout = &state.Metrics{AUC: *h.AUC, RMSE: h.RMSE, LogLoss: h.LogLoss}
	} else {
		fi.Warnings = append(fi.Warnings, "held-out AUC undefined (held-out answers all of one outcome)")
	}
	j.accepted = &state.SkillParams{Params: full.Params, Version: o.Version, Fit: fi}
}

// fit runs EM on d with the configured options and seed; on a skill with
// more than ScreenAnswers answers, the starts run on a subsample of
// learners and one EM on all of d continues from the best of them
// (screened = true).
func (o *GatedRefitOptions) fit(d *Data, seed int64) (Result, bool, error) {
	fo := o.Fit
	fo.Seed = seed
	if fo.Init != nil || o.ScreenAnswers < 0 || d.Answers() <= o.ScreenAnswers {
		r, err := Fit(d, fo)
		return r, false, err
	}
	sub := subsample(d, o.ScreenAnswers, seed)
	best, err := Fit(sub, fo)
	if err != nil {
		// The subsample may be unlucky (e.g. all one outcome): all starts
		// on all the data.
		r, err := Fit(d, fo)
		return r, false, err
	}
	fo.Init = &best.Params
	r, err := Fit(d, fo)
	return r, true, err
}

// subsample returns learners of d, drawn in a seeded random order, until
// they hold at least n answers.
func subsample(d *Data, n int, seed int64) *Data {
	perm := make([]int, d.Learners())
	for i := range perm {
		perm[i] = i
	}
	r := rand.New(rand.NewPCG(uint64(seed), 0x73637265656e)) // second word: any fixed constant
	r.Shuffle(len(perm), func(i, j int) { perm[i], perm[j] = perm[j], perm[i] })
	out := &Data{}
	for _, i := range perm {
		if out.Answers() >= n {
			break
		}
		out.Add(d.Seq(i))
	}
	return out
}

// learnerFolds assigns each learner (by id) to one of k folds: learners
// are ordered by a seeded hash of their id and dealt round-robin, so fold
// sizes differ by at most one and a learner's fold depends only on the
// seed and on which learners answered the skill, not on the source's order.
func learnerFolds(learners []string, k int, seed int64) []int {
	type lh struct {
		h uint64
		i int
	}
	hs := make([]lh, len(learners))
	for i, l := range learners {
		h := fnv.New64a()
		var b [8]byte
		for j := range b {
			b[j] = byte(uint64(seed) >> (8 * j))
		}
		h.Write(b[:])
		h.Write([]byte(l))
		hs[i] = lh{h.Sum64(), i}
	}
	slices.SortFunc(hs, func(a, b lh) int {
		switch {
		case a.h < b.h:
			return -1
		case a.h > b.h:
			return 1
		}
		return a.i - b.i
	})
	folds := make([]int, len(learners))
	for r, x := range hs {
		folds[x.i] = r % k
	}
	return folds
}

// scoreLearners replays the given learners of d under p, predicting each
// answer before applying it (state.Record.Apply, as History.Evaluate does),
// and adds the predictions to sc.
func scoreLearners(d *Data, learners []int, p state.Params, sc *Scores) {
	pol := state.DefaultPolicy() // thresholds do not change predictions
	for _, l := range learners {
		rec := state.NewRecord(p, 0)
		for _, c := range d.Seq(l) {
			out := rec.Apply(p, c, 0, pol)
			sc.Add(out.PCorrect, c)
		}
	}
}

func heldoutOf(s *Scores) *HeldoutMetrics {
	if s.N() == 0 {
		return nil
	}
	h := &HeldoutMetrics{Answers: s.N(), RMSE: s.RMSE(), LogLoss: s.LogLoss()}
	if auc := s.AUC(); !math.IsNaN(auc) {
		h.AUC = &auc
	}
	return h
}
