package fitjob

import (
	"bufio"
	"bytes"
	"context"
	"fmt"
	"math"
	"testing"
	"time"

	"github.com/attain-dev/attain/state"
)

func TestSimulatorDeterministic(t *testing.T) {
	c := Cohort{Learners: 30, Opportunities: 5, Seed: 11}
	var a, b, d bytes.Buffer
	if _, err := WriteCohort(&a, c); err != nil {
		t.Fatal(err)
	}
	if _, err := WriteCohort(&b, c); err != nil {
		t.Fatal(err)
	}
	c.Seed = 12
	if _, err := WriteCohort(&d, c); err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(a.Bytes(), b.Bytes()) {
		t.Error("same seed, different cohorts")
	}
	if bytes.Equal(a.Bytes(), d.Bytes()) {
		t.Error("different seeds, same cohort")
	}
}

// The written cohort decodes with the native decoder, is in `at` order
// overall and strictly increasing per learner, and every learner has
// exactly the configured opportunities per skill.
func TestSimulatorOutputShape(t *testing.T) {
	c := Cohort{Learners: 200, Opportunities: 12, Seed: 3}
	var buf bytes.Buffer
	n, err := WriteCohort(&buf, c)
	if err != nil {
		t.Fatal(err)
	}
	skills := HarbourLane().Skills
	if want := 200 * 12 * len(skills); n != want {
		t.Fatalf("wrote %d answers, want %d", n, want)
	}
	var dec state.NativeDecoder
	sc := bufio.NewScanner(&buf)
	var prev time.Time
	last := map[string]time.Time{}
	perSkill := map[[2]string]int{}
	ids := map[string]bool{}
	lines := 0
	switchesAcross := 0
	var prevLearner string
	for sc.Scan() {
		lines++
		a, err := dec.Decode(sc.Bytes())
		if err != nil {
			t.Fatalf("line %d: %v", lines, err)
		}
		if a.At.Before(prev) {
			t.Fatalf("line %d: at %v before the previous line's %v", lines, a.At, prev)
		}
		prev = a.At
		if l, ok := last[a.Learner]; ok && !a.At.After(l) {
			t.Fatalf("line %d: learner %s not strictly increasing", lines, a.Learner)
		}
		last[a.Learner] = a.At
		if ids[a.ID] {
			t.Fatalf("line %d: id %s repeated", lines, a.ID)
		}
		ids[a.ID] = true
		if len(a.Skills) != 1 || a.Item == "" {
			t.Fatalf("line %d: skills %v item %q", lines, a.Skills, a.Item)
		}
		perSkill[[2]string{a.Learner, a.Skills[0]}]++
		if a.Learner != prevLearner {
			switchesAcross++
		}
		prevLearner = a.Learner
	}
	if lines != n {
		t.Fatalf("%d lines, want %d", lines, n)
	}
	if len(last) != 200 {
		t.Errorf("%d learners, want 200", len(last))
	}
	for k, v := range perSkill {
		if v != 12 {
			t.Errorf("%s at %s: %d answers, want 12", k[0], k[1], v)
		}
	}
	if len(perSkill) != 200*len(skills) {
		t.Errorf("%d learner-skill pairs, want %d", len(perSkill), 200*len(skills))
	}
	// Interleaved: learners' sessions overlap, so the learner changes
	// often from one line to the next (a file sorted by learner would
	// change 199 times).
	if switchesAcross < n/4 {
		t.Errorf("learner changes %d times in %d lines: cohort not interleaved", switchesAcross, n)
	}
	// Realistic pace: the course spans weeks, not seconds or years.
	span := prev.Sub(Cohort{}.withDefaults().Start)
	if span < 7*24*time.Hour || span > 365*24*time.Hour {
		t.Errorf("cohort spans %v", span)
	}
}

func TestSimulatorRejectsBadCohort(t *testing.T) {
	for _, c := range []Cohort{
		{Learners: -1},
		{Opportunities: -2},
		{Skills: []SkillTruth{{"x", state.Params{Prior: 0.3, Guess: 0.6, Slip: 0.5}}}},
		{Skills: []SkillTruth{{"x", state.DefaultParams()}, {"x", state.DefaultParams()}}},
	} {
		if _, err := NewGenerator(c); err == nil {
			t.Errorf("cohort %+v accepted", c)
		}
	}
	if _, err := PickSkills(HarbourLane(), []string{"trial-balance", ""}, 1); err == nil {
		t.Error("empty skill name accepted")
	}
	got, err := PickSkills(HarbourLane(), []string{"trial-balance", "petty-cash"}, 1)
	if err != nil || len(got) != 2 || got[0].Params != HarbourLane().Skills[1].Params || got[1].Params.Validate("petty-cash") != nil {
		t.Errorf("PickSkills = %+v, %v", got, err)
	}
	// Drawn skills (and the scenario's): a wrong answer never raises a new
	// learner's estimate, i.e. prior ≥ (1−guess)·learn/(1−slip−guess).
	names := []string{"journal-entries", "trial-balance", "bank-reconciliation", "straight-line-depreciation", "sales-tax-invoices", "payroll-deductions"}
	for i := range 200 {
		names = append(names, fmt.Sprintf("drawn-%d", i))
	}
	drawn, err := PickSkills(HarbourLane(), names, 9)
	if err != nil {
		t.Fatal(err)
	}
	for _, s := range drawn {
		p := s.Params
		if level := (1 - p.Guess) * p.Learn / (1 - p.Slip - p.Guess); p.Prior < level || p.Validate(s.Skill) != nil {
			t.Errorf("%s: %v: prior below %.4f", s.Skill, p, level)
		}
	}
}

// The skills of the scenario differ as ARCHITECTURE.md says: one easy, one
// hard with a high slip, one that few learners ever master (under the true
// parameters, fewer than 30% reach the 0.95 mastery threshold within 30
// opportunities, against more than 80% at every other skill; Policy
// default).
func TestHarbourLaneShape(t *testing.T) {
	g, err := NewGenerator(Cohort{Learners: 2000, Opportunities: 30, Seed: 1})
	if err != nil {
		t.Fatal(err)
	}
	truth := g.Truth()
	recs := map[[2]string]*state.Record{}
	for a := range g.All() {
		k := [2]string{a.Learner, a.Skills[0]}
		p, v := truth.For(a.Skills[0])
		r := recs[k]
		if r == nil {
			nr := state.NewRecord(p, v)
			r = &nr
			recs[k] = r
		}
		r.Apply(p, a.Correct, a.At.UnixNano(), state.DefaultPolicy())
	}
	reached := map[string]int{}
	for k, r := range recs {
		if r.EverMastered {
			reached[k[1]]++
		}
	}
	t.Logf("learners who ever reach mastery (of 2000): %v", reached)
	if f := float64(reached["payroll-deductions"]) / 2000; f >= 0.30 {
		t.Errorf("payroll-deductions: %.0f%% reach mastery, want few (< 30%%)", 100*f)
	}
	for _, s := range HarbourLane().Skills {
		if f := float64(reached[s.Skill]) / 2000; s.Skill != "payroll-deductions" && f <= 0.8 {
			t.Errorf("%s: %.0f%% reach mastery, want more than 80%%", s.Skill, 100*f)
		}
	}
	hard := truth.Skills["bank-reconciliation"].Params
	for _, s := range HarbourLane().Skills {
		if s.Skill != "bank-reconciliation" && s.Params.Slip >= hard.Slip {
			t.Errorf("%s slip %v not below bank-reconciliation's %v", s.Skill, s.Params.Slip, hard.Slip)
		}
	}
}

// Parameter recovery, the required check: 2,000 simulated learners × 30
// opportunities at each of the scenario's six skills; every fitted
// parameter within ±0.03 of the truth. Runs the refit pipeline (history,
// per-skill data, parallel fits) without cross-validation.
func TestRefitRecoversHarbourLane(t *testing.T) {
	g, err := NewGenerator(Cohort{Learners: 2000, Opportunities: 30, Seed: 2024})
	if err != nil {
		t.Fatal(err)
	}
	var hb HistoryBuilder
	for a := range g.All() {
		hb.Add(a)
	}
	h := hb.History()
	rep, err := Refit(context.Background(), h, RefitOptions{Folds: 1, Seed: 5})
	if err != nil {
		t.Fatal(err)
	}
	truth := g.Truth()
	for _, sr := range rep.Skills {
		want := truth.Skills[sr.Skill].Params
		t.Logf("%-27s fitted %v\n%27s truth  %v", sr.Skill, sr.Params, "", want)
		if sr.Decision != DecisionFitted {
			t.Errorf("%s: %s (%s)", sr.Skill, sr.Decision, sr.Reason)
			continue
		}
		got := sr.Params
		for _, f := range []struct {
			name      string
			got, want float64
		}{{"prior", got.Prior, want.Prior}, {"learn", got.Learn, want.Learn}, {"guess", got.Guess, want.Guess}, {"slip", got.Slip, want.Slip}, {"forget", got.Forget, want.Forget}} {
			if math.Abs(f.got-f.want) > 0.03 {
				t.Errorf("%s %s = %.4f, truth %.4f: off by more than 0.03", sr.Skill, f.name, f.got, f.want)
			}
		}
	}
	if len(rep.Skills) != 6 {
		t.Errorf("%d skills, want 6", len(rep.Skills))
	}
}
