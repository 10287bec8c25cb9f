package state

import (
	"errors"
	"fmt"
	"math/rand/v2"
	"reflect"
	"slices"
	"testing"
	"time"

	"github.com/rs/zerolog"
)

// oracle computes by hand, with Record.Apply, what the store should hold:
// records, histories and outputs, following the store's contract (duplicate
// ids within the last `window` of a learner skipped, re-derivation by replay
// under the new parameters, one update per distinct skill).
type oracle struct {
	pol     Policy
	window  int
	recs    map[[2]string]Record
	hist    map[[2]string][]HistoryEntry
	ids     map[string][]string
	lastAt  map[string]int64
	outputs []Output
}

func newOracle(pol Policy, window int) *oracle {
	return &oracle{pol: pol, window: window, recs: map[[2]string]Record{}, hist: map[[2]string][]HistoryEntry{},
		ids: map[string][]string{}, lastAt: map[string]int64{}}
}

type oracleResult struct {
	dup, late bool
	rederived int
	pcorrect  []float64
	outputs   []Output
}

func (o *oracle) apply(a Answer, pf *ParamFile) oracleResult {
	if slices.Contains(o.ids[a.Learner], a.ID) {
		return oracleResult{dup: true}
	}
	at := a.At.UnixNano()
	var res oracleResult
	if last, ok := o.lastAt[a.Learner]; ok && at < last {
		res.late = true
	}
	done := map[string]float64{}
	for _, skill := range a.Skills {
		if pc, ok := done[skill]; ok {
			res.pcorrect = append(res.pcorrect, pc)
			continue
		}
		p, v := pf.For(skill)
		k := [2]string{a.Learner, skill}
		rec, ok := o.recs[k]
		if !ok {
			rec = NewRecord(p, v)
		} else if rec.ParamsVersion != v {
			rec = NewRecord(p, v)
			for _, h := range o.hist[k] {
				rec.Apply(p, h.Correct, h.At, o.pol)
			}
			res.rederived++
		}
		out := rec.Apply(p, a.Correct, at, o.pol)
		o.recs[k] = rec
		o.hist[k] = append(o.hist[k], HistoryEntry{At: at, Correct: a.Correct})
		done[skill] = out.PCorrect
		res.pcorrect = append(res.pcorrect, out.PCorrect)
		for _, kind := range []Kind{KindReached, KindStuck} {
			if (kind == KindReached && out.Reached) || (kind == KindStuck && out.Stuck) {
				res.outputs = append(res.outputs, Output{Kind: kind, Learner: a.Learner, Skill: skill, Mastery: rec.Mastery,
					Opportunities: rec.Opportunities, ParamsVersion: rec.ParamsVersion, AnswerID: a.ID, At: a.At,
					ID: EventID(a.Learner, skill, kind, rec.Opportunities)})
			}
		}
	}
	ids := append(o.ids[a.Learner], a.ID)
	if len(ids) > o.window {
		ids = ids[len(ids)-o.window:]
	}
	o.ids[a.Learner] = ids
	if last, ok := o.lastAt[a.Learner]; !ok || at > last {
		o.lastAt[a.Learner] = at
	}
	o.outputs = append(o.outputs, res.outputs...)
	return res
}

var skillNames = []string{"journal-entries", "trial-balance", "bank-reconciliation", "straight-line-depreciation", "sales-tax-invoices", "payroll-deductions"}

// answers generates n answers of `learners` learners over the demo skills,
// some items tagged with two skills (once with the same skill twice), times
// mostly increasing with some late ones.
func answers(seed uint64, n, learners int) []Answer {
	r := rand.New(rand.NewPCG(seed, 7))
	base := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC)
	out := make([]Answer, n)
	for i := range out {
		sk := []string{skillNames[r.IntN(len(skillNames))]}
		switch r.IntN(10) {
		case 0:
			sk = append(sk, skillNames[r.IntN(len(skillNames))])
		case 1:
			sk = append(sk, sk[0])
		}
		at := base.Add(time.Duration(i) * time.Minute)
		if r.IntN(20) == 0 {
			at = at.Add(-3 * time.Hour)
		}
		out[i] = Answer{
			ID:      fmt.Sprintf("ans-%d", i),
			Learner: fmt.Sprintf("learner-%03d", r.IntN(learners)),
			Skills:  sk,
			Correct: r.Float64() < 0.65,
			At:      at,
		}
	}
	return out
}

func openTestStore(t testing.TB, dir string, opt StoreOptions) *Store {
	t.Helper()
	s, err := OpenStore(dir, opt)
	if err != nil {
		t.Fatalf("OpenStore: %v", err)
	}
	// The tests commit fast and many times: without the minimum interval
	// they see a background checkpoint every checkpointCommits commits.
	s.ckptInterval = 0
	return s
}

func mustPartition(t testing.TB, s *Store, p int32) *Partition {
	t.Helper()
	pt, err := s.Partition(p)
	if err != nil {
		t.Fatalf("Partition(%d): %v", p, err)
	}
	return pt
}

func mustCommit(t testing.TB, pt *Partition, sync bool) {
	t.Helper()
	if err := pt.Commit(sync); err != nil {
		t.Fatalf("Commit: %v", err)
	}
}

// checkAgainst compares every record and history of the oracle with the
// store's committed state.
func checkAgainst(t *testing.T, s *Store, o *oracle) {
	t.Helper()
	byLearner := map[string]map[string]Record{}
	for k, r := range o.recs {
		if byLearner[k[0]] == nil {
			byLearner[k[0]] = map[string]Record{}
		}
		byLearner[k[0]][k[1]] = r
	}
	for l, want := range byLearner {
		got, ok, err := s.Learner(l)
		if err != nil || !ok {
			t.Fatalf("Learner(%q) = ok %v, err %v", l, ok, err)
		}
		if !reflect.DeepEqual(got, want) {
			t.Fatalf("Learner(%q):\n got %+v\nwant %+v", l, got, want)
		}
	}
	for k, want := range o.hist {
		got, err := s.History(k[0], k[1])
		if err != nil {
			t.Fatal(err)
		}
		if !reflect.DeepEqual(got, want) {
			t.Fatalf("History(%q, %q):\n got %v\nwant %v", k[0], k[1], got, want)
		}
	}
	if got := s.Stats().Records; got != int64(len(o.recs)) {
		t.Errorf("Stats().Records = %d, want %d", got, len(o.recs))
	}
}

func TestApplyMatchesRecordApplyByHand(t *testing.T) {
	s := openTestStore(t, t.TempDir(), StoreOptions{CacheRecords: 16}) // small cache: exercise Pebble reads too
	defer s.Close()
	pt := mustPartition(t, s, 2)
	pf := NewParamFile()
	pf.Skills["trial-balance"] = SkillParams{Params: Params{Prior: 0.1, Learn: 0.3, Guess: 0.25, Slip: 0.05}}
	pf.Skills["payroll-deductions"] = SkillParams{Params: Params{Prior: 0.05, Learn: 0.02, Guess: 0.3, Slip: 0.2, Forget: 0.01}}
	o := newOracle(DefaultPolicy(), DefaultDedupeWindow)
	as := answers(1, 3000, 40)
	var outputs []Output
	for i, a := range as {
		res, err := pt.Apply(a, int64(i), pf)
		if err != nil {
			t.Fatalf("Apply #%d: %v", i, err)
		}
		want := o.apply(a, pf)
		if res.Duplicate || res.Late != want.late || res.Rederived != 0 {
			t.Fatalf("answer %d: result %+v, want late=%v", i, res, want.late)
		}
		if !reflect.DeepEqual(res.PCorrect, want.pcorrect) {
			t.Fatalf("answer %d: PCorrect %v, want %v", i, res.PCorrect, want.pcorrect)
		}
		if !reflect.DeepEqual(res.Outputs, want.outputs) {
			t.Fatalf("answer %d: Outputs %+v, want %+v", i, res.Outputs, want.outputs)
		}
		outputs = append(outputs, res.Outputs...)
		if i%97 == 96 { // commits at odd points, some records staged across several answers
			mustCommit(t, pt, i%2 == 0)
		}
	}
	mustCommit(t, pt, false)
	checkAgainst(t, s, o)
	if len(outputs) == 0 {
		t.Fatal("the sequence produced no reached/stuck outputs; the test would not check the outbox")
	}
	st := s.Stats()
	if st.Late == 0 || st.Applied != int64(len(as)) {
		t.Errorf("stats %+v: want some late answers and %d applied", st, len(as))
	}
	// The outbox holds exactly the outputs, in order.
	ents, err := s.Outbox(2, 0, 0)
	if err != nil {
		t.Fatal(err)
	}
	if len(ents) != len(outputs) {
		t.Fatalf("outbox has %d entries, want %d", len(ents), len(outputs))
	}
	for i, e := range ents {
		if e.Seq != uint64(i+1) || e.Partition != 2 || e.DeadLetter != nil || e.Output == nil {
			t.Fatalf("entry %d: %+v", i, e)
		}
		got, want := *e.Output, outputs[i]
		if !got.At.Equal(want.At) {
			t.Fatalf("entry %d: At %v, want %v", i, got.At, want.At)
		}
		got.At = want.At
		if got != want {
			t.Fatalf("entry %d:\n got %+v\nwant %+v", i, got, want)
		}
	}
	if s.OutboxDepth() != int64(len(outputs)) {
		t.Errorf("OutboxDepth = %d, want %d", s.OutboxDepth(), len(outputs))
	}
}

func TestCloseWithoutCommitThenReplay(t *testing.T) {
	dir := t.TempDir()
	pf := NewParamFile()
	as := answers(2, 400, 15)
	s := openTestStore(t, dir, StoreOptions{})
	pt := mustPartition(t, s, 0)
	if _, ok := pt.NextOffset(); ok {
		t.Fatal("fresh partition has a stored offset")
	}
	for i, a := range as[:250] {
		if _, err := pt.Apply(a, int64(i), pf); err != nil {
			t.Fatal(err)
		}
		if i == 199 {
			mustCommit(t, pt, false)
		}
	}
	if pt.Pending() != 50 {
		t.Errorf("Pending = %d, want 50", pt.Pending())
	}
	if err := s.Close(); err != nil { // the 50 staged answers are dropped
		t.Fatal(err)
	}
	if _, err := pt.Apply(as[250], 250, pf); !errors.Is(err, ErrStoreClosed) {
		t.Fatalf("Apply after Close: %v, want ErrStoreClosed", err)
	}

	s = openTestStore(t, dir, StoreOptions{})
	defer s.Close()
	o := newOracle(DefaultPolicy(), DefaultDedupeWindow)
	for _, a := range as[:200] {
		o.apply(a, pf)
	}
	checkAgainst(t, s, o)
	pt = mustPartition(t, s, 0)
	next, ok := pt.NextOffset()
	if !ok || next != 200 {
		t.Fatalf("NextOffset = %d, %v; want 200, true", next, ok)
	}
	// A consumer that replays from the start (or from an older group offset)
	// changes nothing for the offsets already applied.
	for i, a := range as {
		res, err := pt.Apply(a, int64(i), pf)
		if err != nil {
			t.Fatal(err)
		}
		if i < 200 != res.Replayed {
			t.Fatalf("offset %d: Replayed = %v", i, res.Replayed)
		}
		if i >= 200 {
			o.apply(a, pf)
		}
	}
	mustCommit(t, pt, true)
	checkAgainst(t, s, o)
	if got := s.Stats().Replayed; got != 200 {
		t.Errorf("Replayed = %d, want 200", got)
	}
}

func TestOffsetRuleAndPending(t *testing.T) {
	s := openTestStore(t, t.TempDir(), StoreOptions{})
	defer s.Close()
	pt := mustPartition(t, s, 1)
	pf := NewParamFile()
	a := Answer{ID: "x1", Learner: "ada", Skills: []string{"trial-balance"}, Correct: true, At: time.Unix(1_700_000_000, 0)}
	if _, err := pt.Apply(a, 10, pf); err != nil {
		t.Fatal(err)
	}
	// Same or lower offsets: no-ops, whatever the call.
	a2 := a
	a2.ID = "x2"
	if res, err := pt.Apply(a2, 10, pf); err != nil || !res.Replayed {
		t.Fatalf("Apply at the staged offset: %+v, %v", res, err)
	}
	if err := pt.DeadLetter(DeadLetter{Reason: "r"}, 9); err != nil {
		t.Fatal(err)
	}
	if err := pt.Skip(3); err != nil {
		t.Fatal(err)
	}
	if pt.Pending() != 1 {
		t.Fatalf("Pending = %d, want 1", pt.Pending())
	}
	if err := pt.Skip(11); err != nil {
		t.Fatal(err)
	}
	if err := pt.DeadLetter(DeadLetter{Reason: "bad", Field: "at", Raw: []byte("{}"), Offset: 14}, 14); err != nil {
		t.Fatal(err)
	}
	if pt.Pending() != 3 {
		t.Fatalf("Pending = %d, want 3", pt.Pending())
	}
	mustCommit(t, pt, false)
	if pt.Pending() != 0 {
		t.Fatalf("Pending after Commit = %d", pt.Pending())
	}
	if next, _ := pt.NextOffset(); next != 15 {
		t.Fatalf("NextOffset = %d, want 15", next)
	}
	if res, err := pt.Apply(a2, 14, pf); err != nil || !res.Replayed {
		t.Fatalf("Apply at the stored offset: %+v, %v", res, err)
	}
	rs, _, _ := s.Learner("ada")
	if rs["trial-balance"].Opportunities != 1 {
		t.Fatalf("record %+v: want exactly one answer applied", rs["trial-balance"])
	}
	// Commit with nothing staged writes nothing and succeeds.
	mustCommit(t, pt, false)
	ents, _ := s.Outbox(1, 0, 0)
	if len(ents) != 1 || ents[0].DeadLetter == nil || ents[0].DeadLetter.Offset != 14 || string(ents[0].DeadLetter.Raw) != "{}" {
		t.Fatalf("outbox %+v: want the one dead letter", ents)
	}
}

func TestDuplicateIDSkipped(t *testing.T) {
	dir := t.TempDir()
	s := openTestStore(t, dir, StoreOptions{DedupeWindow: 4})
	pt := mustPartition(t, s, 0)
	pf := NewParamFile()
	at := time.Unix(1_700_000_000, 0)
	ans := func(id string) Answer {
		at = at.Add(time.Minute)
		return Answer{ID: id, Learner: "bo", Skills: []string{"bank-reconciliation"}, Correct: true, At: at}
	}
	off := int64(0)
	apply := func(a Answer) ApplyResult {
		t.Helper()
		res, err := pt.Apply(a, off, pf)
		off++
		if err != nil {
			t.Fatal(err)
		}
		return res
	}
	apply(ans("a"))
	if res := apply(ans("a")); !res.Duplicate { // staged window
		t.Fatal("second 'a' in the same batch was not a duplicate")
	}
	mustCommit(t, pt, false)
	if res := apply(ans("a")); !res.Duplicate { // committed window (cache)
		t.Fatal("'a' after commit was not a duplicate")
	}
	mustCommit(t, pt, false)
	s.Close()
	s = openTestStore(t, dir, StoreOptions{DedupeWindow: 4})
	defer s.Close()
	pt = mustPartition(t, s, 0)
	if res := apply(ans("a")); !res.Duplicate { // stored window
		t.Fatal("'a' after reopen was not a duplicate")
	}
	for _, id := range []string{"b", "c", "d", "e"} { // push "a" out of the window of 4
		if res := apply(ans(id)); res.Duplicate {
			t.Fatalf("%q flagged duplicate", id)
		}
	}
	if res := apply(ans("a")); res.Duplicate {
		t.Fatal("'a' still remembered beyond the window of 4")
	}
	mustCommit(t, pt, false)
	rs, _, _ := s.Learner("bo")
	if got := rs["bank-reconciliation"].Opportunities; got != 6 {
		t.Fatalf("opportunities = %d, want 6 (a, b, c, d, e, a again)", got)
	}
	if got := s.Stats().Duplicates; got != 1 { // counters are per open store
		t.Errorf("Duplicates = %d, want 1", got)
	}
}

func TestLateAnswerCounted(t *testing.T) {
	s := openTestStore(t, t.TempDir(), StoreOptions{})
	defer s.Close()
	pt := mustPartition(t, s, 0)
	pf := NewParamFile()
	t0 := time.Unix(1_700_000_000, 0)
	seq := []struct {
		at   time.Duration
		late bool
	}{{0, false}, {time.Hour, false}, {30 * time.Minute, true}, {2 * time.Hour, false}, {2 * time.Hour, false}, {time.Hour, true}}
	for i, x := range seq {
		skill := skillNames[i%2] // lateness is per learner, across skills
		res, err := pt.Apply(Answer{ID: fmt.Sprint(i), Learner: "cy", Skills: []string{skill}, Correct: true, At: t0.Add(x.at)}, int64(i), pf)
		if err != nil {
			t.Fatal(err)
		}
		if res.Late != x.late {
			t.Errorf("answer %d at +%v: Late = %v, want %v", i, x.at, res.Late, x.late)
		}
		if i == 2 {
			mustCommit(t, pt, false)
		}
	}
	mustCommit(t, pt, false)
	if got := s.Stats().Late; got != 2 {
		t.Errorf("Stats().Late = %d, want 2", got)
	}
	h, _ := s.History("cy", skillNames[0])
	if len(h) != 3 || h[1].At != t0.Add(30*time.Minute).UnixNano() { // applied in arrival order
		t.Errorf("history %v: want the late answer second, in arrival order", h)
	}
}

func TestRederiveAfterParamsVersionBump(t *testing.T) {
	s := openTestStore(t, t.TempDir(), StoreOptions{})
	defer s.Close()
	pt := mustPartition(t, s, 0)
	v1 := NewParamFile()
	as := answers(3, 600, 10)
	for i, a := range as[:400] {
		if _, err := pt.Apply(a, int64(i), v1); err != nil {
			t.Fatal(err)
		}
	}
	mustCommit(t, pt, false)
	v2 := &ParamFile{Version: 2, Default: Params{Prior: 0.2, Learn: 0.25, Guess: 0.15, Slip: 0.12}, Skills: map[string]SkillParams{
		// unchanged since version 1: records of this skill keep version 1 and are not re-derived
		"journal-entries": {Params: v1.Default, Version: 1},
	}}
	rederived := 0
	for i, a := range as[400:500] {
		res, err := pt.Apply(a, int64(400+i), v2)
		if err != nil {
			t.Fatal(err)
		}
		rederived += res.Rederived
		if i == 50 {
			mustCommit(t, pt, false)
		}
	}
	// A third set in the middle of a batch: records staged under v2 in this
	// batch are re-derived from committed + staged history.
	v3 := &ParamFile{Version: 3, Default: Params{Prior: 0.4, Learn: 0.05, Guess: 0.3, Slip: 0.05, Forget: 0.02}, Skills: map[string]SkillParams{
		"journal-entries": {Params: v1.Default, Version: 1},
	}}
	for i, a := range as[500:] {
		res, err := pt.Apply(a, int64(500+i), v3)
		if err != nil {
			t.Fatal(err)
		}
		rederived += res.Rederived
	}
	mustCommit(t, pt, false)
	if rederived == 0 {
		t.Fatal("no record was re-derived")
	}
	if got := s.Stats().Rederived; got != int64(rederived) {
		t.Errorf("Stats().Rederived = %d, sum of results %d", got, rederived)
	}
	// Every record equals a fresh pass over its whole history under the set
	// it now names (v3 for those touched after the swap to v3, …).
	err := s.ScanHistory(func(learner, skill string, h []HistoryEntry) error {
		rs, _, err := s.Learner(learner)
		if err != nil {
			return err
		}
		got := rs[skill]
		var pf *ParamFile
		switch got.ParamsVersion {
		case 1:
			pf = v1
		case 2:
			pf = v2
		case 3:
			pf = v3
		}
		p, v := pf.For(skill)
		want := NewRecord(p, v)
		for _, e := range h {
			want.Apply(p, e.Correct, e.At, DefaultPolicy())
		}
		if got != want {
			return fmt.Errorf("%s/%s: got %+v, want fresh pass %+v", learner, skill, got, want)
		}
		if skill == "journal-entries" && got.ParamsVersion != 1 {
			return fmt.Errorf("%s/%s: version %d, want 1 (its parameters did not change)", learner, skill, got.ParamsVersion)
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	// And the store equals the oracle run over the same calls.
	o := newOracle(DefaultPolicy(), DefaultDedupeWindow)
	for i, a := range as {
		pf := v1
		if i >= 500 {
			pf = v3
		} else if i >= 400 {
			pf = v2
		}
		o.apply(a, pf)
	}
	checkAgainst(t, s, o)
}

func TestOutboxOrderDeleteAndDepthAfterReopen(t *testing.T) {
	dir := t.TempDir()
	s := openTestStore(t, dir, StoreOptions{})
	pf := NewParamFile()
	at := time.Date(2025, 10, 1, 9, 0, 0, 123, time.FixedZone("x", 3600))
	for _, p := range []int32{0, 5} {
		pt := mustPartition(t, s, p)
		for i := 0; i < 30; i++ {
			if i%3 == 0 {
				dl := DeadLetter{Raw: []byte(fmt.Sprintf("raw-%d", i)), Topic: "answers", Partition: p, Offset: int64(i), Reason: "not valid JSON", At: at}
				if err := pt.DeadLetter(dl, int64(i)); err != nil {
					t.Fatal(err)
				}
				continue
			}
			// One learner answering correctly: reaches mastery at some point.
			a := Answer{ID: fmt.Sprint(i), Learner: fmt.Sprintf("l%d", p), Skills: []string{"trial-balance"}, Correct: true, At: at.Add(time.Duration(i) * time.Second)}
			if _, err := pt.Apply(a, int64(i), pf); err != nil {
				t.Fatal(err)
			}
		}
		mustCommit(t, pt, false)
		pt.Release()
	}
	ents, err := s.Outbox(5, 0, 0)
	if err != nil {
		t.Fatal(err)
	}
	if len(ents) != 11 { // 10 dead letters + 1 reached
		t.Fatalf("partition 5 outbox has %d entries, want 11: %+v", len(ents), ents)
	}
	for i, e := range ents {
		if e.Seq != uint64(i+1) {
			t.Fatalf("entry %d has seq %d", i, e.Seq)
		}
		if (e.Output == nil) == (e.DeadLetter == nil) {
			t.Fatalf("entry %d: exactly one of Output and DeadLetter must be set: %+v", i, e)
		}
	}
	first := ents[0].DeadLetter
	if first == nil || string(first.Raw) != "raw-0" || first.Key != nil || first.Topic != "answers" || first.Partition != 5 || !first.At.Equal(at) {
		t.Fatalf("first dead letter %+v", first)
	}
	page, _ := s.Outbox(5, 3, 2)
	if len(page) != 2 || page[0].Seq != 4 || page[1].Seq != 5 {
		t.Fatalf("Outbox(5, 3, 2) = %+v", page)
	}
	if d := s.OutboxDepth(); d != 22 {
		t.Fatalf("depth %d, want 22", d)
	}
	if err := s.DeleteOutbox(5, []uint64{1, 2, 2, 99}); err != nil {
		t.Fatal(err)
	}
	if err := s.DeleteOutbox(5, []uint64{1}); err != nil { // already gone: ignored
		t.Fatal(err)
	}
	if d := s.OutboxDepth(); d != 20 {
		t.Fatalf("depth after deleting 2 = %d, want 20", d)
	}
	rest, _ := s.Outbox(5, 0, 0)
	if len(rest) != 9 || rest[0].Seq != 3 {
		t.Fatalf("after delete: %d entries from seq %d", len(rest), rest[0].Seq)
	}
	s.Close()

	s = openTestStore(t, dir, StoreOptions{})
	defer s.Close()
	if d := s.OutboxDepth(); d != 20 {
		t.Fatalf("depth after reopen = %d, want 20", d)
	}
	// Empty partition 0's outbox; new entries continue the sequence.
	var seqs []uint64
	all, _ := s.Outbox(0, 0, 0)
	for _, e := range all {
		seqs = append(seqs, e.Seq)
	}
	if err := s.DeleteOutbox(0, seqs); err != nil {
		t.Fatal(err)
	}
	pt := mustPartition(t, s, 0)
	if err := pt.DeadLetter(DeadLetter{Reason: "again"}, 100); err != nil {
		t.Fatal(err)
	}
	mustCommit(t, pt, false)
	all, _ = s.Outbox(0, 0, 0)
	if len(all) != 1 || all[0].Seq != 12 {
		t.Fatalf("after emptying and one more entry: %+v, want one entry with seq 12", all)
	}
	if d := s.OutboxDepth(); d != 10 {
		t.Fatalf("depth = %d, want 10", d)
	}
}

func TestCacheBoundAndRelease(t *testing.T) {
	s := openTestStore(t, t.TempDir(), StoreOptions{CacheRecords: 10})
	defer s.Close()
	pt := mustPartition(t, s, 0)
	pf := NewParamFile()
	at := time.Unix(1_700_000_000, 0)
	off := int64(0)
	apply := func(learner string) {
		t.Helper()
		off++
		if _, err := pt.Apply(Answer{ID: fmt.Sprint(off), Learner: learner, Skills: []string{"trial-balance"}, Correct: true, At: at}, off, pf); err != nil {
			t.Fatal(err)
		}
	}
	for i := 0; i < 100; i++ {
		apply(fmt.Sprint("l", i))
		mustCommit(t, pt, false)
	}
	st := s.Stats()
	if st.CachedRecords != 10 {
		t.Fatalf("cache holds %d records, bound 10", st.CachedRecords)
	}
	// A hot learner: hits, no misses.
	h0, m0 := st.CacheHits, st.CacheMisses
	for i := 0; i < 5; i++ {
		apply("l99")
		mustCommit(t, pt, false)
	}
	st = s.Stats()
	if st.CacheHits-h0 != 5 || st.CacheMisses != m0 {
		t.Fatalf("hot learner: %d hits, %d misses; want 5, 0", st.CacheHits-h0, st.CacheMisses-m0)
	}
	// Staged state does not outlive Release: it drops the partition's entries.
	apply("l99")
	pt.Release()
	if _, err := pt.Apply(Answer{ID: "z", Learner: "l99", Skills: []string{"trial-balance"}, At: at}, 1000, pf); !errors.Is(err, ErrPartitionReleased) {
		t.Fatalf("Apply after Release: %v", err)
	}
	pt = mustPartition(t, s, 0)
	m1 := s.Stats().CacheMisses
	apply("l99")
	if s.Stats().CacheMisses != m1+1 {
		t.Fatal("after Release the record was still served from the cache")
	}
	mustCommit(t, pt, false)
	rs, _, _ := s.Learner("l99")
	if got := rs["trial-balance"].Opportunities; got != 7 { // 1 + 5 + (released one dropped) + 1
		t.Fatalf("opportunities %d, want 7", got)
	}
}

func TestNewerHandleFencesOlder(t *testing.T) {
	s := openTestStore(t, t.TempDir(), StoreOptions{})
	defer s.Close()
	pf := NewParamFile()
	a := Answer{ID: "1", Learner: "di", Skills: []string{"trial-balance"}, Correct: true, At: time.Unix(1_700_000_000, 0)}
	old := mustPartition(t, s, 3)
	if _, err := old.Apply(a, 1, pf); err != nil {
		t.Fatal(err)
	}
	cur := mustPartition(t, s, 3)
	if err := old.Commit(false); !errors.Is(err, ErrPartitionReleased) {
		t.Fatalf("Commit of a fenced handle: %v, want ErrPartitionReleased", err)
	}
	if _, ok, _ := s.Learner("di"); ok {
		t.Fatal("a fenced handle's staging reached the store")
	}
	if _, err := cur.Apply(a, 1, pf); err != nil {
		t.Fatal(err)
	}
	mustCommit(t, cur, false)
	if _, ok, _ := s.Learner("di"); !ok {
		t.Fatal("the current handle's commit is missing")
	}
}

func TestLearnerAcrossPartitions(t *testing.T) {
	dir := t.TempDir()
	s := openTestStore(t, dir, StoreOptions{})
	pf := NewParamFile()
	t0 := time.Unix(1_700_000_000, 0)
	put := func(p int32, learner, skill string, at time.Time, n int) {
		pt := mustPartition(t, s, p)
		next, _ := pt.NextOffset()
		for i := 0; i < n; i++ {
			if _, err := pt.Apply(Answer{ID: fmt.Sprint(p, skill, i), Learner: learner, Skills: []string{skill}, Correct: true, At: at}, next+int64(i), pf); err != nil {
				t.Fatal(err)
			}
		}
		mustCommit(t, pt, false)
		pt.Release()
	}
	put(0, "eve", "trial-balance", t0, 2)
	put(7, "eve", "payroll-deductions", t0, 3)
	put(7, "eve", "trial-balance", t0.Add(time.Hour), 5) // repartitioned: the later record wins
	put(7, "ev", "trial-balance", t0, 1)                 // a learner whose name is a prefix
	put(3, "eve2", "trial-balance", t0, 1)
	s.Close()
	s = openTestStore(t, dir, StoreOptions{})
	defer s.Close()
	ps, _ := s.Partitions()
	if !reflect.DeepEqual(ps, []int32{0, 3, 7}) {
		t.Fatalf("Partitions = %v", ps)
	}
	rs, ok, err := s.Learner("eve")
	if err != nil || !ok {
		t.Fatal(ok, err)
	}
	if len(rs) != 2 || rs["trial-balance"].Opportunities != 5 || rs["payroll-deductions"].Opportunities != 3 {
		t.Fatalf("Learner(eve) = %+v", rs)
	}
	if rs, ok, _ := s.Learner("ev"); !ok || len(rs) != 1 {
		t.Fatalf("Learner(ev) = %+v", rs)
	}
	for _, l := range []string{"nobody", "", "e\x00ve"} {
		if _, ok, err := s.Learner(l); ok || err != nil {
			t.Fatalf("Learner(%q) = ok %v, err %v", l, ok, err)
		}
	}
}

func TestScanHistoryAcrossPartitionsIsASnapshot(t *testing.T) {
	s := openTestStore(t, t.TempDir(), StoreOptions{})
	defer s.Close()
	pf := NewParamFile()
	o := newOracle(DefaultPolicy(), DefaultDedupeWindow)
	as := answers(4, 2000, 60)
	pts := map[int32]*Partition{}
	for i, a := range as {
		p := int32(len(a.Learner)+int(a.Learner[len(a.Learner)-1])) % 4 * 3 // partitions 0, 3, 6, 9 by learner
		if pts[p] == nil {
			pts[p] = mustPartition(t, s, p)
		}
		if _, err := pts[p].Apply(a, int64(i), pf); err != nil {
			t.Fatal(err)
		}
		o.apply(a, pf)
	}
	for _, pt := range pts {
		mustCommit(t, pt, false)
	}
	seen := map[[2]string][]HistoryEntry{}
	calls := 0
	err := s.ScanHistory(func(learner, skill string, h []HistoryEntry) error {
		k := [2]string{learner, skill}
		if _, dup := seen[k]; dup {
			return fmt.Errorf("%v delivered twice", k)
		}
		seen[k] = h
		calls++
		if calls == 1 { // commit more history while the scan runs: not in the view
			for p, pt := range pts {
				next, _ := pt.NextOffset()
				if _, err := pt.Apply(Answer{ID: "late-" + fmt.Sprint(p), Learner: learner, Skills: []string{skill}, At: time.Unix(1_800_000_000, 0)}, next+10_000, pf); err != nil {
					return err
				}
				if err := pt.Commit(false); err != nil {
					return err
				}
			}
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if len(seen) != len(o.hist) {
		t.Fatalf("scan delivered %d learner-skills, want %d", len(seen), len(o.hist))
	}
	for k, want := range o.hist {
		if !reflect.DeepEqual(seen[k], want) {
			t.Fatalf("%v: %v, want %v", k, seen[k], want)
		}
	}
	stop := errors.New("stop")
	n := 0
	if err := s.ScanHistory(func(string, string, []HistoryEntry) error { n++; return stop }); !errors.Is(err, stop) || n != 1 {
		t.Fatalf("ScanHistory with a failing callback: %v after %d calls", err, n)
	}
}

func TestSchemaCheckedAtOpen(t *testing.T) {
	dir := t.TempDir()
	s := openTestStore(t, dir, StoreOptions{})
	// Simulate a newer build's schema.
	if err := s.db.Set(metaKey("schema"), []byte{metaV1, storeSchema + 1}, nil); err != nil {
		t.Fatal(err)
	}
	s.Close()
	_, err := OpenStore(dir, StoreOptions{Logger: zerolog.Nop()})
	if !errors.Is(err, ErrStoreSchema) {
		t.Fatalf("OpenStore of a newer schema: %v, want ErrStoreSchema", err)
	}
	t.Log(err)
}

func TestBadOptionsAndAnswers(t *testing.T) {
	_, err := OpenStore(t.TempDir(), StoreOptions{CacheRecords: -1, DedupeWindow: -2, Policy: Policy{Threshold: 1.5}})
	if !errors.Is(err, ErrInvalidStoreOptions) {
		t.Fatalf("bad options: %v", err)
	}
	s := openTestStore(t, t.TempDir(), StoreOptions{})
	defer s.Close()
	pt := mustPartition(t, s, 0)
	pf := NewParamFile()
	at := time.Unix(1_700_000_000, 0)
	for _, c := range []struct {
		a     Answer
		field string
	}{
		{Answer{Learner: "x", Skills: []string{"s"}, At: at}, "id"},
		{Answer{ID: "1", Learner: "x\x00y", Skills: []string{"s"}, At: at}, "learner"},
		{Answer{ID: "1", Learner: "x", At: at}, "skills"},
		{Answer{ID: "1", Learner: "x", Skills: []string{"s\x00"}, At: at}, "skills"},
		{Answer{ID: "1", Learner: "x", Skills: []string{"s"}, At: time.Date(3000, 1, 1, 0, 0, 0, 0, time.UTC)}, "at"},
	} {
		_, err := pt.Apply(c.a, 1, pf)
		var ae *AnswerError
		if !errors.As(err, &ae) || ae.Field != c.field || !errors.Is(err, ErrBadAnswer) {
			t.Errorf("Apply(%+v): %v, want an AnswerError on %q", c.a, err, c.field)
		}
	}
	if pt.Pending() != 0 {
		t.Fatalf("rejected answers staged %d offsets", pt.Pending())
	}
	if _, err := s.Partition(-1); err == nil {
		t.Error("Partition(-1) accepted")
	}
}

func TestConcurrentReadersWhilePartitionsCommit(t *testing.T) {
	s := openTestStore(t, t.TempDir(), StoreOptions{CacheRecords: 100})
	pf := NewParamFile()
	as := answers(6, 4000, 30)
	done := make(chan struct{})
	stop := make(chan struct{})
	errc := make(chan error, 3)
	rerr := make(chan error, 1)
	for g := 0; g < 2; g++ { // two partitions, one goroutine each
		go func(p int32) {
			pt, err := s.Partition(p)
			if err != nil {
				errc <- err
				return
			}
			for i, a := range as {
				a.Learner = fmt.Sprint(a.Learner, "-p", p)
				if _, err := pt.Apply(a, int64(i), pf); err != nil {
					errc <- err
					return
				}
				if i%250 == 0 {
					if err := pt.Commit(false); err != nil {
						errc <- err
						return
					}
				}
			}
			errc <- pt.Commit(false)
		}(int32(g))
	}
	go func() { // a reader on every read API until the writers finish
		defer close(done)
		for {
			if _, _, err := s.Learner("learner-001-p0"); err != nil {
				rerr <- err
				return
			}
			if err := s.ScanHistory(func(string, string, []HistoryEntry) error { return nil }); err != nil {
				rerr <- err
				return
			}
			if ents, err := s.Outbox(1, 0, 10); err != nil {
				rerr <- err
				return
			} else if len(ents) > 0 {
				if err := s.DeleteOutbox(1, []uint64{ents[0].Seq}); err != nil {
					rerr <- err
					return
				}
			}
			_ = s.Stats()
			select {
			case <-stop:
				return
			case <-time.After(time.Millisecond):
			}
		}
	}()
	for i := 0; i < 2; i++ {
		if err := <-errc; err != nil {
			close(stop)
			<-done
			t.Fatal(err)
		}
	}
	close(stop)
	<-done
	select {
	case err := <-rerr:
		t.Fatal(err)
	default:
	}
	ents, _ := s.Outbox(1, 0, 0)
	if s.OutboxDepth() != int64(len(ents)+mustOutboxLen(t, s, 0)) {
		t.Errorf("depth %d, entries %d + %d", s.OutboxDepth(), len(ents), mustOutboxLen(t, s, 0))
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	// After Close: clear errors, no panics.
	if _, err := s.Partition(0); !errors.Is(err, ErrStoreClosed) {
		t.Errorf("Partition after Close: %v", err)
	}
	if _, _, err := s.Learner("x"); !errors.Is(err, ErrStoreClosed) {
		t.Errorf("Learner after Close: %v", err)
	}
	if err := s.ScanHistory(nil); !errors.Is(err, ErrStoreClosed) {
		t.Errorf("ScanHistory after Close: %v", err)
	}
	if err := s.Close(); err != nil {
		t.Errorf("second Close: %v", err)
	}
}

func mustOutboxLen(t *testing.T, s *Store, p int32) int {
	ents, err := s.Outbox(p, 0, 0)
	if err != nil {
		t.Fatal(err)
	}
	return len(ents)
}

func TestReleaseAndCommitAfterClose(t *testing.T) {
	s := openTestStore(t, t.TempDir(), StoreOptions{})
	pt := mustPartition(t, s, 0)
	if err := pt.Skip(1); err != nil {
		t.Fatal(err)
	}
	s.Close()
	if err := pt.Commit(true); !errors.Is(err, ErrStoreClosed) {
		t.Fatalf("Commit after Close: %v", err)
	}
	pt.Release() // must not panic
	pt.Release()
}
