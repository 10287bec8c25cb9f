package fitjob

import (
	"bufio"
	"container/heap"
	"encoding/json"
	"errors"
	"fmt"
	"hash/fnv"
	"io"
	"iter"
	"math"
	"math/rand/v2"
	"time"

	"github.com/attain-dev/attain/state"
)

// ErrBadCohort rejects a cohort the simulator cannot draw.
var ErrBadCohort = errors.New("attain: invalid cohort")

// SkillTruth is one skill of a simulated cohort and the parameters its
// answers are drawn from.
type SkillTruth struct {
	Skill  string
	Params state.Params
}

// Scenario is a named set of skills with their true parameters.
type Scenario struct {
	Name   string
	Skills []SkillTruth
}

// HarbourLane is the invented demo scenario of ARCHITECTURE.md: Harbour
// Lane Evening College's bookkeeping certificate. The parameters are
// invented too, chosen so that the skills differ visibly and each stays
// identifiable from 2,000 learners × 30 opportunities (guess + slip well
// below 1, enough learners in each state):
//   - journal-entries is the easy one (high prior, fast learning, low slip);
//   - bank-reconciliation is the hard one with a high slip;
//   - payroll-deductions is the one few learners ever master (low prior,
//     slow learning).
func HarbourLane() Scenario {
	return Scenario{Name: "Harbour Lane Evening College, bookkeeping certificate", Skills: []SkillTruth{
		{"journal-entries", state.Params{Prior: 0.50, Learn: 0.20, Guess: 0.15, Slip: 0.05}},
		{"trial-balance", state.Params{Prior: 0.30, Learn: 0.15, Guess: 0.20, Slip: 0.10}},
		{"bank-reconciliation", state.Params{Prior: 0.15, Learn: 0.08, Guess: 0.15, Slip: 0.25}},
		{"straight-line-depreciation", state.Params{Prior: 0.25, Learn: 0.12, Guess: 0.22, Slip: 0.08}},
		{"sales-tax-invoices", state.Params{Prior: 0.35, Learn: 0.15, Guess: 0.15, Slip: 0.10}},
		{"payroll-deductions", state.Params{Prior: 0.05, Learn: 0.01, Guess: 0.20, Slip: 0.10}},
	}}
}

// PickSkills returns the true parameters of the named skills: the
// scenario's for its own skills, and for any other name a set drawn from
// the name and seed (prior 0.1–0.5, learn 0.05–0.3, guess 0.1–0.3, slip
// 0.05–0.2; invented ranges that keep the skill identifiable), with learn
// lowered where needed so that a wrong answer never raises a new learner's
// estimate.
func PickSkills(sc Scenario, names []string, seed int64) ([]SkillTruth, error) {
	known := map[string]state.Params{}
	for _, s := range sc.Skills {
		known[s.Skill] = s.Params
	}
	seen := map[string]bool{}
	var out []SkillTruth
	for _, n := range names {
		if n == "" {
			return nil, fmt.Errorf("%w: empty skill name in the skill list", ErrBadCohort)
		}
		if seen[n] {
			return nil, fmt.Errorf("%w: skill %q listed twice", ErrBadCohort, n)
		}
		seen[n] = true
		if p, ok := known[n]; ok {
			out = append(out, SkillTruth{n, p})
			continue
		}
		h := fnv.New64a()
		h.Write([]byte(n))
		r := rand.New(rand.NewPCG(h.Sum64(), uint64(seed)))
		p := state.Params{
			Prior: 0.1 + 0.4*r.Float64(),
			Learn: 0.05 + 0.25*r.Float64(),
			Guess: 0.1 + 0.2*r.Float64(),
			Slip:  0.05 + 0.15*r.Float64(),
		}
		// Keep the prior above the level that repeated wrong answers lead
		// to, (1−guess)·learn/(1−slip−guess), so that a wrong answer never
		// raises a new learner's estimate: slow learn down if needed.
		if level := (1 - p.Guess) * p.Learn / (1 - p.Slip - p.Guess); p.Prior < level+0.02 {
			p.Learn = max(0.01, (p.Prior-0.02)*(1-p.Slip-p.Guess)/(1-p.Guess))
		}
		out = append(out, SkillTruth{n, p})
	}
	return out, nil
}

// Cohort describes a simulated cohort. Zero fields take the defaults shown.
type Cohort struct {
	Learners      int          // 2000
	Opportunities int          // answers per learner per skill: 30
	Skills        []SkillTruth // HarbourLane().Skills
	Items         int          // practice items per skill: 40
	Seed          int64
	// Start is the first evening of the course: 2025-09-01T18:00:00Z.
	Start time.Time
}

func (c Cohort) withDefaults() Cohort {
	if c.Learners == 0 {
		c.Learners = 2000
	}
	if c.Opportunities == 0 {
		c.Opportunities = 30
	}
	if c.Skills == nil {
		c.Skills = HarbourLane().Skills
	}
	if c.Items == 0 {
		c.Items = 40
	}
	if c.Start.IsZero() {
		c.Start = time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC)
	}
	return c
}

func (c Cohort) validate() error {
	var errs []error
	if c.Learners < 1 {
		errs = append(errs, fmt.Errorf("%w: learners = %d: must be 1 or more", ErrBadCohort, c.Learners))
	}
	if c.Opportunities < 1 {
		errs = append(errs, fmt.Errorf("%w: opportunities = %d: must be 1 or more", ErrBadCohort, c.Opportunities))
	}
	if len(c.Skills) == 0 {
		errs = append(errs, fmt.Errorf("%w: no skills", ErrBadCohort))
	}
	if c.Items < 1 {
		errs = append(errs, fmt.Errorf("%w: items = %d: must be 1 or more", ErrBadCohort, c.Items))
	}
	seen := map[string]bool{}
	for _, s := range c.Skills {
		if s.Skill == "" || seen[s.Skill] {
			errs = append(errs, fmt.Errorf("%w: skill %q: names must be non-empty and distinct", ErrBadCohort, s.Skill))
		}
		seen[s.Skill] = true
		if err := s.Params.Validate(s.Skill); err != nil {
			errs = append(errs, err)
		}
	}
	return errors.Join(errs...)
}

// Truth returns the cohort's true parameters as a parameter file (version
// 1, created at the cohort's start, so that it is the same on every run).
func (c Cohort) Truth() *state.ParamFile {
	c = c.withDefaults()
	pf := &state.ParamFile{Version: 1, Created: c.Start, Default: state.DefaultParams(), Skills: map[string]state.SkillParams{}}
	for _, s := range c.Skills {
		pf.Skills[s.Skill] = state.SkillParams{Params: s.Params}
	}
	return pf
}

// Generator draws a cohort's answers one at a time, in `at` order across
// the whole cohort (ties: lower learner number first). Each learner has a
// latent mastery path per skill drawn from the true prior (stratified across
// the cohort, see NewGenerator), learn and forget, and answers drawn from
// guess and slip. Learners enrol over the first two
// weeks and work in evening sessions of 8–25 answers, 20 s to a few minutes
// apart, one to four days between sessions; within a session they work in
// short blocks of one skill, mostly the earliest skill of the course they
// have not finished, sometimes a later one. Everything is drawn from the
// seed, learner by learner, so the same cohort comes out every time.
type Generator struct {
	c       Cohort
	h       learnerHeap
	emitted int
	total   int
}

type simLearner struct {
	num      int // 1-based
	id       string
	r        *rand.Rand
	mastered []bool
	left     []int // opportunities left per skill
	answered int
	next     int64 // Unix nanoseconds of the next answer
	day      int   // course day of the current session
	session  int   // answers left in the current session
	block    int   // answers left in the current block
	skill    int   // skill of the current block
}

// NewGenerator checks c and returns its generator.
func NewGenerator(c Cohort) (*Generator, error) {
	c = c.withDefaults()
	if err := c.validate(); err != nil {
		return nil, err
	}
	g := &Generator{c: c, total: c.Learners * c.Opportunities * len(c.Skills)}
	g.h = make(learnerHeap, 0, c.Learners)
	for i := 1; i <= c.Learners; i++ {
		l := &simLearner{
			num:      i,
			id:       fmt.Sprintf("hl-%05d", i),
			r:        rand.New(rand.NewPCG(uint64(c.Seed), uint64(i))),
			mastered: make([]bool, len(c.Skills)),
			left:     make([]int, len(c.Skills)),
		}
		for s := range c.Skills {
			l.left[s] = c.Opportunities
		}
		l.day = l.r.IntN(14) // enrolment over the first two weeks
		g.startSession(l)
		g.h = append(g.h, l)
	}
	// Initial mastery, stratified: at each skill exactly round(prior × N)
	// learners, chosen by a seeded shuffle, start mastered. Each learner
	// still starts mastered with probability prior, but the cohort's share
	// is the true prior rather than a binomial draw around it, so a refit's
	// error on prior measures the estimator, not the luck of the draw.
	order := make([]int, c.Learners)
	for s, sk := range c.Skills {
		for i := range order {
			order[i] = i
		}
		r := rand.New(rand.NewPCG(uint64(c.Seed), uint64(fitSeed(c.Seed, sk.Skill, 0))))
		r.Shuffle(len(order), func(i, j int) { order[i], order[j] = order[j], order[i] })
		k := int(math.Round(sk.Params.Prior * float64(c.Learners)))
		for _, i := range order[:k] {
			g.h[i].mastered[s] = true
		}
	}
	heap.Init(&g.h)
	return g, nil
}

// Total is the number of answers the cohort gives.
func (g *Generator) Total() int { return g.total }

// Truth is the cohort's true parameter file (see Cohort.Truth).
func (g *Generator) Truth() *state.ParamFile { return g.c.Truth() }

// Next returns the next answer, or ok=false when the cohort has given all.
func (g *Generator) Next() (a state.Answer, ok bool) {
	if len(g.h) == 0 {
		return a, false
	}
	l := g.h[0]
	if l.block == 0 {
		g.pickBlock(l)
	}
	s := l.skill
	p := g.c.Skills[s].Params
	var correct bool
	if l.mastered[s] {
		correct = l.r.Float64() >= p.Slip
		if l.r.Float64() < p.Forget {
			l.mastered[s] = false
		}
	} else {
		correct = l.r.Float64() < p.Guess
		if l.r.Float64() < p.Learn {
			l.mastered[s] = true
		}
	}
	l.answered++
	a = state.Answer{
		ID:      fmt.Sprintf("%s-%04d", l.id, l.answered),
		Learner: l.id,
		Item:    fmt.Sprintf("%s-q%03d", g.c.Skills[s].Skill, 1+l.r.IntN(g.c.Items)),
		Skills:  []string{g.c.Skills[s].Skill},
		Correct: correct,
		At:      time.Unix(0, l.next).UTC(),
	}
	l.left[s]--
	l.block--
	l.session--
	g.emitted++
	if l.answered == g.c.Opportunities*len(g.c.Skills) {
		heap.Pop(&g.h)
		return a, true
	}
	if l.left[s] == 0 {
		l.block = 0
	}
	if l.session == 0 {
		l.day += 1 + l.r.IntN(4)
		g.startSession(l)
	} else {
		// Think time: log-normal around 45 s, at least 20 s (invented).
		gap := max(20, 45*math.Exp(0.5*l.r.NormFloat64()))
		l.next += int64(gap*1e3) * int64(time.Millisecond)
	}
	heap.Fix(&g.h, 0)
	return a, true
}

// All yields the remaining answers in order.
func (g *Generator) All() iter.Seq[state.Answer] {
	return func(yield func(state.Answer) bool) {
		for {
			a, ok := g.Next()
			if !ok || !yield(a) {
				return
			}
		}
	}
}

// startSession schedules l's next session on its course day, between 18:00
// and 21:00 (the cohort starts at 18:00), to the millisecond.
func (g *Generator) startSession(l *simLearner) {
	off := time.Duration(l.day)*24*time.Hour + time.Duration(l.r.Int64N(int64(3*time.Hour/time.Millisecond)))*time.Millisecond
	l.next = g.c.Start.Add(off).UnixNano()
	l.session = 8 + l.r.IntN(18)
}

// pickBlock chooses the skill of l's next block among the skills it has not
// finished: the k-th earliest with weight 1/k², so mostly the earliest.
func (g *Generator) pickBlock(l *simLearner) {
	var w float64
	k := 0
	for _, left := range l.left {
		if left > 0 {
			k++
			w += 1 / float64(k*k)
		}
	}
	x := l.r.Float64() * w
	k = 0
	for s, left := range l.left {
		if left == 0 {
			continue
		}
		k++
		l.skill = s
		x -= 1 / float64(k*k)
		if x < 0 {
			break
		}
	}
	l.block = min(3+l.r.IntN(4), l.left[l.skill])
}

// learnerHeap orders learners by their next answer's time, then number.
type learnerHeap []*simLearner

func (h learnerHeap) Len() int { return len(h) }
func (h learnerHeap) Less(i, j int) bool {
	if h[i].next != h[j].next {
		return h[i].next < h[j].next
	}
	return h[i].num < h[j].num
}
func (h learnerHeap) Swap(i, j int) { h[i], h[j] = h[j], h[i] }
func (h *learnerHeap) Push(x any)   { *h = append(*h, x.(*simLearner)) }
func (h *learnerHeap) Pop() any {
	old := *h
	x := old[len(old)-1]
	*h = old[:len(old)-1]
	return x
}

// WriteCohort writes every answer of c to w as native v1 JSON lines, in
// `at` order, and returns how many it wrote.
func WriteCohort(w io.Writer, c Cohort) (int, error) {
	g, err := NewGenerator(c)
	if err != nil {
		return 0, err
	}
	bw := bufio.NewWriterSize(w, 1<<16)
	n := 0
	for a := range g.All() {
		b, err := json.Marshal(a)
		if err != nil {
			return n, fmt.Errorf("attain: encoding answer %s: %w", a.ID, err)
		}
		bw.Write(b)
		if err := bw.WriteByte('\n'); err != nil {
			return n, fmt.Errorf("attain: writing answers: %w", err)
		}
		n++
	}
	if err := bw.Flush(); err != nil {
		return n, fmt.Errorf("attain: writing answers: %w", err)
	}
	return n, nil
}
