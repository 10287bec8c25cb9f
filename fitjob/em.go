package fitjob

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"

	"github.com/attain-dev/attain/state"
)

// ErrFitOptions is wrapped by every error that rejects fit options.
var ErrFitOptions = errors.New("attain: invalid fit options")

// ErrEmptyData rejects a fit with no answers.
var ErrEmptyData = errors.New("attain: no answers to fit")

// ErrBadData rejects a Data whose Ends do not describe its Obs.
var ErrBadData = errors.New("attain: malformed fit data")

// ErrZeroLikelihood rejects a fit where every start gives the data
// probability zero (possible only with bounds that allow a guess or slip of
// exactly 0 or a prior of exactly 0 or 1).
var ErrZeroLikelihood = errors.New("attain: data impossible under every start")

// Bounds is a per-parameter box [Lo, Hi] that every EM iterate is projected
// onto.
type Bounds struct{ Lo, Hi state.Params }

// boundEps keeps guess, slip and prior off exactly 0 and 1, so that every
// answer has positive probability and log-likelihood and log-loss stay
// finite (common practice).
const boundEps = 1e-6

// DefaultBounds forbids degenerate models: guess and slip stay below 0.5, so
// that P(correct | mastered) = 1−slip > 0.5 > guess = P(correct | not
// mastered). Without such a bound the labels of the two states are not
// pinned down by the data: with forget fitted, swapping them (prior ↔
// 1−prior, learn ↔ forget, guess ↔ 1−slip) gives exactly the same
// likelihood, and even without forget EM readily lands on models in which
// mastery lowers the chance of a correct answer. The BKT literature calls
// these degenerate models and bounds guess and slip for this reason (Beck &
// Chang 2007 on identifiability; Baker, Corbett & Aleven 2008 on degenerate
// guess and slip; from memory).
func DefaultBounds() Bounds {
	return Bounds{
		Lo: state.Params{Prior: boundEps, Learn: 0, Guess: boundEps, Slip: boundEps, Forget: 0},
		Hi: state.Params{Prior: 1 - boundEps, Learn: 1, Guess: 0.5 - boundEps, Slip: 0.5 - boundEps, Forget: 1},
	}
}

// Beta is a Beta(A, B) prior on one parameter; the zero value means none.
// A MAP fit needs A, B ≥ 1 (Beta(1, 1) is flat); Beta(A, B) adds A−1
// pseudo-successes and B−1 pseudo-failures to the expected counts.
type Beta struct{ A, B float64 }

// Priors are optional Beta priors; with any set, Fit maximises the
// posterior density (MAP-EM) instead of the likelihood.
type Priors struct{ Prior, Learn, Guess, Slip, Forget Beta }

// Options control Fit. The zero value is a maximum-likelihood fit of
// classic BKT (forget 0) inside DefaultBounds with the default start and 5
// random starts.
type Options struct {
	Bounds    Bounds        // zero value → DefaultBounds()
	Priors    Priors        // zero = plain maximum likelihood
	FitForget bool          // false: forget fixed at 0
	Starts    int           // random starts (0 → default 5), plus the fixed default start
	Seed      int64         // seeds the random starts
	MaxIter   int           // 0 → 200
	Tol       float64       // relative log-likelihood change; 0 → 1e-6
	Init      *state.Params // when set: ONE start from exactly here (fixture comparisons), no random starts
	FixedIter bool          // run exactly MaxIter iterations, ignore Tol (for the side-by-side comparison)
}

// Defaults of Options (common practice, no published source).
const (
	defaultStarts  = 5
	defaultMaxIter = 200
	defaultTol     = 1e-6
	// defaultStartForget is the forget of the default start when forget is
	// fitted: EM's update of forget is proportional to forget, so a start
	// at exactly 0 would never move.
	defaultStartForget = 0.05
)

// Result is the best fit over all starts.
type Result struct {
	Params     state.Params
	LogLik     float64 // log-likelihood of Params (natural log), without the prior density
	Iterations int     // EM updates applied to reach Params from its start
	Converged  bool    // the last update changed the objective by less than Tol (relative); also reported with FixedIter
	Warnings   []string
}

// Fit estimates one skill's parameters from every learner's sequence in d
// by EM (Baum-Welch) from several starts and returns the start that reached
// the highest objective (log-likelihood, plus the log prior density when
// priors are set). It is deterministic for the same d and options, and safe
// for concurrent calls: all state is local to the call.
func Fit(d *Data, opt Options) (Result, error) {
	if d == nil || d.Answers() == 0 {
		return Result{}, ErrEmptyData
	}
	if err := checkData(d); err != nil {
		return Result{}, err
	}
	o, err := opt.normalised()
	if err != nil {
		return Result{}, err
	}
	maxLen, prev := 0, 0
	for _, end := range d.Ends {
		maxLen = max(maxLen, end-prev)
		prev = end
	}
	f := fitter{d: d, o: o, sc: newScratch(maxLen)}

	var best run
	found := false
	for _, start := range o.starts() {
		r := f.run(start)
		if math.IsInf(r.obj, -1) || math.IsNaN(r.obj) {
			continue
		}
		if !found || r.obj > best.obj {
			best, found = r, true
		}
	}
	if !found {
		return Result{}, ErrZeroLikelihood
	}
	res := Result{Params: best.p, LogLik: best.ll, Iterations: best.iter, Converged: best.converged}
	res.Warnings = warnings(res, o)
	return res, nil
}

// checkData rejects a Data whose Ends do not describe Obs.
func checkData(d *Data) error {
	prev := 0
	for i, end := range d.Ends {
		if end < prev || end > len(d.Obs) {
			return fmt.Errorf("%w: Data.Ends[%d] = %d: must be nondecreasing and at most len(Obs) = %d; build Data with Add",
				ErrBadData, i, end, len(d.Obs))
		}
		prev = end
	}
	if prev != len(d.Obs) {
		return fmt.Errorf("%w: Data.Ends ends at %d but len(Obs) = %d; build Data with Add", ErrBadData, prev, len(d.Obs))
	}
	return nil
}

// options are Options with defaults filled in and checked.
type options struct {
	Options
	hasPrior bool
}

func (opt Options) normalised() (options, error) {
	o := options{Options: opt}
	var errs []error
	bad := func(field string, v any, why string) {
		errs = append(errs, fmt.Errorf("%w: %s = %v: %s", ErrFitOptions, field, v, why))
	}
	if o.Bounds == (Bounds{}) {
		o.Bounds = DefaultBounds()
	}
	if !o.FitForget {
		o.Bounds.Lo.Forget, o.Bounds.Hi.Forget = 0, 0
	}
	lo, hi := fields(&o.Bounds.Lo), fields(&o.Bounds.Hi)
	for i, name := range paramNames {
		if math.IsNaN(*lo[i]) || *lo[i] < 0 || *lo[i] > 1 {
			bad("Bounds.Lo."+name, *lo[i], "must be in [0, 1]")
		}
		if math.IsNaN(*hi[i]) || *hi[i] < 0 || *hi[i] > 1 {
			bad("Bounds.Hi."+name, *hi[i], "must be in [0, 1]")
		}
		if *lo[i] > *hi[i] {
			bad("Bounds.Lo."+name, *lo[i], fmt.Sprintf("must not exceed Bounds.Hi.%s = %v", name, *hi[i]))
		}
	}
	pr := priorFields(&o.Priors)
	for i, name := range paramNames {
		b := *pr[i]
		if b == (Beta{}) {
			continue
		}
		if !(b.A >= 1) || !(b.B >= 1) || math.IsInf(b.A, 0) || math.IsInf(b.B, 0) {
			// Below 1 the density is unbounded at 0 or 1 and the
			// posterior has no maximum inside the bounds.
			bad("Priors."+name, b, "A and B must both be finite and at least 1 for a MAP fit (or both 0 for no prior)")
			continue
		}
		if name == "Forget" && !o.FitForget {
			continue // forget is fixed at 0: its prior has nothing to act on
		}
		o.hasPrior = true
	}
	if o.Starts < 0 {
		bad("Starts", o.Starts, "must be 0 (default 5) or more")
	} else if o.Starts == 0 {
		o.Starts = defaultStarts
	}
	if o.MaxIter < 0 {
		bad("MaxIter", o.MaxIter, "must be 0 (default 200) or more")
	} else if o.MaxIter == 0 {
		o.MaxIter = defaultMaxIter
	}
	if math.IsNaN(o.Tol) || o.Tol < 0 {
		bad("Tol", o.Tol, "must be 0 (default 1e-6) or positive")
	} else if o.Tol == 0 {
		o.Tol = defaultTol
	}
	if o.Init != nil {
		init := *o.Init
		if !o.FitForget && init.Forget != 0 {
			bad("Init.Forget", init.Forget, "must be 0 when FitForget is false (forget is fixed at 0); set FitForget to fit it")
		}
		v := fields(&init)
		for i, name := range paramNames {
			if name == "Forget" && !o.FitForget {
				continue
			}
			if math.IsNaN(*v[i]) || *v[i] < *lo[i] || *v[i] > *hi[i] {
				bad("Init."+name, *v[i], fmt.Sprintf("must be within Bounds [%v, %v]", *lo[i], *hi[i]))
			}
		}
	}
	return o, errors.Join(errs...)
}

var paramNames = [5]string{"Prior", "Learn", "Guess", "Slip", "Forget"}

func fields(p *state.Params) [5]*float64 {
	return [5]*float64{&p.Prior, &p.Learn, &p.Guess, &p.Slip, &p.Forget}
}

func priorFields(p *Priors) [5]*Beta {
	return [5]*Beta{&p.Prior, &p.Learn, &p.Guess, &p.Slip, &p.Forget}
}

// clampTo projects p onto b.
func clampTo(p state.Params, b Bounds) state.Params {
	v, lo, hi := fields(&p), fields(&b.Lo), fields(&b.Hi)
	for i := range v {
		*v[i] = min(max(*v[i], *lo[i]), *hi[i])
	}
	return p
}

// starts returns the starting points: Init alone, or the default start
// followed by Starts random ones drawn from Seed.
func (o options) starts() []state.Params {
	if o.Init != nil {
		return []state.Params{*o.Init}
	}
	def := state.DefaultParams()
	if o.FitForget {
		def.Forget = defaultStartForget
	}
	out := []state.Params{clampTo(def, o.Bounds)}
	// Random starts are drawn from a box of moderate values (common
	// practice), intersected with the bounds; where the intersection is
	// empty, from the bounds themselves.
	box := Bounds{
		Lo: state.Params{Prior: 0.05, Learn: 0.02, Guess: 0.05, Slip: 0.02, Forget: 0},
		Hi: state.Params{Prior: 0.9, Learn: 0.4, Guess: 0.4, Slip: 0.3, Forget: 0.1},
	}
	rng := rand.New(rand.NewPCG(uint64(o.Seed), 0x61747461696e)) // second word: any fixed constant
	bl, bh := fields(&o.Bounds.Lo), fields(&o.Bounds.Hi)
	xl, xh := fields(&box.Lo), fields(&box.Hi)
	for range o.Starts {
		var p state.Params
		v := fields(&p)
		for i := range v {
			lo, hi := max(*xl[i], *bl[i]), min(*xh[i], *bh[i])
			if lo > hi {
				lo, hi = *bl[i], *bh[i]
			}
			*v[i] = lo + rng.Float64()*(hi-lo)
		}
		if !o.FitForget {
			p.Forget = 0
		}
		out = append(out, p)
	}
	return out
}

// fitter runs EM from one start at a time; sc is its scratch space.
type fitter struct {
	d  *Data
	o  options
	sc *scratch
}

type run struct {
	p         state.Params
	ll, obj   float64
	iter      int
	converged bool
}

// run iterates EM from p. Each pass computes the objective of the current
// parameters and the expected counts that give the next ones; it stops
// when the relative change of the objective falls below Tol (unless
// FixedIter) or after MaxIter updates. The parameters returned are always
// ones whose objective has been computed.
func (f *fitter) run(p state.Params) run {
	kn := newKernel(p)
	c := kn.estepData(f.d, f.sc)
	r := run{p: p, ll: c.ll, obj: f.o.objective(c.ll, p)}
	if c.zero > 0 {
		r.ll, r.obj = math.Inf(-1), math.Inf(-1)
		return r
	}
	for r.iter < f.o.MaxIter {
		next := f.o.mstep(&c, r.p)
		kn = newKernel(next)
		c = kn.estepData(f.d, f.sc)
		obj := f.o.objective(c.ll, next)
		if c.zero > 0 {
			// Cannot happen for an exact EM update from a start with
			// positive likelihood; stop at the last good parameters.
			break
		}
		change := math.Abs(obj-r.obj) / max(math.Abs(r.obj), math.SmallestNonzeroFloat64)
		r.p, r.ll, r.obj = next, c.ll, obj
		r.iter++
		r.converged = change < f.o.Tol
		if r.converged && !f.o.FixedIter {
			break
		}
	}
	return r
}

// objective is the log-likelihood plus, with priors, the log prior density
// (up to its normalising constant).
func (o options) objective(ll float64, p state.Params) float64 {
	if !o.hasPrior {
		return ll
	}
	v, pr := fields(&p), priorFields(&o.Priors)
	for i := range v {
		b := *pr[i]
		if b == (Beta{}) || (i == 4 && !o.FitForget) {
			continue
		}
		if b.A != 1 {
			ll += (b.A - 1) * math.Log(*v[i])
		}
		if b.B != 1 {
			ll += (b.B - 1) * math.Log1p(-*v[i])
		}
	}
	return ll
}

// mstep returns the parameters that maximise the expected complete-data
// log-likelihood (plus log prior) given c, inside the bounds. Each
// parameter's part of that objective is n1·log θ + n0·log(1−θ) with
// expected counts n1, n0 (Baum-Welch re-estimation; a Beta(A, B) prior adds
// A−1 and B−1), so the box-constrained maximiser is found per parameter in
// closed form and the update never lowers the objective (generalised EM).
func (o options) mstep(c *counts, prev state.Params) state.Params {
	pr := o.Priors
	lo, hi := o.Bounds.Lo, o.Bounds.Hi
	var p state.Params
	p.Prior = maxBernoulli(c.first, c.seqs-c.first, pr.Prior, lo.Prior, hi.Prior, prev.Prior)
	p.Learn = maxBernoulli(c.xNM, c.gNt-c.xNM, pr.Learn, lo.Learn, hi.Learn, prev.Learn)
	p.Guess = maxBernoulli(c.gNc, c.gN-c.gNc, pr.Guess, lo.Guess, hi.Guess, prev.Guess)
	p.Slip = maxBernoulli(c.gMw, c.gM-c.gMw, pr.Slip, lo.Slip, hi.Slip, prev.Slip)
	if o.FitForget {
		p.Forget = maxBernoulli(c.xMN, c.gMt-c.xMN, pr.Forget, lo.Forget, hi.Forget, prev.Forget)
	}
	return p
}

// maxBernoulli maximises q(θ) = a·log θ + b·log(1−θ) over [lo, hi], where
// a = n1 (+ A−1) and b = n0 (+ B−1). With no information (a = b = 0) it
// keeps prev.
func maxBernoulli(n1, n0 float64, prior Beta, lo, hi, prev float64) float64 {
	n1, n0 = max(n1, 0), max(n0, 0) // rounding can leave −1e-17
	a, b := n1, n0
	if prior != (Beta{}) {
		a += prior.A - 1
		b += prior.B - 1
	}
	var th float64
	switch {
	case a == 0 && b == 0:
		th = prev
	case a >= 0 && b >= 0:
		th = a / (a + b)
	case a >= 0: // b < 0: q increases with θ
		th = hi
	case b >= 0: // a < 0: q decreases with θ
		th = lo
	default: // both negative: q is convex, the maximum is at an end
		q := func(x float64) float64 { return a*math.Log(x) + b*math.Log1p(-x) }
		if q(lo) >= q(hi) {
			th = lo
		} else {
			th = hi
		}
	}
	return min(max(th, lo), hi)
}

// warnings flags fits that are worth a second look.
func warnings(r Result, o options) []string {
	var w []string
	p := r.Params
	if !r.Converged && !o.FixedIter {
		w = append(w, fmt.Sprintf("EM did not converge in %d iterations (relative change still ≥ %g); raise MaxIter or check the data", r.Iterations, o.Tol))
	}
	if p.Guess+p.Slip >= 1 {
		// Possible only with bounds that allow it; state.Params.Validate
		// rejects such a set.
		w = append(w, fmt.Sprintf("degenerate: guess + slip = %.4f ≥ 1, so mastery does not raise the chance of a correct answer; "+
			"the set will not validate — fit with the default bounds", p.Guess+p.Slip))
	}
	for _, b := range []struct {
		name  string
		v, hi float64
	}{{"guess", p.Guess, o.Bounds.Hi.Guess}, {"slip", p.Slip, o.Bounds.Hi.Slip}} {
		if b.hi < 1 && b.v >= b.hi {
			w = append(w, fmt.Sprintf("%s stopped at its upper bound %g: the data pull towards a model in which mastery does not raise the chance of a correct answer; check the skill's items and tagging", b.name, b.hi))
		}
	}
	if implausible(p) {
		if p.Forget == 0 {
			w = append(w, fmt.Sprintf("implausible: prior %.4f is not above (1−guess)·learn/(1−slip−guess) = %.4f, "+
				"so a new learner's wrong answers raise the mastery estimate (towards that level); "+
				"the fit probably mistakes practice for learning — check the skill tagging or add priors",
				p.Prior, plausibilityLevel(p)))
		} else {
			w = append(w, fmt.Sprintf("implausible: a wrong answer at the prior %.4f raises the mastery estimate (to %.4f); "+
				"the fit probably mistakes practice for learning — check the skill tagging or add priors",
				p.Prior, p.Step(p.Prior, false)))
		}
	}
	return w
}

// plausibilityLevel is (1−G)·T/(1−S−G), the constraint of Shchepakin,
// Sankaranarayanan & Zimmaro (EDM 2024): it should be below L0. Worked out
// for forget 0: after a wrong answer at mastery L, P(L next) ≤ L exactly
// when (1−L)·[T(1−G) − L(1−G−S)] ≤ 0, i.e. when L ≥ T(1−G)/(1−G−S); so
// this level is the fixed point that a run of wrong answers drives the
// estimate to, and when L0 lies below it a new learner's first wrong answers
// raise the estimate.
func plausibilityLevel(p state.Params) float64 {
	return (1 - p.Guess) * p.Learn / (1 - p.Slip - p.Guess)
}

// implausible reports a violation of the constraint above. With forget,
// where the closed form does not apply, it checks the property the
// constraint stands for directly: a wrong answer at the prior must not
// raise the estimate.
func implausible(p state.Params) bool {
	if p.Guess+p.Slip >= 1 {
		return false // reported by Validate
	}
	if p.Forget == 0 {
		return !(plausibilityLevel(p) < p.Prior)
	}
	return p.Step(p.Prior, false) > p.Prior
}
