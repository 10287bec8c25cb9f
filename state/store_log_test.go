package state

import (
	"errors"
	"fmt"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2"
)

// logKeys counts partition p's record logs in the store.
func logKeys(t *testing.T, s *Store, p int32) int {
	t.Helper()
	it, err := s.db.NewIter(&pebble.IterOptions{LowerBound: familyPrefix(uint32(p), famLog), UpperBound: familyEnd(uint32(p), famLog)})
	if err != nil {
		t.Fatal(err)
	}
	defer it.Close()
	n := 0
	for ok := it.First(); ok; ok = it.Next() {
		n++
	}
	return n
}

// waitBackground waits until partition p has no background checkpoint
// running.
func waitBackground(t *testing.T, s *Store, p int32) {
	t.Helper()
	sl := s.slot(p)
	for deadline := time.Now().Add(10 * time.Second); ; {
		sl.mu.Lock()
		running := sl.bgRunning
		sl.mu.Unlock()
		if !running {
			return
		}
		if time.Now().After(deadline) {
			t.Fatal("background checkpoint still running after 10 s")
		}
		time.Sleep(time.Millisecond)
	}
}

// TestRecordLogEquivalence applies the same answers through many small
// commits — with background checkpoints, readers settling the logs in
// between, a parameter swap (re-derivation reads history that is partly in
// logs), a tiny cache (learners evicted while pinned), and a reopen that
// finds logs left behind — and checks the store against the oracle: the
// logs change how state is stored, never what it is.
func TestRecordLogEquivalence(t *testing.T) {
	for _, tc := range []struct {
		name    string
		cache   int
		readers bool
	}{
		{"default cache", 0, false},
		{"cache of 1 with readers", 1, true},
		{"cache of 1", 1, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			opt := StoreOptions{CacheRecords: tc.cache}
			s := openTestStore(t, dir, opt)
			defer func() { s.Close() }()
			pt := mustPartition(t, s, 2)
			v1 := NewParamFile()
			v2 := &ParamFile{Version: 2, Default: Params{Prior: 0.3, Learn: 0.2, Guess: 0.2, Slip: 0.1}}
			o := newOracle(DefaultPolicy(), DefaultDedupeWindow)
			as := answers(11, 4000, 20)
			sawLogs := false
			for i, a := range as {
				pf := v1
				if i >= 2500 {
					pf = v2
				}
				if _, err := pt.Apply(a, int64(i), pf); err != nil {
					t.Fatal(err)
				}
				o.apply(a, pf)
				if i%37 == 36 {
					mustCommit(t, pt, false)
					if logKeys(t, s, 2) > 0 {
						sawLogs = true
					}
				}
				if tc.readers && i%501 == 500 {
					if _, _, err := s.Learner(a.Learner); err != nil {
						t.Fatal(err)
					}
					if n := logKeys(t, s, 2); n != 0 {
						t.Fatalf("after a reader's settle: %d logs, want 0", n)
					}
				}
				if i == 1800 {
					// Reopen with logs left behind: Close does not checkpoint,
					// the new handle does, before reading anything.
					mustCommit(t, pt, false)
					waitBackground(t, s, 2)
					left := logKeys(t, s, 2)
					s.Close()
					s = openTestStore(t, dir, opt)
					pt = mustPartition(t, s, 2)
					if n := logKeys(t, s, 2); n != 0 {
						t.Fatalf("after reopening with %d logs left: %d logs, want 0", left, n)
					}
				}
			}
			mustCommit(t, pt, false)
			waitBackground(t, s, 2)
			if !sawLogs {
				t.Fatal("no commit left a log: the test checks nothing")
			}
			if s.Stats().Checkpoints == 0 {
				t.Fatal("no checkpoint ran")
			}
			if s.Stats().Rederived == 0 {
				t.Fatal("nothing was re-derived after the swap")
			}
			checkAgainst(t, s, o)
			// And once more after every log is checkpointed by a synced commit.
			a := Answer{ID: "last", Learner: as[0].Learner, Skills: []string{"trial-balance"}, Correct: true, At: as[len(as)-1].At}
			if _, err := pt.Apply(a, int64(len(as)), v2); err != nil {
				t.Fatal(err)
			}
			o.apply(a, v2)
			mustCommit(t, pt, true)
			if n := logKeys(t, s, 2); n != 0 {
				t.Fatalf("after a synced commit: %d logs, want 0", n)
			}
			checkAgainst(t, s, o)
		})
	}
}

// TestBackgroundCheckpointYieldsToSettle: a background checkpoint that read
// logs 1 to k, while the partition committed log k+1 and a reader settled
// all of them, must not commit: its values are older than the keys'.
func TestBackgroundCheckpointYieldsToSettle(t *testing.T) {
	s := openTestStore(t, t.TempDir(), StoreOptions{})
	defer s.Close()
	pt := mustPartition(t, s, 0)
	pf := NewParamFile()
	o := newOracle(DefaultPolicy(), DefaultDedupeWindow)
	as := answers(12, 400, 3)
	off := 0
	apply := func(n int) {
		for ; n > 0; n-- {
			if _, err := pt.Apply(as[off], int64(off), pf); err != nil {
				t.Fatal(err)
			}
			o.apply(as[off], pf)
			off++
		}
		mustCommit(t, pt, false)
	}
	for range 3 {
		apply(50)
	}
	if n := logKeys(t, s, 0); n != 3 {
		t.Fatalf("%d logs, want 3", n)
	}
	sl := s.slot(0)
	ran := false
	testCheckpointHook = func() {
		ran = true
		apply(50) // log 4: newer values of the same learners
		if err := s.settle([]int32{0}); err != nil {
			t.Error(err)
		}
	}
	defer func() { testCheckpointHook = nil }()
	sl.mu.Lock()
	sl.bgRunning = true
	sl.mu.Unlock()
	before := s.Stats().Checkpoints
	s.backgroundCheckpoint(sl, 0, pt, 3)
	if !ran {
		t.Fatal("the hook did not run")
	}
	if got := s.Stats().Checkpoints - before; got != 1 {
		t.Fatalf("%d checkpoints committed, want 1 (the settle's; the background one must yield)", got)
	}
	testCheckpointHook = nil
	apply(50)
	checkAgainst(t, s, o)
}

// TestRecordLogCorrupt: a log that cannot be read, or that holds a key of
// another partition, stops the partition from opening with ErrCorruptStore.
func TestRecordLogCorrupt(t *testing.T) {
	for _, tc := range []struct {
		name string
		val  []byte
	}{
		{"empty", nil},
		{"newer version", []byte{9}},
		{"truncated", appendLogSet([]byte{logV1}, recordKey(nil, 1, "l", "s"), []byte{1, 2, 3})[:8]},
		{"unknown operation", []byte{logV1, 7, 1, 'x'}},
		{"other partition", appendLogSet([]byte{logV1}, recordKey(nil, 2, "l", "s"), []byte{1})},
		{"outbox key", appendLogSet([]byte{logV1}, outboxKey(nil, 1, 5), []byte{1})},
	} {
		t.Run(tc.name, func(t *testing.T) {
			s := openTestStore(t, t.TempDir(), StoreOptions{})
			defer s.Close()
			if err := s.db.Set(logKey(nil, 1, 1), tc.val, nil); err != nil {
				t.Fatal(err)
			}
			_, err := s.Partition(1)
			if !errors.Is(err, ErrCorruptStore) {
				t.Fatalf("Partition(1) = %v, want ErrCorruptStore", err)
			}
			t.Log(err)
		})
	}
}

// TestLogOpsRoundTrip: what appendLogSet/appendLogDelete write,
// forLogOps reads back, in order.
func TestLogOpsRoundTrip(t *testing.T) {
	v := []byte{logV1}
	var want []string
	for i := range 50 {
		k := recordKey(nil, 0, fmt.Sprint("learner-", i), "s")
		if i%7 == 0 {
			v = appendLogDelete(v, k)
			want = append(want, "del "+string(k))
			continue
		}
		val := make([]byte, i*13)
		for j := range val {
			val[j] = byte(i + j)
		}
		v = appendLogSet(v, k, val)
		want = append(want, fmt.Sprintf("set %s %x", k, val))
	}
	var got []string
	err := forLogOps(v, func(del bool, k, val []byte) error {
		if del {
			got = append(got, "del "+string(k))
		} else {
			got = append(got, fmt.Sprintf("set %s %x", k, val))
		}
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	if fmt.Sprint(got) != fmt.Sprint(want) {
		t.Fatalf("read back %d ops, wrote %d; first difference somewhere in\n got %v\nwant %v", len(got), len(want), got, want)
	}
}

// TestCheckpointMinInterval: many small commits within the minimum
// interval leave their logs for one later checkpoint instead of starting
// one every checkpointCommits commits; once the interval has passed, the
// next commit starts one, and it takes every log.
func TestCheckpointMinInterval(t *testing.T) {
	s := openTestStore(t, t.TempDir(), StoreOptions{})
	defer s.Close()
	s.ckptInterval = time.Hour
	pt := mustPartition(t, s, 0)
	pf := NewParamFile()
	as := answers(5, 3*checkpointCommits+1, 4)
	for i, a := range as[:3*checkpointCommits] {
		if _, err := pt.Apply(a, int64(i), pf); err != nil {
			t.Fatal(err)
		}
		mustCommit(t, pt, false)
		waitBackground(t, s, 0) // each checkpoint that starts ends before the next commit
	}
	// The first commits may checkpoint: the handle has not checkpointed
	// yet. After that, none within the hour.
	if n := logKeys(t, s, 0); n < 2*checkpointCommits {
		t.Fatalf("%d logs after %d commits within the interval, want at least %d (no checkpoint after the first)", n, 3*checkpointCommits, 2*checkpointCommits)
	}
	before := s.Stats().Checkpoints
	s.ckptInterval = 0 // the interval has passed
	if _, err := pt.Apply(as[len(as)-1], int64(len(as)-1), pf); err != nil {
		t.Fatal(err)
	}
	mustCommit(t, pt, false)
	waitBackground(t, s, 0)
	if got := s.Stats().Checkpoints; got != before+1 {
		t.Fatalf("checkpoints %d, want %d: the commit after the interval starts one", got, before+1)
	}
	if n := logKeys(t, s, 0); n != 0 {
		t.Fatalf("%d logs after the checkpoint, want 0", n)
	}
}
