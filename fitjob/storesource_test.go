package fitjob

import (
	"bufio"
	"context"
	"errors"
	"hash/fnv"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2"
	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/state"
)

// fillStore applies answers to a store in dir the way the processor does:
// partition by learner, offsets in order, a commit every 500 answers.
func fillStore(t testing.TB, dir string, as []state.Answer, partitions int) {
	t.Helper()
	st, err := state.OpenStore(dir, state.StoreOptions{Logger: zerolog.Nop()})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	pts := make([]*state.Partition, partitions)
	offs := make([]int64, partitions)
	for p := range pts {
		if pts[p], err = st.Partition(int32(p)); err != nil {
			t.Fatal(err)
		}
	}
	pf := state.NewParamFile()
	for _, a := range as {
		h := fnv.New32a()
		h.Write([]byte(a.Learner))
		p := int(h.Sum32() % uint32(partitions))
		if _, err := pts[p].Apply(a, offs[p], pf); err != nil {
			t.Fatal(err)
		}
		offs[p]++
		if pts[p].Pending() >= 500 {
			if err := pts[p].Commit(false); err != nil {
				t.Fatal(err)
			}
		}
	}
	for _, pt := range pts {
		if err := pt.Commit(true); err != nil {
			t.Fatal(err)
		}
	}
}

// A refit from a processor's store gives the same candidates and verdicts
// as a refit from the answers it applied (the store keeps arrival order,
// which for this cohort is `at` order); an answer given twice counts once
// (the store drops an id among the learner's latest 32 applied ids, its
// dedupe window).
func TestStoreSourceMatchesAnswers(t *testing.T) {
	as, _ := cohortAnswers(t, Cohort{Learners: 240, Opportunities: 12, Seed: 12, Skills: HarbourLane().Skills[:3]})
	withRepeats := append([]state.Answer(nil), as...)
	withRepeats = append(withRepeats, as[len(as)-1], as[len(as)-1]) // the same id again, twice
	dir := t.TempDir()
	fillStore(t, dir, withRepeats, 3)

	src, err := OpenStoreSource(dir, zerolog.Nop())
	if err != nil {
		t.Fatal(err)
	}
	defer src.Close()
	if src.Name() != "store:"+dir {
		t.Errorf("name %q", src.Name())
	}
	fromStore := gatedRefit(t, src, GatedRefitOptions{Seed: 3})
	fromAnswers := gatedRefit(t, sliceSource(as), GatedRefitOptions{Seed: 3})
	if fromStore.Data.Answers != int64(len(as)) || fromStore.Data.Learners != 240 || fromStore.Data.Duplicates != 0 {
		t.Errorf("from the store: data %+v, want %d answers of 240 learners", fromStore.Data, len(as))
	}
	if len(fromStore.Skills) != 3 || len(fromAnswers.Skills) != 3 {
		t.Fatalf("%d and %d skills", len(fromStore.Skills), len(fromAnswers.Skills))
	}
	for i, a := range fromStore.Skills {
		b := fromAnswers.Skills[i]
		if a.Skill != b.Skill || a.Verdict != b.Verdict || a.Candidate == nil || b.Candidate == nil ||
			a.Candidate.Params != b.Candidate.Params || a.Candidate.Heldout.LogLoss != b.Candidate.Heldout.LogLoss ||
			!a.First.Equal(b.First) || !a.Last.Equal(b.Last) {
			t.Errorf("skill %d: store %+v\nanswers %+v", i, a, b)
		}
	}

	// Answers: one single-skill answer per entry, ids unique per learner.
	seen := map[string]bool{}
	n := 0
	if err := src.Answers(context.Background(), func(a state.Answer) error {
		n++
		k := a.Learner + "\x00" + a.ID
		if seen[k] || len(a.Skills) != 1 || !strings.HasPrefix(a.ID, a.Skills[0]+"#") {
			t.Errorf("answer %+v (seen %v)", a, seen[k])
		}
		seen[k] = true
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	if n != len(as) {
		t.Errorf("Answers yielded %d, want %d", n, len(as))
	}
	// A cancelled context stops the scan.
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	if err := src.Sequences(ctx, func(string, string, []state.HistoryEntry) error { return nil }); !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled scan: %v", err)
	}
}

// store:DIR never creates a store: a missing or empty directory is refused
// and stays as it was.
func TestStoreSourceNoStore(t *testing.T) {
	empty := t.TempDir()
	for _, dir := range []string{empty, filepath.Join(empty, "missing")} {
		if _, err := OpenStoreSource(dir, zerolog.Nop()); !errors.Is(err, ErrNoStore) || !strings.Contains(err.Error(), "fix:") {
			t.Errorf("%s: %v, want ErrNoStore with a fix", dir, err)
		}
	}
	if ents, _ := os.ReadDir(empty); len(ents) != 0 {
		t.Errorf("OpenStoreSource left %v in an empty directory", ents)
	}
}

const storeHolderEnv = "ATTAIN_TEST_STORE_HOLDER"

// TestStoreHolderProcess is not a test: it is the child process of
// TestStoreSourceRefusedWhileHeld, standing in for a running processor. It
// opens the store named by the environment, says "held", and keeps it open
// until its standard input closes.
func TestStoreHolderProcess(t *testing.T) {
	dir := os.Getenv(storeHolderEnv)
	if dir == "" {
		return
	}
	st, err := state.OpenStore(dir, state.StoreOptions{Logger: zerolog.Nop()})
	if err != nil {
		os.Stdout.WriteString("error: " + err.Error() + "\n")
		os.Exit(1)
	}
	os.Stdout.WriteString("held\n")
	io.Copy(io.Discard, os.Stdin)
	st.Close()
	os.Exit(0)
}

// While another process holds the store — as a running processor does —
// neither OpenStoreSource nor Pebble's read-only mode can open it: Pebble
// v2 takes the directory lock for read-only opens too. OpenStoreSource says
// so (ErrStoreInUse, with the fix); once the holder exits, it opens.
func TestStoreSourceRefusedWhileHeld(t *testing.T) {
	as, _ := cohortAnswers(t, Cohort{Learners: 20, Opportunities: 3, Seed: 1, Skills: HarbourLane().Skills[:1]})
	dir := t.TempDir()
	fillStore(t, dir, as, 1)

	cmd := exec.Command(os.Args[0], "-test.run=^TestStoreHolderProcess$")
	cmd.Env = append(os.Environ(), storeHolderEnv+"="+dir)
	stdin, err := cmd.StdinPipe()
	if err != nil {
		t.Fatal(err)
	}
	stdout, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	defer func() {
		stdin.Close()
		cmd.Wait()
	}()
	line, err := bufio.NewReader(stdout).ReadString('\n')
	if err != nil || line != "held\n" {
		t.Fatalf("holder process said %q, %v", line, err)
	}

	_, err = OpenStoreSource(dir, zerolog.Nop())
	if !errors.Is(err, ErrStoreInUse) || !strings.Contains(err.Error(), "stop the processor") {
		t.Errorf("OpenStoreSource while held: %v, want ErrStoreInUse naming the fix", err)
	}
	db, err := pebble.Open(dir, &pebble.Options{ReadOnly: true})
	if err == nil {
		db.Close()
		t.Error("pebble opened a held store read-only; OpenStoreSource could use that mode")
	} else {
		t.Logf("pebble read-only open while held: %v", err)
	}

	stdin.Close()
	if err := cmd.Wait(); err != nil {
		t.Fatalf("holder process: %v", err)
	}
	deadline := time.Now().Add(5 * time.Second)
	for {
		src, err := OpenStoreSource(dir, zerolog.Nop())
		if err == nil {
			src.Close()
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("after the holder exited: %v", err)
		}
		time.Sleep(20 * time.Millisecond)
	}
}
