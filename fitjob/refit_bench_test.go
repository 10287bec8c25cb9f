package fitjob

import (
	"context"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"runtime"
	"runtime/debug"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/state"
)

// The refit benchmarks. Run each alone, once:
//
//	go test -run '^$' -bench 'GatedRefitStore10M' -benchtime 1x -timeout 30m ./fitjob/
//
// Building the 10-million-answer store takes about half a minute and is
// not timed; set ATTAIN_BENCH_STORE=DIR to build it once in DIR and reuse
// it on later runs.

// benchShape is a history of Learners learners, each answering
// SkillsEach of Skills skills Opportunities times.
type benchShape struct {
	Learners, Skills, SkillsEach, Opportunities int
}

func (s benchShape) answers() int { return s.Learners * s.SkillsEach * s.Opportunities }

func (s benchShape) skillNames() []string {
	names := make([]string, s.Skills)
	for i := range names {
		names[i] = fmt.Sprintf("skill-%03d", i)
	}
	return names
}

// learner draws learner l's answers: SkillsEach skills picked at random,
// each answered Opportunities times in a row, outcomes drawn from the
// skill's true BKT parameters (PickSkills: invented, identifiable).
func (s benchShape) learner(l int, truth []SkillTruth, t0 time.Time, fn func(state.Answer) error) error {
	r := rand.New(rand.NewPCG(77, uint64(l)))
	id := fmt.Sprintf("bench-%06d", l)
	at := t0.Add(time.Duration(r.IntN(14*24)) * time.Hour)
	n := 0
	for _, sk := range r.Perm(s.Skills)[:s.SkillsEach] {
		p := truth[sk].Params
		mastered := r.Float64() < p.Prior
		skills := []string{truth[sk].Skill}
		for range s.Opportunities {
			var correct bool
			if mastered {
				correct = r.Float64() >= p.Slip
			} else {
				correct = r.Float64() < p.Guess
				mastered = r.Float64() < p.Learn
			}
			n++
			at = at.Add(time.Duration(20+r.IntN(120)) * time.Second)
			if err := fn(state.Answer{ID: id + "-" + strconv.Itoa(n), Learner: id, Skills: skills, Correct: correct, At: at}); err != nil {
				return err
			}
		}
	}
	return nil
}

// benchStore builds (or, with ATTAIN_BENCH_STORE, reuses) a store holding
// the shape's answers, applied as the processor applies them: 4
// partitions by learner, each owned by one of two goroutines, a commit
// every 2000 answers.
func benchStore(b *testing.B, shape benchShape) string {
	b.Helper()
	dir := os.Getenv("ATTAIN_BENCH_STORE")
	if dir == "" {
		dir = b.TempDir()
	} else {
		dir = filepath.Join(dir, fmt.Sprintf("store-%dx%dx%dx%d", shape.Learners, shape.Skills, shape.SkillsEach, shape.Opportunities))
		if _, err := os.Stat(filepath.Join(dir, "complete")); err == nil {
			return dir
		}
		os.RemoveAll(dir)
	}
	truth, err := PickSkills(HarbourLane(), shape.skillNames(), 5)
	if err != nil {
		b.Fatal(err)
	}
	st, err := state.OpenStore(dir, state.StoreOptions{Logger: zerolog.Nop()})
	if err != nil {
		b.Fatal(err)
	}
	t0 := time.Now()
	const parts = 4
	var wg sync.WaitGroup
	errs := make(chan error, 2)
	for w := range 2 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			pf := state.NewParamFile()
			for p := w; p < parts; p += 2 {
				pt, err := st.Partition(int32(p))
				if err != nil {
					errs <- err
					return
				}
				off := int64(0)
				for l := p; l < shape.Learners; l += parts {
					err := shape.learner(l, truth, time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC), func(a state.Answer) error {
						if _, err := pt.Apply(a, off, pf); err != nil {
							return err
						}
						off++
						if pt.Pending() >= 2000 {
							return pt.Commit(false)
						}
						return nil
					})
					if err != nil {
						errs <- err
						return
					}
				}
				if err := pt.Commit(true); err != nil {
					errs <- err
					return
				}
			}
		}()
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		b.Fatal(err)
	}
	if err := st.Close(); err != nil {
		b.Fatal(err)
	}
	b.Logf("built the store: %d answers in %v", shape.answers(), time.Since(t0).Round(time.Millisecond))
	if os.Getenv("ATTAIN_BENCH_STORE") != "" {
		os.WriteFile(filepath.Join(dir, "complete"), nil, 0o644)
	}
	return dir
}

// resetPeakRSS makes VmHWM start again from the current resident set
// (Linux: writing 5 to /proc/self/clear_refs), so that building the input
// does not count in the refit's peak.
func resetPeakRSS() bool {
	runtime.GC()
	debug.FreeOSMemory()
	return os.WriteFile("/proc/self/clear_refs", []byte("5"), 0) == nil
}

// procStatusMiB reads a "Vm…: N kB" line of /proc/self/status, in MiB.
func procStatusMiB(b *testing.B, field string) float64 {
	raw, err := os.ReadFile("/proc/self/status")
	if err != nil {
		b.Skip("no /proc/self/status")
	}
	for _, line := range strings.Split(string(raw), "\n") {
		if rest, ok := strings.CutPrefix(line, field+":"); ok {
			kb, err := strconv.Atoi(strings.TrimSpace(strings.TrimSuffix(strings.TrimSpace(rest), "kB")))
			if err != nil {
				b.Fatal(err)
			}
			return float64(kb) / 1024
		}
	}
	b.Fatalf("no %s in /proc/self/status", field)
	return 0
}

func processCPU() time.Duration {
	var ru syscall.Rusage
	if syscall.Getrusage(syscall.RUSAGE_SELF, &ru) != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}

// BenchmarkGatedRefitStore10M is the target: a gated refit of
// 10,000,000 answers over 200 skills (50,000 learners × 20 skills × 10
// answers) from a processor's store on disk, default options (5 folds, 5
// random starts + the default start, screening above 200,000 answers per
// skill), all cores. Target: ≤ 30 s wall. Reports peak RSS of the refit
// alone (VmHWM reset after building the store).
func BenchmarkGatedRefitStore10M(b *testing.B) {
	benchGatedRefitStore(b, benchShape{Learners: 50_000, Skills: 200, SkillsEach: 20, Opportunities: 10}, GatedRefitOptions{})
}

// BenchmarkGatedRefitStore1M is the same at a tenth of the size.
func BenchmarkGatedRefitStore1M(b *testing.B) {
	benchGatedRefitStore(b, benchShape{Learners: 5_000, Skills: 200, SkillsEach: 20, Opportunities: 10}, GatedRefitOptions{})
}

func benchGatedRefitStore(b *testing.B, shape benchShape, opt GatedRefitOptions) {
	if b.N > 1 {
		b.Skip("one pass is the measurement; use -benchtime 1x")
	}
	dir := benchStore(b, shape)
	reset := resetPeakRSS()
	rss0 := procStatusMiB(b, "VmRSS")
	cpu0 := processCPU()
	b.ResetTimer()
	src, err := OpenStoreSource(dir, zerolog.Nop())
	if err != nil {
		b.Fatal(err)
	}
	opt.Sorter.Dir = b.TempDir()
	rep, err := GatedRefit(context.Background(), src, opt)
	if err != nil {
		b.Fatal(err)
	}
	src.Close()
	b.StopTimer()
	wall := b.Elapsed()
	if rep.Data.Answers != int64(shape.answers()) || len(rep.Skills) != shape.Skills {
		b.Fatalf("refit read %d answers over %d skills, want %d over %d", rep.Data.Answers, len(rep.Skills), shape.answers(), shape.Skills)
	}
	var iters, screened int
	for _, s := range rep.Skills {
		if s.Candidate != nil {
			iters += s.Candidate.Iterations
			if s.Candidate.Screened {
				screened++
			}
		}
	}
	b.ReportMetric(wall.Seconds(), "wall-s")
	b.ReportMetric(rep.ReadSeconds, "read-s")
	b.ReportMetric((processCPU() - cpu0).Seconds(), "cpu-s")
	b.ReportMetric(float64(rep.Data.Answers)/rep.ReadSeconds, "answers/s-read")
	if reset {
		b.ReportMetric(procStatusMiB(b, "VmHWM"), "peak-RSS-MiB")
	}
	b.ReportMetric(rss0, "RSS-before-MiB")
	b.ReportMetric(float64(rep.Accepted), "accepted")
	b.ReportMetric(float64(screened), "screened")
	b.ReportMetric(float64(iters)/float64(max(1, len(rep.Skills))), "iterations/skill")
	b.Logf("%d skills: %d accepted, %d rejected; %d learners; wall %v (read %.1fs); GOMAXPROCS %d",
		len(rep.Skills), rep.Accepted, rep.Rejected, rep.Data.Learners, wall.Round(time.Millisecond), rep.ReadSeconds, runtime.GOMAXPROCS(0))
}

// BenchmarkSorterAnswers is the on-disk grouping of a topic's or file's
// answers alone: Add of every answer (learners interleaved in blocks of
// 64, as partitions interleave them), Finish (duplicates dropped, regrouped
// per skill), and one Skills pass; 1,000,000 answers of the refit shape
// (ATTAIN_BENCH_SORT_LEARNERS=50000 for 10 million).
func BenchmarkSorterAnswers(b *testing.B) {
	if b.N > 1 {
		b.Skip("one pass is the measurement; use -benchtime 1x")
	}
	learners := 5000
	if v := os.Getenv("ATTAIN_BENCH_SORT_LEARNERS"); v != "" {
		learners, _ = strconv.Atoi(v)
	}
	shape := benchShape{Learners: learners, Skills: 200, SkillsEach: 20, Opportunities: 10}
	truth, err := PickSkills(HarbourLane(), shape.skillNames(), 5)
	if err != nil {
		b.Fatal(err)
	}
	reset := resetPeakRSS()
	b.ResetTimer()
	s, err := NewSorter(SorterOptions{Dir: b.TempDir(), ArrivalOrder: true})
	if err != nil {
		b.Fatal(err)
	}
	defer s.Close()
	t0 := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC)
	// Interleave: 64 learners' answers round-robin.
	for base := 0; base < shape.Learners; base += 64 {
		var block [][]state.Answer
		for l := base; l < min(base+64, shape.Learners); l++ {
			var as []state.Answer
			shape.learner(l, truth, t0, func(a state.Answer) error { as = append(as, a); return nil })
			block = append(block, as)
		}
		for i := 0; ; i++ {
			more := false
			for _, as := range block {
				if i < len(as) {
					more = true
					if err := s.Add(as[i]); err != nil {
						b.Fatal(err)
					}
				}
			}
			if !more {
				break
			}
		}
	}
	tAdd := b.Elapsed()
	if err := s.Finish(context.Background()); err != nil {
		b.Fatal(err)
	}
	tFinish := b.Elapsed()
	n := 0
	if err := s.Skills(context.Background(), func(in *SkillInput) error { n += in.Data.Answers(); return nil }); err != nil {
		b.Fatal(err)
	}
	b.StopTimer()
	if n != shape.answers() {
		b.Fatalf("%d answers out, %d in", n, shape.answers())
	}
	b.ReportMetric(tAdd.Seconds(), "add-s")
	b.ReportMetric((tFinish - tAdd).Seconds(), "finish-s")
	b.ReportMetric((b.Elapsed() - tFinish).Seconds(), "skills-s")
	b.ReportMetric(float64(shape.answers())/b.Elapsed().Seconds(), "answers/s")
	b.ReportMetric(float64(s.Stats().DiskBytes)/float64(shape.answers()), "disk-B/answer")
	if reset {
		b.ReportMetric(procStatusMiB(b, "VmHWM"), "peak-RSS-MiB")
	}
}
