package fitjob

import (
	"context"
	"errors"
	"fmt"
	"hash/fnv"
	"runtime"
	"strings"
	"sync"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/state"
)

// ErrNothingToFit is returned by Refit when no skill could be fitted: no
// answers, or no skill with enough data. No parameter set comes out of it.
var ErrNothingToFit = errors.New("attain: nothing to fit")

// DefaultMinLearners is the least number of learners a skill needs to be
// fitted when RefitOptions.MinLearners is 0 (20: common practice, no
// published source; with fewer, five folds leave a handful of learners to
// score).
const DefaultMinLearners = 20

// RefitOptions configure Refit. The zero value is usable.
type RefitOptions struct {
	// Folds of the learner-split cross-validation that gives the held-out
	// metrics: 0 → DefaultFolds; 1 → no cross-validation (no held-out
	// metrics).
	Folds int
	// Seed of the fold split and of every fit (per skill and fold, derived
	// from the skill's name and this seed).
	Seed int64
	// MinLearners a skill needs to be fitted (0 → DefaultMinLearners);
	// MinAnswers likewise (0 → no minimum).
	MinLearners, MinAnswers int
	// Fit are the EM options of every fit; Seed is replaced per fit.
	Fit Options
	// Previous is the parameter set in force, if any: the new set's version
	// is one more, its default is the previous default, and a skill that
	// cannot be fitted keeps its previous entry.
	Previous *state.ParamFile
	// Workers fitting in parallel (0 → runtime.GOMAXPROCS(0)). The result
	// does not depend on it.
	Workers int
	// Now stamps the new set (nil → time.Now).
	Now    func() time.Time
	Logger zerolog.Logger
}

// Decision says what a refit did with a skill.
type Decision string

const (
	DecisionFitted       Decision = "fitted"
	DecisionKeptDefault  Decision = "kept default"
	DecisionKeptPrevious Decision = "kept previous"
)

// SkillReport is what a refit did with one skill.
type SkillReport struct {
	Skill    string
	Learners int
	Answers  int
	Correct  int
	Decision Decision
	// Reason says why a skill was not fitted, or warns about its fit.
	Reason string
	// Params serve the skill in the new set (fitted, previous or default).
	Params state.Params
	// Fit is the fit's record in the parameter file; nil when not fitted.
	Fit *state.FitInfo
	// Heldout are the skill's cross-validated scores (nil when not fitted
	// or with one fold).
	Heldout *Scores
}

// RefitReport is the outcome of Refit.
type RefitReport struct {
	File   *state.ParamFile
	Skills []SkillReport // in skill order
	// Overall scores every held-out answer once (Combine); empty with one
	// fold.
	Overall    Scores
	Learners   int
	Answers    int
	Duplicates int
	Folds      int
	Elapsed    time.Duration
}

// Fitted is the number of skills that were fitted.
func (r *RefitReport) Fitted() int {
	var n int
	for _, s := range r.Skills {
		if s.Decision == DecisionFitted {
			n++
		}
	}
	return n
}

// fitJob is one EM run: the skill fitted on all its learners (fold < 0) or
// on every learner outside one fold.
type fitJob struct {
	skill int
	fold  int
	res   Result
	err   error
	skip  string // why the fold's training data could not be fitted
}

// Refit fits every skill of h with enough data: the published parameters on
// all its learners, the held-out metrics from a cross-validation split by
// learner. Fits run on Workers goroutines, which Refit starts and waits
// for; the result is the same for any number of workers. It returns
// ErrNothingToFit (wrapped, with the reasons) when no skill could be fitted.
func Refit(ctx context.Context, h *History, opt RefitOptions) (*RefitReport, error) {
	start := time.Now()
	if opt.Folds == 0 {
		opt.Folds = DefaultFolds
	}
	if opt.Folds < 1 {
		return nil, fmt.Errorf("attain: refit: folds = %d: must be 1 (no cross-validation) or more", opt.Folds)
	}
	if opt.MinLearners <= 0 {
		opt.MinLearners = DefaultMinLearners
	}
	if opt.Workers <= 0 {
		opt.Workers = runtime.GOMAXPROCS(0)
	}
	if opt.Now == nil {
		opt.Now = time.Now
	}
	rep := &RefitReport{Learners: len(h.Learners), Answers: h.Answers(), Duplicates: h.Duplicates, Folds: opt.Folds}
	if rep.Answers == 0 {
		return nil, fmt.Errorf("%w: no valid answers", ErrNothingToFit)
	}

	// Which skills have enough data.
	def := state.DefaultParams()
	if opt.Previous != nil {
		def = opt.Previous.Default
	}
	var fitted []int
	rep.Skills = make([]SkillReport, len(h.Skills))
	for s, name := range h.Skills {
		sr := &rep.Skills[s]
		sr.Skill = name
		sr.Learners, sr.Answers, sr.Correct = h.skillCounts(s)
		switch {
		case sr.Learners < opt.MinLearners:
			sr.Reason = fmt.Sprintf("%d learners, fewer than the minimum of %d", sr.Learners, opt.MinLearners)
		case sr.Answers < opt.MinAnswers:
			sr.Reason = fmt.Sprintf("%d answers, fewer than the minimum of %d", sr.Answers, opt.MinAnswers)
		case sr.Correct == 0:
			sr.Reason = fmt.Sprintf("all %d answers are wrong: guess and slip cannot be told apart", sr.Answers)
		case sr.Correct == sr.Answers:
			sr.Reason = fmt.Sprintf("all %d answers are correct: guess and slip cannot be told apart", sr.Answers)
		default:
			fitted = append(fitted, s)
			continue
		}
		sr.Decision, sr.Params = DecisionKeptDefault, def
		if opt.Previous != nil {
			if _, ok := opt.Previous.Skills[name]; ok {
				sr.Decision = DecisionKeptPrevious
				sr.Params, _ = opt.Previous.For(name)
			}
		}
	}
	if len(fitted) == 0 {
		var why []string
		for _, sr := range rep.Skills {
			why = append(why, sr.Skill+": "+sr.Reason)
		}
		return nil, fmt.Errorf("%w: no skill has enough data (%s)", ErrNothingToFit, strings.Join(why, "; "))
	}

	// Every fit, run on a pool of workers; results land by index.
	var folds []int
	cv := opt.Folds > 1
	if cv {
		folds = Folds(len(h.Learners), opt.Folds, opt.Seed)
	}
	var jobs []fitJob
	for _, s := range fitted {
		jobs = append(jobs, fitJob{skill: s, fold: -1})
		if cv {
			for f := 0; f < opt.Folds; f++ {
				jobs = append(jobs, fitJob{skill: s, fold: f})
			}
		}
	}
	if err := runJobs(ctx, opt.Workers, jobs, func(j *fitJob) {
		fo := opt.Fit
		fo.Seed = fitSeed(opt.Seed, h.Skills[j.skill], j.fold)
		var d *Data
		if j.fold < 0 {
			d = h.SkillData(j.skill, nil)
		} else {
			d = h.SkillData(j.skill, trainLearners(folds, j.fold))
			if why := unfittable(d); why != "" {
				j.skip = why
				return
			}
		}
		j.res, j.err = Fit(d, fo)
	}); err != nil {
		return nil, err
	}

	// The published set.
	pf := &state.ParamFile{Version: 1, Created: opt.Now().UTC().Truncate(time.Second), Default: def, Skills: map[string]state.SkillParams{}}
	if opt.Previous != nil {
		pf.Version = opt.Previous.Version + 1
	}
	serving := make([]state.Params, len(h.Skills))
	for s, sr := range rep.Skills {
		serving[s] = sr.Params
	}
	byJob := map[[2]int]*fitJob{}
	for i := range jobs {
		byJob[[2]int{jobs[i].skill, jobs[i].fold}] = &jobs[i]
	}
	for _, s := range fitted {
		sr := &rep.Skills[s]
		full := byJob[[2]int{s, -1}]
		if full.err != nil {
			sr.Decision, sr.Params = DecisionKeptDefault, def
			sr.Reason = "fit failed: " + full.err.Error()
			if opt.Previous != nil {
				if _, ok := opt.Previous.Skills[sr.Skill]; ok {
					sr.Decision = DecisionKeptPrevious
					sr.Params, _ = opt.Previous.For(sr.Skill)
				}
			}
			serving[s] = sr.Params
			continue
		}
		sr.Decision, sr.Params = DecisionFitted, full.res.Params
		serving[s] = full.res.Params
		sr.Fit = &state.FitInfo{
			Learners:   sr.Learners,
			Answers:    sr.Answers,
			LogLik:     LogLik(h.SkillData(s, nil), full.res.Params),
			Iterations: full.res.Iterations,
			Converged:  full.res.Converged,
			Warnings:   append([]string(nil), full.res.Warnings...),
		}
	}

	// Cross-validation: each fold's held-out learners predicted under the
	// parameters fitted without them (skills not fitted: their serving set).
	if cv {
		total := newEvaluation(len(h.Skills))
		for f := 0; f < opt.Folds; f++ {
			ps := append([]state.Params(nil), serving...)
			for _, s := range fitted {
				sr := &rep.Skills[s]
				if sr.Decision != DecisionFitted {
					continue
				}
				j := byJob[[2]int{s, f}]
				switch {
				case j.skip != "":
					ps[s] = def
					sr.Fit.Warnings = append(sr.Fit.Warnings, fmt.Sprintf("fold %d: training learners not fitted (%s); held-out learners scored under the default set", f+1, j.skip))
				case j.err != nil:
					ps[s] = def
					sr.Fit.Warnings = append(sr.Fit.Warnings, fmt.Sprintf("fold %d: fit failed (%v); held-out learners scored under the default set", f+1, j.err))
				default:
					ps[s] = j.res.Params
				}
			}
			total.merge(h.evaluate(heldLearners(folds, f), ps))
		}
		rep.Overall = total.Overall
		for _, s := range fitted {
			sr := &rep.Skills[s]
			if sr.Decision != DecisionFitted {
				continue
			}
			sr.Heldout = &total.Skills[s]
			if m, ok := sr.Heldout.Metrics(); ok {
				sr.Fit.Heldout = &m
			} else {
				sr.Fit.Warnings = append(sr.Fit.Warnings, "held-out metrics undefined (held-out answers all of one outcome)")
			}
		}
	}

	for _, sr := range rep.Skills {
		switch sr.Decision {
		case DecisionFitted:
			pf.Skills[sr.Skill] = state.SkillParams{Params: sr.Params, Fit: sr.Fit}
		case DecisionKeptPrevious:
			old := opt.Previous.Skills[sr.Skill]
			if old.Version == 0 {
				old.Version = opt.Previous.Version
			}
			pf.Skills[sr.Skill] = old
		}
	}
	if len(pf.Skills) == 0 || rep.Fitted() == 0 {
		var why []string
		for _, sr := range rep.Skills {
			why = append(why, sr.Skill+": "+sr.Reason)
		}
		return nil, fmt.Errorf("%w: every fit failed (%s)", ErrNothingToFit, strings.Join(why, "; "))
	}
	if err := pf.Validate(); err != nil {
		return nil, fmt.Errorf("attain: refit produced an invalid parameter set: %w", err)
	}
	rep.File = pf
	rep.Elapsed = time.Since(start)
	opt.Logger.Info().Int("skills", len(h.Skills)).Int("fitted", rep.Fitted()).Int("learners", rep.Learners).
		Int("answers", rep.Answers).Dur("elapsed", rep.Elapsed).Msg("refit done")
	return rep, nil
}

// runJobs runs fn on every job with the given number of worker goroutines
// and waits for all of them. When ctx ends, the remaining jobs are skipped
// and ctx's error returned.
func runJobs(ctx context.Context, workers int, jobs []fitJob, fn func(*fitJob)) error {
	next := make(chan int)
	var wg sync.WaitGroup
	for range min(workers, len(jobs)) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range next {
				fn(&jobs[i])
			}
		}()
	}
	var err error
feed:
	for i := range jobs {
		if err = ctx.Err(); err != nil {
			break
		}
		select {
		case next <- i:
		case <-ctx.Done():
			err = ctx.Err()
			break feed
		}
	}
	close(next)
	wg.Wait()
	return err
}

// fitSeed derives the seed of one fit from the run's seed, the skill's name
// and the fold (−1 = all learners), so that a skill's fits do not depend on
// which other skills are in the data.
func fitSeed(seed int64, skill string, fold int) int64 {
	h := fnv.New64a()
	h.Write([]byte(skill))
	x := h.Sum64() ^ uint64(seed) ^ (uint64(fold+1) * 0x9e3779b97f4a7c15)
	// splitmix64 finaliser: spreads nearby inputs apart.
	x ^= x >> 30
	x *= 0xbf58476d1ce4e5b9
	x ^= x >> 27
	x *= 0x94d049bb133111eb
	x ^= x >> 31
	return int64(x)
}

func trainLearners(folds []int, f int) []int {
	var out []int
	for l, g := range folds {
		if g != f {
			out = append(out, l)
		}
	}
	return out
}

func heldLearners(folds []int, f int) []int {
	var out []int
	for l, g := range folds {
		if g == f {
			out = append(out, l)
		}
	}
	return out
}

// unfittable says why d cannot be fitted ("" when it can): no answers, or
// every answer the same.
func unfittable(d *Data) string {
	if d.Answers() == 0 {
		return "no answers"
	}
	var c int
	for _, o := range d.Obs {
		if o {
			c++
		}
	}
	if c == 0 || c == d.Answers() {
		return "every answer the same"
	}
	return ""
}
