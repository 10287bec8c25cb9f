package state

// The model equations of Bayesian Knowledge Tracing, as published by Corbett
// & Anderson (1995), with the optional forget transition:
//
//	P(L | correct) = P(L)(1−S) / (P(L)(1−S) + (1−P(L))G)
//	P(L | wrong)   = P(L)S / (P(L)S + (1−P(L))(1−G))
//	P(L next)      = P(L | obs)(1−F) + (1−P(L | obs))T
//	P(correct)     = P(L)(1−S) + (1−P(L))G
//
// All functions are pure and safe at the edges: a probability of exactly 0 or
// 1 and an observation that the model gives zero probability leave the
// estimate where it was instead of dividing by zero.

// Predict returns P(correct) at an opportunity where the learner knows the
// skill with probability pL.
func (p Params) Predict(pL float64) float64 {
	return pL*(1-p.Slip) + (1-pL)*p.Guess
}

// Posterior returns P(L | observation) from the prior-to-answer pL.
func (p Params) Posterior(pL float64, correct bool) float64 {
	k, u := p.Slip, 1-p.Guess // P(obs | mastered), P(obs | not mastered)
	if correct {
		k, u = 1-p.Slip, p.Guess
	}
	known := pL * k
	den := known + (1-pL)*u
	if !(den > 0) {
		// The model gives this observation zero probability: it carries no
		// usable evidence, so the estimate stays.
		return clamp01(pL)
	}
	return clamp01(known / den)
}

// Transition returns P(L next) from the posterior post.
func (p Params) Transition(post float64) float64 {
	return clamp01(post*(1-p.Forget) + (1-post)*p.Learn)
}

// Step applies one answer: the evidence update then the transition. It
// returns P(L next), the mastery reported after the answer. It works on
// P(L) alone, which loses the distance to 1 once P(L) rounds to 1; Record
// uses StepPair, which does not.
func (p Params) Step(pL float64, correct bool) float64 {
	k, u := p.Slip, 1-p.Guess
	if correct {
		k, u = 1-p.Slip, p.Guess
	}
	known := pL * k
	den := known + (1-pL)*u
	post := pL
	if den > 0 {
		post = known / den
	}
	return min(max(post*(1-p.Forget)+(1-post)*p.Learn, 0), 1)
}

// StepPair is Step on the pair (m, n) = (P(L), 1 − P(L)), each computed by
// its own formula from sums and products of non-negative terms, never as 1
// minus the other. So neither end loses precision: a learner at
// P(L) = 1 − 1e-20 still needs the right number of wrong answers to fall
// below the threshold, where Step would have rounded them to certainty.
func (p Params) StepPair(m, n float64, correct bool) (float64, float64) {
	k, u := p.Slip, 1-p.Guess
	if correct {
		k, u = 1-p.Slip, p.Guess
	}
	km, un := m*k, n*u
	if den := km + un; den > 0 {
		inv := 1 / den
		m, n = km*inv, un*inv
	}
	return min(m*(1-p.Forget)+n*p.Learn, 1), min(n*(1-p.Learn)+m*p.Forget, 1)
}

// PredictPair is Predict on the pair (P(L), 1 − P(L)).
func (p Params) PredictPair(m, n float64) float64 {
	return m*(1-p.Slip) + n*p.Guess
}

func clamp01(x float64) float64 {
	if x < 0 {
		return 0
	}
	if x > 1 {
		return 1
	}
	return x
}
