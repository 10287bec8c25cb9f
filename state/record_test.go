package state

import (
	"errors"
	"testing"
)

func errorsAs(err error, target any) bool { return errors.As(err, target) }

func TestRecordApplyEvents(t *testing.T) {
	p := Params{Prior: 0.3, Learn: 0.2, Guess: 0.2, Slip: 0.1}
	pol := DefaultPolicy()
	r := NewRecord(p, 7)
	var reached []uint32
	for i := 0; i < 6; i++ {
		out := r.Apply(p, true, int64(i), pol)
		if out.Reached {
			reached = append(reached, r.Opportunities)
		}
		if out.Stuck {
			t.Fatalf("stuck at %d while answering correctly", r.Opportunities)
		}
	}
	if len(reached) != 1 {
		t.Fatalf("reached at %v, want exactly one upward crossing", reached)
	}
	// Fall below with wrong answers and climb back: a second crossing.
	for r.Mastered {
		r.Apply(p, false, 10, pol)
	}
	for !r.Mastered {
		if out := r.Apply(p, true, 11, pol); out.Reached {
			reached = append(reached, r.Opportunities)
		}
	}
	if len(reached) != 2 {
		t.Fatalf("reached at %v, want a second crossing after falling below", reached)
	}
	if r.ParamsVersion != 7 || r.Correct+0 == 0 || r.Updated != 11 {
		t.Fatalf("record %+v", r)
	}
}

func TestRecordStuckOnce(t *testing.T) {
	p := Params{Prior: 0.1, Learn: 0.05, Guess: 0.3, Slip: 0.1}
	pol := Policy{Threshold: 0.95, StuckAfter: 10}
	r := NewRecord(p, 1)
	stuck := 0
	for i := 0; i < 30; i++ {
		if r.Apply(p, i%2 == 0, 0, pol).Stuck {
			stuck++
			if r.Opportunities != 10 {
				t.Fatalf("stuck at opportunity %d, want 10", r.Opportunities)
			}
		}
	}
	if stuck != 1 {
		t.Fatalf("%d stuck events, want 1", stuck)
	}
	// A learner who reached mastery before the 10th opportunity is not stuck.
	r = NewRecord(p, 1)
	good := Params{Prior: 0.5, Learn: 0.5, Guess: 0.1, Slip: 0.05}
	for i := 0; i < 12; i++ {
		ok := i < 5
		if r.Apply(good, ok, 0, pol).Stuck {
			t.Fatalf("stuck although mastery was reached (record %+v)", r)
		}
	}
}

func TestEventIDDeterministic(t *testing.T) {
	a := EventID("hl-00001", "trial-balance", KindReached, 7)
	if a != EventID("hl-00001", "trial-balance", KindReached, 7) || len(a) != 32 {
		t.Fatalf("id %q not deterministic or not 32 hex digits", a)
	}
	for _, other := range []string{
		EventID("hl-00001", "trial-balance", KindStuck, 7),
		EventID("hl-00001", "trial-balance", KindReached, 8),
		EventID("hl-0000", "1trial-balance", KindReached, 7),
		EventID("hl-00002", "trial-balance", KindReached, 7),
	} {
		if other == a {
			t.Fatalf("distinct outputs share id %s", a)
		}
	}
}

// A learner far past the threshold who then answers wrong many times: the
// record must fall as exact arithmetic says, not stay at a rounded 1.
// Reference: exact rational arithmetic (Python fractions) of the equations
// of Corbett & Anderson (1995), 40 correct then 35 wrong from prior 0.3,
// learn 0.1, guess 0.2, slip 0.1:
//
//	m = F(3,10); for c in [1]*40+[0]*35: k,u = (1-S,G) if c else (S,1-G); post = m*k/(m*k+(1-m)*u); m = post+(1-post)*T
//	→ 0.11748076625534622
func TestRecordKeepsPrecisionNearOne(t *testing.T) {
	p := Params{Prior: 0.3, Learn: 0.1, Guess: 0.2, Slip: 0.1}
	pol := DefaultPolicy()
	r := NewRecord(p, 1)
	for i := 0; i < 40; i++ {
		r.Apply(p, true, 0, pol)
	}
	if r.Mastery != 1 {
		t.Logf("after 40 correct: mastery %v (1 − %g)", r.Mastery, r.NotMastered)
	}
	for i := 0; i < 35; i++ {
		r.Apply(p, false, 0, pol)
	}
	near(t, "mastery after 40 correct, 35 wrong", r.Mastery, 0.11748076625534622, 1e-12)
	near(t, "mastery + not mastered", r.Mastery+r.NotMastered, 1, 1e-12)
	if r.Mastered {
		t.Fatalf("still counted as mastered at %v", r.Mastery)
	}
}

// StepPair agrees with Step wherever Step does not round (away from 1).
func TestStepPairAgreesWithStep(t *testing.T) {
	ps := []Params{DefaultParams(), {Prior: 0.05, Learn: 0.01, Guess: 0.2, Slip: 0.1, Forget: 0.02}, {Prior: 0.5, Learn: 0.3, Guess: 0.45, Slip: 0.3}}
	for _, p := range ps {
		m, n, l := p.Prior, 1-p.Prior, p.Prior
		for i := 0; i < 12; i++ {
			c := i%3 != 1
			m, n = p.StepPair(m, n, c)
			l = p.Step(l, c)
			near(t, "StepPair vs Step", m, l, 1e-12)
		}
	}
}
