package state

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"math"
	"math/rand/v2"
	"reflect"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2"
)

// longAnswers are n answers of a few learners over two skills, so that
// every learner-skill gets far more answers than a record's tail holds,
// with times of every precision, ties, late answers and extreme values.
func longAnswers(seed uint64, n int) []Answer {
	r := rand.New(rand.NewPCG(seed, 11))
	base := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC)
	out := make([]Answer, n)
	for i := range out {
		at := base.Add(time.Duration(i) * time.Minute)
		switch r.IntN(12) {
		case 0:
			at = at.Add(time.Duration(r.IntN(1000)) * time.Millisecond)
		case 1:
			at = at.Add(time.Duration(r.Int64N(1e9)))
		case 2:
			at = at.Add(-48 * time.Hour) // late
		case 3:
			at = base // a tie with other answers
		case 4:
			at = time.Unix(0, math.MinInt64+int64(r.IntN(3)))
		case 5:
			at = time.Unix(0, math.MaxInt64-int64(r.IntN(3)))
		}
		sk := []string{skillNames[r.IntN(2)]}
		if r.IntN(6) == 0 {
			sk = []string{skillNames[0], skillNames[1]}
		}
		out[i] = Answer{ID: fmt.Sprint("long-", i), Learner: fmt.Sprint("learner-", r.IntN(3)), Skills: sk, Correct: r.IntN(3) != 0, At: at}
	}
	return out
}

// TestLongHistoriesInChunks: histories far longer than a record's tail are
// moved to chunk keys as they grow; History, ScanHistory, the records and
// the re-derivation after a parameter change all see every answer, in
// order, whether the state comes from the batch, the cache or Pebble.
func TestLongHistoriesInChunks(t *testing.T) {
	for _, cache := range []int{1, DefaultCacheRecords} { // 1: nothing fits, every learner is read from Pebble
		t.Run(fmt.Sprint("cache=", cache), func(t *testing.T) {
			s := openTestStore(t, t.TempDir(), StoreOptions{CacheRecords: cache})
			defer s.Close()
			pt := mustPartition(t, s, 1)
			v1 := NewParamFile()
			v2 := &ParamFile{Version: 2, Default: Params{Prior: 0.2, Learn: 0.25, Guess: 0.15, Slip: 0.12}}
			o := newOracle(DefaultPolicy(), DefaultDedupeWindow)
			as := longAnswers(1, 1500)
			for i, a := range as {
				pf := v1
				if i >= 1000 {
					pf = v2 // re-derivation from long histories, some in this batch's chunks
				}
				res, err := pt.Apply(a, int64(i), pf)
				if err != nil {
					t.Fatalf("Apply #%d: %v", i, err)
				}
				want := o.apply(a, pf)
				if res.Rederived != want.rederived || !reflect.DeepEqual(res.PCorrect, want.pcorrect) {
					t.Fatalf("answer %d: %+v, want rederived %d, PCorrect %v", i, res, want.rederived, want.pcorrect)
				}
				if i%113 == 112 || i == 1010 {
					mustCommit(t, pt, false)
				}
			}
			mustCommit(t, pt, false)
			checkAgainst(t, s, o)
			seen := 0
			if err := s.ScanHistory(func(learner, skill string, h []HistoryEntry) error {
				seen++
				if want := o.hist[[2]string{learner, skill}]; !reflect.DeepEqual(h, want) {
					return fmt.Errorf("%s/%s: scanned %d answers, want %d", learner, skill, len(h), len(want))
				}
				return nil
			}); err != nil {
				t.Fatal(err)
			}
			if seen != len(o.hist) {
				t.Fatalf("scanned %d learner-skills, want %d", seen, len(o.hist))
			}
			// The answers are in chunks: far fewer history keys than answers.
			keys, answers := 0, 0
			it, err := s.db.NewIter(&pebble.IterOptions{LowerBound: familyPrefix(1, famHistory), UpperBound: familyEnd(1, famHistory)})
			if err != nil {
				t.Fatal(err)
			}
			for ok := it.First(); ok; ok = it.Next() {
				n, err := forHistoryValue(it.Value(), nil)
				if err != nil {
					t.Fatal(err)
				}
				keys++
				answers += n
			}
			it.Close()
			total := 0
			for _, h := range o.hist {
				total += len(h)
			}
			if keys == 0 || keys > total/tailMaxAnswers+len(o.hist) || answers >= total {
				t.Fatalf("%d history keys holding %d of %d answers", keys, answers, total)
			}
		})
	}
}

// TestSchema1StoreTakenOver writes a store the way schema 1 did (version 1
// records, one history key per answer, window keys), opens it with this
// build, reads it, and goes on applying answers: the old history and the
// new are one history, a resend of an id in the old window is a
// duplicate, the old window key is removed once the window lives in a
// record, and the schema key says 3.
func TestSchema1StoreTakenOver(t *testing.T) {
	dir := t.TempDir()
	pf := NewParamFile()
	o := newOracle(DefaultPolicy(), DefaultDedupeWindow)
	as := answers(8, 600, 12)
	for _, a := range as[:400] {
		o.apply(a, pf)
	}

	// Schema 1, written by hand.
	s := openTestStore(t, dir, StoreOptions{})
	b := s.db.NewBatch()
	set := func(k, v []byte) {
		if err := b.Set(k, v, nil); err != nil {
			t.Fatal(err)
		}
	}
	set(metaKey("schema"), binary.AppendUvarint([]byte{metaV1}, 1))
	for k, r := range o.recs {
		set(recordKey(nil, 0, k[0], k[1]), appendRecord(nil, r))
		for i, h := range o.hist[k] {
			set(historyKey(nil, 0, k[0], k[1], uint32(i+1)), appendHistory(nil, h))
		}
	}
	for l, ids := range o.ids {
		w := window{hasAt: true, lastAt: o.lastAt[l]}
		for _, id := range ids {
			w.ids = append(w.ids, idHash(id))
		}
		set(windowKey(nil, 0, l), appendWindow(nil, &w))
	}
	set(stateKey(0), appendPartState(nil, partState{offset: 399, nextSeq: 1, records: uint64(len(o.recs))}))
	if err := b.Commit(pebble.Sync); err != nil {
		t.Fatal(err)
	}
	b.Close()
	s.Close()

	s = openTestStore(t, dir, StoreOptions{CacheRecords: 8})
	defer s.Close()
	checkAgainst(t, s, o)
	pt := mustPartition(t, s, 0)
	if next, _ := pt.NextOffset(); next != 400 {
		t.Fatalf("NextOffset %d, want 400", next)
	}
	// A resend of an answer applied under schema 1 is a duplicate.
	resent := as[399]
	if res, err := pt.Apply(resent, 400, pf); err != nil || !res.Duplicate {
		t.Fatalf("resend of %s: %+v, %v; want a duplicate", resent.ID, res, err)
	}
	for i, a := range as[400:] {
		if _, err := pt.Apply(a, int64(401+i), pf); err != nil {
			t.Fatal(err)
		}
		o.apply(a, pf)
		if i%50 == 49 {
			mustCommit(t, pt, false)
		}
	}
	mustCommit(t, pt, false)
	checkAgainst(t, s, o)
	n := 0
	if err := s.ScanHistory(func(learner, skill string, h []HistoryEntry) error {
		n++
		if !reflect.DeepEqual(h, o.hist[[2]string{learner, skill}]) {
			return fmt.Errorf("%s/%s: scan differs", learner, skill)
		}
		return nil
	}); err != nil || n != len(o.hist) {
		t.Fatalf("ScanHistory: %d learner-skills, %v; want %d", n, err, len(o.hist))
	}
	// Every learner answered again, so every window now lives in a record.
	it, err := s.db.NewIter(&pebble.IterOptions{LowerBound: familyPrefix(0, famWindow), UpperBound: familyEnd(0, famWindow)})
	if err != nil {
		t.Fatal(err)
	}
	left := 0
	for ok := it.First(); ok; ok = it.Next() {
		left++
	}
	it.Close()
	if left != 0 {
		t.Errorf("%d schema 1 window keys left", left)
	}
	v, closer, err := s.db.Get(metaKey("schema"))
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(v, binary.AppendUvarint([]byte{metaV1}, storeSchema)) || storeSchema != 3 {
		t.Errorf("schema value %x, want schema 3", v)
	}
	closer.Close()
}

// TestWindowDeltasAcrossReloads: the applied-id window is written whole
// or as a delta from the last whole one, carried by different records of
// a learner; read back from Pebble after every commit (a one-record cache,
// a reopened store), it still holds exactly the learner's last ids, so a
// resend is a duplicate exactly when the oracle's window has its id.
func TestWindowDeltasAcrossReloads(t *testing.T) {
	for _, w := range []int{1, 4, DefaultDedupeWindow} {
		t.Run(fmt.Sprint("window=", w), func(t *testing.T) {
			dir := t.TempDir()
			opt := StoreOptions{CacheRecords: 1, DedupeWindow: w}
			s := openTestStore(t, dir, opt)
			pt := mustPartition(t, s, 0)
			pf := NewParamFile()
			o := newOracle(DefaultPolicy(), w)
			r := rand.New(rand.NewPCG(uint64(w), 5))
			base := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC)
			sent := map[string][]Answer{} // per learner, in order
			dups := 0
			for i := 0; i < 3000; i++ {
				l := fmt.Sprint("learner-", r.IntN(4))
				var a Answer
				if prev := sent[l]; len(prev) > 0 && r.IntN(3) == 0 {
					a = prev[len(prev)-1-r.IntN(min(len(prev), 2*w+2))] // a resend, inside or just outside the window
				} else {
					a = Answer{ID: fmt.Sprint("w-", i), Learner: l, Skills: []string{skillNames[r.IntN(len(skillNames))]},
						Correct: r.IntN(2) == 0, At: base.Add(time.Duration(i) * time.Second)}
					if r.IntN(5) == 0 {
						a.Skills = append(a.Skills, skillNames[r.IntN(len(skillNames))])
					}
				}
				sent[l] = append(sent[l], a)
				res, err := pt.Apply(a, int64(i), pf)
				if err != nil {
					t.Fatal(err)
				}
				want := o.apply(a, pf)
				if res.Duplicate != want.dup {
					t.Fatalf("answer %d (%s of %s): Duplicate %v, want %v", i, a.ID, l, res.Duplicate, want.dup)
				}
				if res.Duplicate {
					dups++
				}
				if r.IntN(3) == 0 {
					mustCommit(t, pt, false)
				}
				if i == 1500 { // and once from a reopened store
					mustCommit(t, pt, true)
					s.Close()
					s = openTestStore(t, dir, opt)
					pt = mustPartition(t, s, 0)
				}
			}
			mustCommit(t, pt, false)
			checkAgainst(t, s, o)
			if dups == 0 {
				t.Fatal("no duplicates met; the test checks nothing")
			}
			s.Close()
		})
	}
}
