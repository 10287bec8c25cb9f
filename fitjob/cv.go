package fitjob

import (
	"math/rand/v2"

	"github.com/attain-dev/attain/state"
)

// CombineRule names the rule of Combine, for reports.
const CombineRule = "mean of the per-skill predictions"

// Combine turns the per-skill predictions for one answer to an item tagged
// with several skills into the one prediction that answer is scored by:
// their mean.
//
// Why once per answer: expanding a multi-skill answer into one scored row
// per skill counts the answer several times and, for models that read
// earlier rows, shows them the outcome before they predict it (Xiong et al.
// 2016; Badran & Preisach 2024). Why the mean: BKT updates the skills of an
// item independently (ARCHITECTURE.md) and does not say how they combine
// into one response; the mean stays within the range of the per-skill
// predictions, does not depend on the order of the skills, and equals the
// single prediction for a one-skill item. The product (every skill needed)
// would count a guess once per skill and drift towards 0 as skills are
// added, with no model in force that fits it. Replay scores with this same
// rule.
func Combine(ps []float64) float64 {
	if len(ps) == 1 {
		return ps[0]
	}
	var s float64
	for _, p := range ps {
		s += p
	}
	return s / float64(len(ps))
}

// Evaluation holds next-answer prediction scores.
type Evaluation struct {
	// Overall scores every answer once, by Combine of its skills'
	// predictions.
	Overall Scores
	// Skills scores, per skill, every answer tagged with it by that skill's
	// own prediction (skill index in History.Skills).
	Skills []Scores
}

func newEvaluation(skills int) *Evaluation {
	return &Evaluation{Skills: make([]Scores, skills)}
}

// merge appends o's pairs to e's.
func (e *Evaluation) merge(o *Evaluation) {
	e.Overall.Merge(&o.Overall)
	for s := range e.Skills {
		e.Skills[s].Merge(&o.Skills[s])
	}
}

// Evaluate replays the given learners (indexes into h.Learners; nil = all)
// under pf: for each answer, in each learner's order, it predicts P(correct)
// from the learner's current mastery of each skill before the answer is
// seen, scores it, and only then applies the answer (state.Record.Apply).
func (h *History) Evaluate(learners []int, pf *state.ParamFile) *Evaluation {
	ps := make([]state.Params, len(h.Skills))
	for s, name := range h.Skills {
		ps[s], _ = pf.For(name)
	}
	if learners == nil {
		learners = make([]int, len(h.Learners))
		for i := range learners {
			learners[i] = i
		}
	}
	return h.evaluate(learners, ps)
}

// evaluate is Evaluate with one parameter set per skill index.
func (h *History) evaluate(learners []int, ps []state.Params) *Evaluation {
	ev := newEvaluation(len(h.Skills))
	recs := make([]state.Record, len(h.Skills))
	seen := make([]bool, len(h.Skills))
	pol := state.DefaultPolicy() // thresholds do not change predictions
	var pred []float64
	for _, l := range learners {
		clear(seen)
		for _, st := range h.steps[l] {
			pred = pred[:0]
			for _, s := range st.skills {
				if !seen[s] {
					recs[s], seen[s] = state.NewRecord(ps[s], 0), true
				}
				out := recs[s].Apply(ps[s], st.correct, st.at, pol)
				ev.Skills[s].Add(out.PCorrect, st.correct)
				pred = append(pred, out.PCorrect)
			}
			ev.Overall.Add(Combine(pred), st.correct)
		}
	}
	return ev
}

// DefaultFolds is the number of cross-validation folds when none is given
// (5: common practice).
const DefaultFolds = 5

// Folds assigns each of n learners to one of k folds, deterministically for
// a seed: a seeded shuffle dealt round-robin, so fold sizes differ by at
// most one. Learner indexes refer to a sorted learner list (History), so
// the split does not depend on the order the source yielded them in.
func Folds(n, k int, seed int64) []int {
	perm := make([]int, n)
	for i := range perm {
		perm[i] = i
	}
	r := rand.New(rand.NewPCG(uint64(seed), 0x6174_7461_696e_6676)) // fixed stream id
	r.Shuffle(n, func(i, j int) { perm[i], perm[j] = perm[j], perm[i] })
	fold := make([]int, n)
	for i, l := range perm {
		fold[l] = i % k
	}
	return fold
}
