package state

import (
	"errors"
	"os"
	"os/exec"
	"syscall"
	"testing"
)

// crashAnswers is the input of the crash test: the child applies it and is
// killed; the parent checks what survived.
func crashAnswers() []Answer { return answers(5, 3000, 50) }

// TestCrashKillAndReplay kills a process that commits with NoSync (SIGKILL,
// no Close, staged answers in flight), reopens its store and checks that the
// stored state is exactly the hand-computed state at the stored offset, and
// that replaying the whole input from the start applies each answer once.
func TestCrashKillAndReplay(t *testing.T) {
	dir := t.TempDir()
	cmd := exec.Command(os.Args[0], "-test.run=^TestCrashChild$", "-test.count=1")
	cmd.Env = append(os.Environ(), "ATTAIN_STORE_CRASH_DIR="+dir)
	out, err := cmd.CombinedOutput()
	var ee *exec.ExitError
	if err == nil || !errors.As(err, &ee) || ee.ProcessState.Sys().(syscall.WaitStatus).Signal() != syscall.SIGKILL {
		t.Fatalf("child did not die by SIGKILL: %v\n%s", err, out)
	}

	s := openTestStore(t, dir, StoreOptions{})
	defer s.Close()
	pt := mustPartition(t, s, 4)
	next, ok := pt.NextOffset()
	if !ok || next == 0 {
		t.Fatalf("NextOffset after the crash = %d, %v: nothing survived (the child commits every 100)", next, ok)
	}
	t.Logf("stored offset after the kill: next = %d of %d answers", next, len(crashAnswers()))
	pf := NewParamFile()
	as := crashAnswers()
	o := newOracle(DefaultPolicy(), DefaultDedupeWindow)
	for _, a := range as[:next] {
		o.apply(a, pf)
	}
	checkAgainst(t, s, o)
	for i, a := range as {
		res, err := pt.Apply(a, int64(i), pf)
		if err != nil {
			t.Fatal(err)
		}
		if res.Replayed != (int64(i) < next) {
			t.Fatalf("offset %d: Replayed = %v", i, res.Replayed)
		}
		if !res.Replayed {
			o.apply(a, pf)
		}
		if i%500 == 499 {
			mustCommit(t, pt, false)
		}
	}
	mustCommit(t, pt, true)
	checkAgainst(t, s, o)
}

// TestCrashChild is the child of TestCrashKillAndReplay; it does nothing
// unless started by it.
func TestCrashChild(t *testing.T) {
	dir := os.Getenv("ATTAIN_STORE_CRASH_DIR")
	if dir == "" {
		t.Skip("helper process of TestCrashKillAndReplay")
	}
	s, err := OpenStore(dir, StoreOptions{})
	if err != nil {
		t.Fatal(err)
	}
	pt, err := s.Partition(4)
	if err != nil {
		t.Fatal(err)
	}
	pf := NewParamFile()
	as := crashAnswers()
	for i, a := range as {
		if _, err := pt.Apply(a, int64(i), pf); err != nil {
			t.Fatal(err)
		}
		if i%100 == 99 && i < len(as)-150 {
			if err := pt.Commit(i == 199); err != nil { // one synced commit, the rest NoSync
				t.Fatal(err)
			}
		}
	}
	// 150+ answers staged, many NoSync commits possibly still in buffers.
	syscall.Kill(os.Getpid(), syscall.SIGKILL)
	select {}
}
