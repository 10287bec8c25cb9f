package fitjob

import (
	"math"

	"github.com/attain-dev/attain/state"
)

// BKT as a two-state hidden Markov model (Corbett & Anderson, 1995, written
// in the usual HMM form): state N = not mastered, M = mastered;
// P(M at the first answer) = prior; between answers N→M with probability
// learn and M→N with probability forget; P(correct | M) = 1−slip and
// P(correct | N) = guess.
//
// The forward pass works on unnormalised variables and rescales them only
// when their sum falls below rescaleBelow; the backward pass carries the
// backward variables divided by the sequence's likelihood (see estep). So
// the serial chain of each pass is two multiplications and an addition per
// answer, with no division, and one E-step costs a few nanoseconds per
// answer (BenchmarkEMIteration). Memory: Data.Obs is walked in order, and
// the only scratch is one forward pair per answer of the longest sequence,
// reused across sequences and iterations.

// rescaleBelow is where the forward variables are rescaled to sum 1. Any
// value far above the smallest normal float64 (2.2e-308) works; at 1e-100
// a running product of two likelihoods cannot underflow (common practice:
// keep scaled HMM variables well inside the exponent range).
const rescaleBelow = 1e-100

// kernel holds, for each observation o (0 = wrong, 1 = correct), the
// products of a transition and the emission of its destination:
// k[o].nn = P(N→N)·P(o|N), nm = P(N→M)·P(o|M), mn = P(M→N)·P(o|N),
// mm = P(M→M)·P(o|M). The forward step is a'(s') = Σ_s a(s)·k[o](s,s') and
// the backward step b(s) = Σ_s' k[o](s,s')·b'(s'), so both passes share one
// table.
type kernel struct {
	k [2]struct {
		nn, nm, mn, mm float64
		eN, eM         float64 // P(o|N), P(o|M): the first answer
		cN, cM         float64 // o == correct, o == wrong, as 1 or 0
	}
	prior float64
}

func newKernel(p state.Params) kernel {
	var kn kernel
	kn.prior = p.Prior
	eN := [2]float64{1 - p.Guess, p.Guess}
	eM := [2]float64{p.Slip, 1 - p.Slip}
	for o := range 2 {
		k := &kn.k[o]
		k.nn = (1 - p.Learn) * eN[o]
		k.nm = p.Learn * eM[o]
		k.mn = p.Forget * eN[o]
		k.mm = (1 - p.Forget) * eM[o]
		k.eN, k.eM = eN[o], eM[o]
		k.cN, k.cM = float64(o), float64(1-o)
	}
	return kn
}

// b2i is 1 for true, 0 for false (compiled to a byte load and a
// conditional move).
func b2i(b bool) int {
	if b {
		return 1
	}
	return 0
}

// ab is one answer's forward (or backward) variables for N and M.
type ab struct{ n, m float64 }

// counts are the expected sufficient statistics of one E-step.
type counts struct {
	ll       float64 // log-likelihood, natural log
	seqs     float64 // sequences with positive probability
	first    float64 // Σ P(M at the first answer | obs)
	xNM, xMN float64 // Σ expected N→M and M→N transitions
	gNt, gMt float64 // Σ P(N), P(M) over answers that have a successor
	gN, gM   float64 // Σ P(N), P(M) over all answers
	gNc, gMw float64 // Σ P(N) over correct answers, Σ P(M) over wrong ones
	zero     int     // sequences with zero probability (skipped)
}

// likAcc sums log-likelihoods as a running product of likelihoods, taking
// a logarithm only when the product gets small (once per few hundred short
// sequences instead of once per sequence).
type likAcc struct {
	log  float64
	prod float64
}

func newLikAcc() likAcc { return likAcc{prod: 1} }

// add adds log(lik) + logScale.
func (l *likAcc) add(lik, logScale float64) {
	l.log += logScale
	if lik < rescaleBelow {
		l.log += math.Log(lik)
		return
	}
	l.prod *= lik
	if l.prod < 1e-200 {
		l.log += math.Log(l.prod)
		l.prod = 1
	}
}

func (l *likAcc) total() float64 { return l.log + math.Log(l.prod) }

// mark records that the forward pass rescaled its variables at answer t
// by 1/s.
type mark struct {
	t int
	s float64
}

// scratch is one fit's reusable buffers: forward variables for the longest
// sequence and the rescaling marks of the current one.
type scratch struct {
	alpha []ab
	marks []mark
}

func newScratch(longest int) *scratch {
	return &scratch{alpha: make([]ab, longest), marks: make([]mark, 0, 8)}
}

// forward runs the forward pass over seq (len ≥ 1), storing the locally
// scaled forward variables in sc.alpha[:len(seq)] and the rescaling points
// in sc.marks when sc is not nil. The sequence's likelihood is
// lik·exp(logScale); lik = 0 when the model gives it probability zero.
func (kn *kernel) forward(seq []bool, sc *scratch) (lik, logScale float64) {
	k0 := &kn.k[b2i(seq[0])]
	aN := (1 - kn.prior) * k0.eN
	aM := kn.prior * k0.eM
	if sc == nil {
		if s := aN + aM; s < rescaleBelow {
			if !(s > 0) {
				return 0, 0
			}
			inv := 1 / s
			aN, aM = aN*inv, aM*inv
			logScale += math.Log(s)
		}
		for _, o := range seq[1:] {
			k := &kn.k[b2i(o)]
			aN, aM = aN*k.nn+aM*k.mn, aN*k.nm+aM*k.mm
			if s := aN + aM; s < rescaleBelow {
				if !(s > 0) {
					return 0, 0
				}
				inv := 1 / s
				aN, aM = aN*inv, aM*inv
				logScale += math.Log(s)
			}
		}
		return aN + aM, logScale
	}
	sc.marks = sc.marks[:0]
	alpha := sc.alpha[:len(seq)]
	for t := range alpha {
		if t > 0 {
			k := &kn.k[b2i(seq[t])]
			aN, aM = aN*k.nn+aM*k.mn, aN*k.nm+aM*k.mm
		}
		if s := aN + aM; s < rescaleBelow {
			if !(s > 0) {
				return 0, 0
			}
			inv := 1 / s
			aN, aM = aN*inv, aM*inv
			logScale += math.Log(s)
			sc.marks = append(sc.marks, mark{t, s})
		}
		alpha[t] = ab{aN, aM}
	}
	return aN + aM, logScale
}

// estep adds seq's expected counts to c (all but the log-likelihood, which
// it returns as lik·exp(logScale)), using sc (sized for seq) as scratch. A
// sequence the model gives probability zero is counted in c.zero and
// contributes nothing.
//
// The posterior of answer t is a(t)·b(t)/Z(t) with Z(t) = Σ_s a_s(t)·b_s(t).
// Unscaled, Z(t) is the sequence's likelihood at every t. So the backward
// pass carries b̃ = b/Z instead of b: then a(t)·b̃(t) is the posterior itself
// with no division, Σ_s a_s(t)·b̃_s(t) = 1 keeps b̃ in range without
// rescaling, and only where the forward pass rescaled (a(t) is on a scale s
// times that of a(t+1)) does b̃ change scale, by 1/s.
func (kn *kernel) estep(seq []bool, sc *scratch, c *counts) (lik, logScale float64) {
	n := len(seq)
	lik, logScale = kn.forward(seq, sc)
	if !(lik > 0) {
		c.zero++
		return 0, 0
	}
	alpha := sc.alpha[:n]
	marks := sc.marks
	next := -1 // the latest forward rescaling point not yet passed
	if len(marks) > 0 {
		next = marks[len(marks)-1].t
	}

	// Last answer: b = (1, 1), Z = Σ a.
	last := alpha[n-1]
	bN := 1 / (last.n + last.m)
	bM := bN
	gNl, gMl := last.n*bN, last.m*bM
	ko := &kn.k[b2i(seq[n-1])]
	gNc, gMw := gNl*ko.cN, gMl*ko.cM

	var xNM, xMN, gNt, gMt float64
	gM := gMl
	for t := n - 2; t >= 0; t-- {
		if t+1 == next {
			inv := 1 / marks[len(marks)-1].s
			bN, bM = bN*inv, bM*inv
			marks = marks[:len(marks)-1]
			next = -1
			if len(marks) > 0 {
				next = marks[len(marks)-1].t
			}
		}
		k := ko // answer t+1
		ko = &kn.k[b2i(seq[t])]
		tNM, tMN := k.nm*bM, k.mn*bN
		bN, bM = k.nn*bN+tNM, tMN+k.mm*bM
		a := alpha[t]
		gN := a.n * bN
		gM = a.m * bM
		xNM += a.n * tNM
		xMN += a.m * tMN
		gNt += gN
		gMt += gM
		gNc += gN * ko.cN
		gMw += gM * ko.cM
	}
	if math.IsNaN(xNM+xMN+gNt+gMt+gNc+gMw+gM) || math.IsInf(bN+bM, 0) {
		// Only at probabilities of exactly 0 or 1, where the scaled
		// variables lose all overlap: redo the sequence answer by answer
		// with guards.
		kn.estepGuarded(seq, alpha, c)
		return lik, logScale
	}
	c.seqs++
	c.first += gM
	c.xNM += xNM
	c.xMN += xMN
	c.gNt += gNt
	c.gMt += gMt
	c.gN += gNt + gNl
	c.gM += gMt + gMl
	c.gNc += gNc
	c.gMw += gMw
	return lik, logScale
}

// estepGuarded is estep's backward pass with every posterior normalised
// under a guard: an answer whose forward and backward variables do not
// overlap contributes nothing. alpha holds the forward pass of seq.
func (kn *kernel) estepGuarded(seq []bool, alpha []ab, c *counts) {
	n := len(seq)
	var s counts
	bN, bM := 1.0, 1.0
	for t := n - 1; t >= 0; t-- {
		var tNM, tMN float64
		if t < n-1 {
			k := &kn.k[b2i(seq[t+1])]
			tNM, tMN = k.nm*bM, k.mn*bN
			bN, bM = k.nn*bN+tNM, tMN+k.mm*bM
			if sum := bN + bM; sum < rescaleBelow && sum > 0 {
				inv := 1 / sum
				bN, bM, tNM, tMN = bN*inv, bM*inv, tNM*inv, tMN*inv
			}
		}
		a := alpha[t]
		z := a.n*bN + a.m*bM
		if !(z > 0) || math.IsInf(z, 0) {
			continue
		}
		gN, gM := a.n*bN/z, a.m*bM/z
		ko := &kn.k[b2i(seq[t])]
		s.gN += gN
		s.gM += gM
		s.gNc += gN * ko.cN
		s.gMw += gM * ko.cM
		if t < n-1 {
			s.xNM += a.n * tNM / z
			s.xMN += a.m * tMN / z
			s.gNt += gN
			s.gMt += gM
		}
		if t == 0 {
			s.first = gM
		}
	}
	s.seqs = 1
	c.add(&s)
}

func (c *counts) add(o *counts) {
	c.ll += o.ll
	c.seqs += o.seqs
	c.first += o.first
	c.xNM += o.xNM
	c.xMN += o.xMN
	c.gNt += o.gNt
	c.gMt += o.gMt
	c.gN += o.gN
	c.gM += o.gM
	c.gNc += o.gNc
	c.gMw += o.gMw
	c.zero += o.zero
}

// estepData runs the E-step over every sequence of d; sc must hold the
// longest sequence.
func (kn *kernel) estepData(d *Data, sc *scratch) counts {
	var c counts
	ll := newLikAcc()
	start := 0
	for _, end := range d.Ends {
		if end > start { // Data.Add never stores an empty sequence; a hand-built Data might
			lik, logScale := kn.estep(d.Obs[start:end], sc, &c)
			if lik > 0 {
				ll.add(lik, logScale)
			}
		}
		start = end
	}
	c.ll = ll.total()
	if c.zero > 0 {
		c.ll = math.Inf(-1)
	}
	return c
}

// LogLik is the total log-likelihood (natural log) of every sequence of d
// under p; −Inf when p gives some sequence probability zero.
func LogLik(d *Data, p state.Params) float64 {
	kn := newKernel(p)
	ll := newLikAcc()
	start := 0
	for _, end := range d.Ends {
		if end > start {
			lik, logScale := kn.forward(d.Obs[start:end], nil)
			if !(lik > 0) {
				return math.Inf(-1)
			}
			ll.add(lik, logScale)
		}
		start = end
	}
	return ll.total()
}

// Filter returns the filtered posteriors P(mastered at answer t | answers
// 1..t) of one sequence, computed by the forward recursion that EM uses. It
// agrees with state.Params.Posterior and Transition applied answer by
// answer, including their edge rule: an answer the model gives probability
// zero leaves the estimate where it was.
func Filter(seq []bool, p state.Params) []float64 {
	out := make([]float64, len(seq))
	if len(seq) == 0 {
		return out
	}
	kn := newKernel(p)
	k0 := &kn.k[b2i(seq[0])]
	aN, aM := (1-p.Prior)*k0.eN, p.Prior*k0.eM
	for t := range seq {
		if t > 0 {
			k := &kn.k[b2i(seq[t])]
			aN, aM = aN*k.nn+aM*k.mn, aN*k.nm+aM*k.mm
		}
		if !(aN+aM > 0) {
			// Zero-probability answer: keep the predicted distribution,
			// as state.Params.Posterior does.
			if t == 0 {
				aN, aM = 1-p.Prior, p.Prior
			} else {
				prev := out[t-1]
				aN = prev*p.Forget + (1-prev)*(1-p.Learn)
				aM = prev*(1-p.Forget) + (1-prev)*p.Learn
			}
		}
		inv := 1 / (aN + aM)
		aN, aM = aN*inv, aM*inv
		out[t] = min(max(aM, 0), 1)
	}
	return out
}

// smoothed returns P(mastered at answer t | the whole sequence) and the
// sequence's log-likelihood, by the forward pass above and a backward pass
// normalised at every step (diagnostics and tests; EM accumulates the same
// quantities without storing them).
func smoothed(seq []bool, p state.Params) ([]float64, float64) {
	n := len(seq)
	out := make([]float64, n)
	if n == 0 {
		return out, 0
	}
	kn := newKernel(p)
	sc := newScratch(n)
	lik, logScale := kn.forward(seq, sc)
	if !(lik > 0) {
		return out, math.Inf(-1)
	}
	alpha := sc.alpha
	bN, bM := 1.0, 1.0
	for t := n - 1; t >= 0; t-- {
		if t < n-1 {
			k := &kn.k[b2i(seq[t+1])]
			bN, bM = k.nn*bN+k.nm*bM, k.mn*bN+k.mm*bM
			s := bN + bM
			bN, bM = bN/s, bM/s
		}
		a := alpha[t]
		out[t] = a.m * bM / (a.n*bN + a.m*bM)
	}
	return out, math.Log(lik) + logScale
}
