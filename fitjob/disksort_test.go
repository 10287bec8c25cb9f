package fitjob

import (
	"context"
	"errors"
	"math/rand/v2"
	"os"
	"slices"
	"strconv"
	"testing"
	"time"

	"github.com/attain-dev/attain/state"
)

// sorterAnswers is a cohort with the awkward cases added: repeated ids (of
// the same learner and of another), answers tagged with two skills, and
// answers whose `at` is earlier than the learner's previous one. Learners
// are interleaved at random, as on a topic with several partitions.
func sorterAnswers(t testing.TB) []state.Answer {
	t.Helper()
	g, err := NewGenerator(Cohort{Learners: 800, Opportunities: 12, Seed: 21, Skills: HarbourLane().Skills[:3]})
	if err != nil {
		t.Fatal(err)
	}
	var all []state.Answer
	r := rand.New(rand.NewPCG(4, 4))
	for a := range g.All() {
		all = append(all, a)
		switch r.IntN(20) {
		case 0: // the same answer again
			all = append(all, a)
		case 1: // the same id with another outcome: still a duplicate
			b := a
			b.Correct = !b.Correct
			all = append(all, b)
		case 2: // another learner's id: not a duplicate
			b := a
			b.Learner = "zz-" + a.Learner
			all = append(all, b)
		case 3: // two skills, one of them new
			b := a
			b.ID += "-x"
			b.Skills = []string{a.Skills[0], "petty-cash", a.Skills[0]}
			all = append(all, b)
		case 4: // late: an hour before
			b := a
			b.ID += "-late"
			b.At = a.At.Add(-time.Hour)
			all = append(all, b)
		}
	}
	// Interleave learners differently while keeping each learner's order:
	// a stable sort on a random key per learner would group them; instead
	// shuffle and then restore per-learner order.
	perm := r.Perm(len(all))
	byLearner := map[string][]int{}
	for i, a := range all {
		byLearner[a.Learner] = append(byLearner[a.Learner], i)
	}
	next := map[string]int{}
	out := make([]state.Answer, len(all))
	for k, p := range perm {
		l := all[p].Learner
		out[k] = all[byLearner[l][next[l]]]
		next[l]++
	}
	return out
}

func sortAll(t testing.TB, as []state.Answer, opt SorterOptions) *Sorter {
	t.Helper()
	s, err := NewSorter(opt)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { s.Close() })
	for _, a := range as {
		if err := s.Add(a); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.Finish(context.Background()); err != nil {
		t.Fatal(err)
	}
	return s
}

// The on-disk grouping gives, skill by skill, exactly the sequences the
// in-memory History gives (same learners, same order, same duplicates
// dropped), with a memtable small enough that the answers go through
// several flushed files on disk.
func TestSorterMatchesHistory(t *testing.T) {
	as := sorterAnswers(t)
	var hb HistoryBuilder
	for _, a := range as {
		hb.Add(a)
	}
	h := hb.History()
	s := sortAll(t, as, SorterOptions{Dir: t.TempDir(), MemTableBytes: 1 << 20})
	st := s.Stats()
	if st.Answers != int64(h.Answers()) || st.Duplicates != int64(h.Duplicates) || st.Learners != int64(len(h.Learners)) || st.Skills != len(h.Skills) {
		t.Fatalf("sorter stats %+v; history: %d answers, %d duplicates, %d learners, %d skills", st, h.Answers(), h.Duplicates, len(h.Learners), len(h.Skills))
	}
	if h.Duplicates == 0 || st.MultiSkill == 0 {
		t.Fatalf("the input has %d duplicates and %d multi-skill answers; the test needs both", h.Duplicates, st.MultiSkill)
	}
	m := s.db.Metrics()
	t.Logf("flushes %d, L0 tables %d, disk %d bytes", m.Flush.Count, m.Levels[0].TablesCount, st.DiskBytes)
	if n := m.Levels[0].TablesCount; n < 2 {
		t.Errorf("%d tables on disk; the test means the answers to go through several flushed files", n)
	}
	if st.Added != int64(len(as)) {
		t.Errorf("added %d, want %d", st.Added, len(as))
	}
	var first, last time.Time
	for _, a := range as {
		if first.IsZero() || a.At.Before(first) {
			first = a.At
		}
		if a.At.After(last) {
			last = a.At
		}
	}
	if !st.First.Equal(first) || !st.Last.Equal(last) {
		t.Errorf("range %v – %v, want %v – %v", st.First, st.Last, first, last)
	}
	var skills []string
	err := s.Skills(context.Background(), func(in *SkillInput) error {
		skills = append(skills, in.Skill)
		si := slices.Index(h.Skills, in.Skill)
		want := h.SkillData(si, nil)
		if !slices.Equal(in.Data.Obs, want.Obs) || !slices.Equal(in.Data.Ends, want.Ends) {
			t.Errorf("%s: sorter data differs from History's (%d vs %d answers)", in.Skill, in.Data.Answers(), want.Answers())
		}
		var wantLearners []string
		for li, seq := range h.seqs[si] {
			if len(seq) > 0 {
				wantLearners = append(wantLearners, h.Learners[li])
			}
		}
		if !slices.Equal(in.Learners, wantLearners) {
			t.Errorf("%s: learners differ", in.Skill)
		}
		_, _, c := h.skillCounts(si)
		if in.Correct != c {
			t.Errorf("%s: %d correct, want %d", in.Skill, in.Correct, c)
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if !slices.Equal(skills, h.Skills) {
		t.Errorf("skills %v, want %v", skills, h.Skills)
	}
}

// ArrivalOrder keeps each learner's answers as added, late ones included.
func TestSorterArrivalOrder(t *testing.T) {
	t0 := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC)
	as := []state.Answer{
		{ID: "1", Learner: "x", Skills: []string{"s"}, Correct: true, At: t0.Add(2 * time.Minute)},
		{ID: "2", Learner: "x", Skills: []string{"s"}, Correct: false, At: t0}, // late
		{ID: "3", Learner: "x", Skills: []string{"s"}, Correct: false, At: t0.Add(3 * time.Minute)},
		{ID: "1", Learner: "x", Skills: []string{"s"}, Correct: false, At: t0.Add(4 * time.Minute)}, // repeat
	}
	for _, tc := range []struct {
		arrival bool
		want    string
	}{{true, "100"}, {false, "010"}} {
		s := sortAll(t, as, SorterOptions{Dir: t.TempDir(), ArrivalOrder: tc.arrival})
		var got string
		if err := s.Skills(context.Background(), func(in *SkillInput) error {
			got = seqString(in.Data.Seq(0))
			return nil
		}); err != nil {
			t.Fatal(err)
		}
		if got != tc.want {
			t.Errorf("arrival=%v: %s, want %s", tc.arrival, got, tc.want)
		}
		if st := s.Stats(); st.Duplicates != 1 || st.Answers != 3 {
			t.Errorf("arrival=%v: stats %+v", tc.arrival, st)
		}
	}
}

// Whole sequences (a store's history): a (learner, skill) given twice keeps
// the first; the other's answers count as duplicates.
func TestSorterSequences(t *testing.T) {
	s, err := NewSorter(SorterOptions{Dir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	h := func(bits string) []state.HistoryEntry {
		var out []state.HistoryEntry
		for i, c := range bits {
			out = append(out, state.HistoryEntry{At: int64(1000 + i), Correct: c == '1'})
		}
		return out
	}
	for _, x := range []struct{ l, s, bits string }{
		{"a", "s1", "1101"}, {"a", "s2", "0"}, {"b", "s1", "0011"}, {"b", "s1", "111"}, {"c", "s2", "10"},
	} {
		if err := s.AddSequence(x.l, x.s, h(x.bits)); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.Add(state.Answer{ID: "1", Learner: "a", Skills: []string{"s1"}}); err == nil || !errors.Is(err, ErrSorter) {
		t.Errorf("Add after AddSequence: %v", err)
	}
	if err := s.Finish(context.Background()); err != nil {
		t.Fatal(err)
	}
	got := map[string]string{}
	if err := s.Skills(context.Background(), func(in *SkillInput) error {
		for i, l := range in.Learners {
			got[in.Skill+"/"+l] = seqString(in.Data.Seq(i))
		}
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	want := map[string]string{"s1/a": "1101", "s1/b": "0011", "s2/a": "0", "s2/c": "10"}
	if len(got) != len(want) {
		t.Errorf("got %v, want %v", got, want)
	}
	for k, v := range want {
		if got[k] != v {
			t.Errorf("%s = %q, want %q", k, got[k], v)
		}
	}
	if st := s.Stats(); st.Learners != 3 || st.Answers != 11 || st.Duplicates != 3 || st.Added != 14 {
		t.Errorf("stats %+v, want 3 learners, 11 answers, 3 duplicates, 14 added", st)
	}
}

// Bad names are refused with the field named; the scratch directory is
// gone after Close.
func TestSorterRefusesAndCleansUp(t *testing.T) {
	base := t.TempDir()
	s, err := NewSorter(SorterOptions{Dir: base})
	if err != nil {
		t.Fatal(err)
	}
	for _, a := range []state.Answer{
		{ID: "1", Learner: "a\x00b", Skills: []string{"s"}},
		{ID: "1", Learner: "", Skills: []string{"s"}},
		{ID: "1", Learner: "a", Skills: []string{"s\x00"}},
		{ID: "1", Learner: "a"},
	} {
		if err := s.Add(a); !errors.Is(err, ErrSorter) {
			t.Errorf("Add(%+v) = %v, want ErrSorter", a, err)
		}
	}
	dir := s.Dir()
	if _, err := os.Stat(dir); err != nil {
		t.Fatal(err)
	}
	for i := range 1000 {
		if err := s.Add(state.Answer{ID: strconv.Itoa(i), Learner: "a", Skills: []string{"s"}, Correct: i%2 == 0}); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.Skills(context.Background(), func(*SkillInput) error { return nil }); !errors.Is(err, ErrSorter) {
		t.Errorf("Skills before Finish: %v", err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	if _, err := os.Stat(dir); !os.IsNotExist(err) {
		t.Errorf("scratch directory %s still there after Close (%v)", dir, err)
	}
	if err := s.Close(); err != nil {
		t.Errorf("second Close: %v", err)
	}
}
