package fitjob

import (
	"context"
	"fmt"
	"slices"
	"sort"

	"github.com/attain-dev/attain/state"
)

// A Source yields the answer history a refit reads: a file of native events
// first, later a topic or a store. Answers calls fn once per valid answer,
// each learner's answers in that learner's order (ties in `at` keep the
// source's order), and stops at the first error fn returns.
type Source interface {
	// Name describes the source in messages, e.g. the file's path.
	Name() string
	Answers(ctx context.Context, fn func(state.Answer) error) error
}

// History is every learner's answers in order, ready to be split by
// learner, fitted per skill and replayed for evaluation. Learners and
// skills are sorted, so that everything derived from a History is the same
// whatever order the source yielded learners in.
type History struct {
	Learners []string // sorted
	Skills   []string // sorted
	// Duplicates counts answers dropped because their id had already been
	// seen for the same learner.
	Duplicates int

	steps [][]step // per learner, in order
	// seqs[s][l] is learner l's answers at skill s, in order (nil: none).
	seqs [][][]bool
}

type step struct {
	skills  []int32 // indexes into Skills, no repeats
	correct bool
	at      int64 // Unix nanoseconds
}

// HistoryBuilder collects answers into a History. The zero value is ready
// to use.
type HistoryBuilder struct {
	learners map[string]*pendingLearner
	skillIdx map[string]int32
	skills   []string
	single   [][]int32 // single[i] = []int32{i}
	seq      int
	dups     int
}

type pendingLearner struct {
	ids   map[string]struct{}
	steps []pendingStep
}

type pendingStep struct {
	step
	seq int // arrival order, to keep ties in `at` in source order
}

// Add records one answer and reports false when it is a duplicate (its id
// was already added for this learner; the first one counts).
func (b *HistoryBuilder) Add(a state.Answer) bool {
	if b.learners == nil {
		b.learners = map[string]*pendingLearner{}
		b.skillIdx = map[string]int32{}
	}
	pl := b.learners[a.Learner]
	if pl == nil {
		pl = &pendingLearner{ids: map[string]struct{}{}}
		b.learners[a.Learner] = pl
	}
	if _, dup := pl.ids[a.ID]; dup {
		b.dups++
		return false
	}
	pl.ids[a.ID] = struct{}{}
	st := pendingStep{step: step{correct: a.Correct, at: a.At.UnixNano()}, seq: b.seq}
	b.seq++
	if len(a.Skills) == 1 {
		// The common case shares one read-only slice per skill.
		st.skills = b.single[b.skill(a.Skills[0])]
	} else {
		for _, s := range a.Skills {
			if i := b.skill(s); !slices.Contains(st.skills, i) {
				st.skills = append(st.skills, i)
			}
		}
	}
	pl.steps = append(pl.steps, st)
	return true
}

// skill returns the arrival index of skill s, adding it when new.
func (b *HistoryBuilder) skill(s string) int32 {
	i, ok := b.skillIdx[s]
	if !ok {
		i = int32(len(b.skills))
		b.skillIdx[s] = i
		b.skills = append(b.skills, s)
		b.single = append(b.single, []int32{i})
	}
	return i
}

// History orders every learner's answers by `at` (ties in the order they
// were added) and returns the result. The builder must not be used after.
func (b *HistoryBuilder) History() *History {
	h := &History{Duplicates: b.dups}
	// Sorted skills, and the map from arrival index to sorted index.
	h.Skills = slices.Clone(b.skills)
	sort.Strings(h.Skills)
	remap := make([]int32, len(b.skills))
	for i, s := range b.skills {
		remap[i] = int32(sort.SearchStrings(h.Skills, s))
	}
	sortedSingle := make([][]int32, len(b.skills)) // by arrival index
	for i := range b.skills {
		sortedSingle[i] = []int32{remap[i]}
	}
	h.Learners = make([]string, 0, len(b.learners))
	for l := range b.learners {
		h.Learners = append(h.Learners, l)
	}
	sort.Strings(h.Learners)
	h.steps = make([][]step, len(h.Learners))
	h.seqs = make([][][]bool, len(h.Skills))
	for s := range h.seqs {
		h.seqs[s] = make([][]bool, len(h.Learners))
	}
	for li, l := range h.Learners {
		ps := b.learners[l].steps
		slices.SortStableFunc(ps, func(x, y pendingStep) int {
			switch {
			case x.at < y.at:
				return -1
			case x.at > y.at:
				return 1
			}
			return x.seq - y.seq
		})
		steps := make([]step, len(ps))
		for i, p := range ps {
			if len(p.skills) == 1 {
				p.skills = sortedSingle[p.skills[0]]
			} else {
				for j, s := range p.skills {
					p.skills[j] = remap[s] // a slice of this answer's own
				}
			}
			steps[i] = p.step
			for _, s := range p.skills {
				h.seqs[s][li] = append(h.seqs[s][li], p.correct)
			}
		}
		h.steps[li] = steps
	}
	*b = HistoryBuilder{}
	return h
}

// LoadHistory reads every answer of src into a History.
func LoadHistory(ctx context.Context, src Source) (*History, error) {
	var b HistoryBuilder
	err := src.Answers(ctx, func(a state.Answer) error {
		b.Add(a)
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("attain: reading %s: %w", src.Name(), err)
	}
	return b.History(), nil
}

// Answers is the number of answers kept (duplicates dropped).
func (h *History) Answers() int {
	var n int
	for _, st := range h.steps {
		n += len(st)
	}
	return n
}

// SkillData returns, for the skill at index s in Skills, the sequences of
// the given learners (indexes into Learners) who answered it, in the order
// given; nil learners means all.
func (h *History) SkillData(s int, learners []int) *Data {
	d := &Data{}
	if learners == nil {
		for _, seq := range h.seqs[s] {
			d.Add(seq)
		}
		return d
	}
	for _, l := range learners {
		d.Add(h.seqs[s][l])
	}
	return d
}

// skillCounts returns how many learners answered skill s, how many answers
// they gave and how many were correct.
func (h *History) skillCounts(s int) (learners, answers, correct int) {
	for _, seq := range h.seqs[s] {
		if len(seq) == 0 {
			continue
		}
		learners++
		answers += len(seq)
		for _, c := range seq {
			if c {
				correct++
			}
		}
	}
	return
}
