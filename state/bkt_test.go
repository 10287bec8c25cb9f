package state

import (
	"math"
	"testing"
)

func near(t *testing.T, what string, got, want, tol float64) {
	t.Helper()
	if math.Abs(got-want) > tol {
		t.Errorf("%s = %.12f, want %.12f (±%g)", what, got, want, tol)
	}
}

// The update equations of Corbett & Anderson (1995), worked by hand on
// numbers of our own: prior 0.3, learn 0.1, guess 0.2, slip 0.1.
func TestStepWorkedByHand(t *testing.T) {
	p := Params{Prior: 0.3, Learn: 0.1, Guess: 0.2, Slip: 0.1}

	// P(correct) = 0.3·0.9 + 0.7·0.2 = 0.27 + 0.14 = 0.41
	near(t, "Predict(0.3)", p.Predict(0.3), 0.41, 1e-15)

	// Correct: P(L|c) = 0.27 / 0.41 = 0.658536585365…
	// P(L next) = 0.658536585365 + (1 − 0.658536585365)·0.1 = 0.692682926829…
	near(t, "Posterior(0.3, correct)", p.Posterior(0.3, true), 0.27/0.41, 1e-15)
	near(t, "Step(0.3, correct)", p.Step(0.3, true), 0.6926829268292683, 1e-15)

	// Wrong: P(L|w) = 0.3·0.1 / (0.03 + 0.7·0.8) = 0.03 / 0.59 = 0.050847457627…
	// P(L next) = 0.050847457627 + 0.949152542373·0.1 = 0.145762711864…
	near(t, "Posterior(0.3, wrong)", p.Posterior(0.3, false), 0.03/0.59, 1e-15)
	near(t, "Step(0.3, wrong)", p.Step(0.3, false), 0.14576271186440679, 1e-15)

	// With forget 0.05 after a correct answer:
	// 0.658536585365·0.95 + 0.341463414634·0.1 = 0.625609756098 + 0.034146341463 = 0.659756097561
	p.Forget = 0.05
	near(t, "Step with forget", p.Step(0.3, true), 0.6597560975609756, 1e-15)
}

// Two answers in a row, correct then wrong, worked by hand from the first
// step's result 0.692682926829 (same parameters, no forget):
// P(L|w) = 0.692682926829·0.1 / (0.0692682926829 + 0.307317073171·0.8)
//
//	= 0.0692682926829 / (0.0692682926829 + 0.245853658537) = 0.0692682926829 / 0.315121951220 = 0.219814241486
//
// P(L next) = 0.219814241486 + 0.780185758514·0.1 = 0.297832817337
func TestTwoStepsWorkedByHand(t *testing.T) {
	p := Params{Prior: 0.3, Learn: 0.1, Guess: 0.2, Slip: 0.1}
	l := p.Step(p.Prior, true)
	l = p.Step(l, false)
	near(t, "after correct, wrong", l, 0.297832817337, 1e-11)
}

func TestStepEdges(t *testing.T) {
	cases := []struct {
		name    string
		p       Params
		pL      float64
		correct bool
		want    float64
	}{
		// A learner who certainly knows the skill stays there without forget.
		{"known stays known", Params{Learn: 0.1, Guess: 0.2, Slip: 0.1}, 1, false, 1},
		// Zero guess: a correct answer proves mastery.
		{"no guess, correct", Params{Learn: 0.1, Guess: 0, Slip: 0.1}, 0.4, true, 1},
		// Zero-probability observation (pL = 0, guess = 0, correct): no evidence, only the transition.
		{"impossible observation", Params{Learn: 0.1, Guess: 0, Slip: 0.1}, 0, true, 0.1},
		// Slip 0 and a wrong answer proves non-mastery; then the transition.
		{"no slip, wrong", Params{Learn: 0.25, Guess: 0.2, Slip: 0}, 0.9, false, 0.25},
	}
	for _, c := range cases {
		got := c.p.Step(c.pL, c.correct)
		near(t, c.name, got, c.want, 1e-15)
	}
}

// A long sequence stays a probability and converges to the stationary point.
func TestLongSequence(t *testing.T) {
	p := Params{Prior: 0.01, Learn: 0.001, Guess: 0.45, Slip: 0.45, Forget: 0.001}
	l := p.Prior
	for i := 0; i < 1_000_000; i++ {
		l = p.Step(l, i%3 != 0)
		if !(l >= 0 && l <= 1) {
			t.Fatalf("step %d: mastery %v outside [0,1]", i, l)
		}
	}
}

func TestValidate(t *testing.T) {
	cases := []struct {
		p     Params
		field string // "" = valid
	}{
		{DefaultParams(), ""},
		{Params{Prior: -0.1, Learn: 0.1, Guess: 0.2, Slip: 0.1}, "prior"},
		{Params{Prior: 0.1, Learn: 1.5, Guess: 0.2, Slip: 0.1}, "learn"},
		{Params{Prior: 0.1, Learn: 0.1, Guess: math.NaN(), Slip: 0.1}, "guess"},
		{Params{Prior: 0.1, Learn: 0.1, Guess: 0.2, Slip: 2}, "slip"},
		{Params{Prior: 0.1, Learn: 0.1, Guess: 0.2, Slip: 0.1, Forget: -1}, "forget"},
		{Params{Prior: 0.1, Learn: 0.1, Guess: 0.6, Slip: 0.4}, "guess+slip"},
	}
	for _, c := range cases {
		err := c.p.Validate("trial-balance")
		if c.field == "" {
			if err != nil {
				t.Errorf("%v: unexpected error %v", c.p, err)
			}
			continue
		}
		var pe *ParamError
		if !errorsAs(err, &pe) || pe.Field != c.field || pe.Skill != "trial-balance" {
			t.Errorf("%v: got %v, want a ParamError on field %s of trial-balance", c.p, err, c.field)
		}
	}
}
