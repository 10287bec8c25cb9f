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
	var known, unknown float64
	if correct {
		known, unknown = pL*(1-p.Slip), (1-pL)*p.Guess
	} else {
		known, unknown = pL*p.Slip, (1-pL)*(1-p.Guess)
	}
	den := known + unknown
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
// returns P(L next), the mastery reported after the answer.
func (p Params) Step(pL float64, correct bool) float64 {
	return p.Transition(p.Posterior(pL, correct))
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
