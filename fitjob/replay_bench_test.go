package fitjob

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"math/rand/v2"
	"os"
	"path/filepath"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/state"
)

// writeBenchCohort writes a simulated cohort of learners × 6 skills × 30
// opportunities to a file and returns its path and its true parameters.
func writeBenchCohort(b *testing.B, learners int) (string, *state.ParamFile) {
	b.Helper()
	path := filepath.Join(b.TempDir(), "answers.jsonl")
	f, err := os.Create(path)
	if err != nil {
		b.Fatal(err)
	}
	c := Cohort{Learners: learners, Seed: 7}
	if _, err := WriteCohort(f, c); err != nil {
		b.Fatal(err)
	}
	if err := f.Close(); err != nil {
		b.Fatal(err)
	}
	return path, c.Truth()
}

// BenchmarkReplayFile replays a file of 360,000 answers with every output
// written (predictions.csv, events.csv); the target is ≥ 1,000,000
// answers/s on the 2-core development machine.
func BenchmarkReplayFile(b *testing.B) {
	path, truth := writeBenchCohort(b, 2000)
	out := b.TempDir()
	b.ResetTimer()
	var answers int64
	start := time.Now()
	cpu0 := cpuTime()
	for i := 0; i < b.N; i++ {
		r, err := NewReplay(ReplayOptions{Params: []NamedParams{{"truth", truth}}, OutDir: out})
		if err != nil {
			b.Fatal(err)
		}
		res, err := r.RunFile(context.Background(), path)
		if err != nil {
			b.Fatal(err)
		}
		answers += res.Answers
	}
	b.ReportMetric(float64(answers)/time.Since(start).Seconds(), "answers/s")
	b.ReportMetric(float64(cpuTime()-cpu0)/float64(answers), "cpu-ns/answer")
}

// cpuTime is the process's user + system CPU time so far, in nanoseconds:
// on a machine shared with other work, CPU per answer is steadier than the
// wall-clock rate.
func cpuTime() int64 {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return ru.Utime.Nano() + ru.Stime.Nano()
}

// syntheticReplay feeds a replay learners × skills × opportunities answers
// drawn from BKT with known parameters, straight into the applier (no
// decoding), and returns the pass ready to be finished.
func syntheticReplay(b *testing.B, learners, skills, opps int) *replayer {
	b.Helper()
	pf := state.NewParamFile()
	truth := make([]state.Params, skills)
	names := make([]string, skills)
	for s := range skills {
		names[s] = fmt.Sprintf("skill-%02d", s)
		truth[s] = state.Params{Prior: 0.2 + 0.05*float64(s%4), Learn: 0.1 + 0.02*float64(s%5), Guess: 0.2, Slip: 0.1}
		pf.Skills[names[s]] = state.SkillParams{Params: truth[s]}
	}
	r, err := NewReplay(ReplayOptions{Params: []NamedParams{{"truth", pf}}, Logger: zerolog.Nop()})
	if err != nil {
		b.Fatal(err)
	}
	rp := newReplayer(r, &replayOutputs{}, "synthetic", false)
	r.cur = rp
	rng := rand.New(rand.NewPCG(3, 4))
	at := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC).UnixNano()
	var d replayAnswer
	for l := range learners {
		name := fmt.Sprintf("hl-%07d", l)
		for s := range skills {
			p := truth[s]
			known := rng.Float64() < p.Prior
			for o := range opps {
				var correct bool
				if known {
					correct = rng.Float64() >= p.Slip
				} else {
					correct = rng.Float64() < p.Guess
					known = rng.Float64() < p.Learn
				}
				at += int64(time.Second)
				d.a = state.Answer{ID: fmt.Sprintf("%s-%d-%d", name, s, o), Learner: name, Skills: names[s : s+1], Correct: correct, At: time.Unix(0, at)}
				prepareDecoded(&d)
				if err := rp.apply(&d); err != nil {
					b.Fatal(err)
				}
			}
		}
	}
	return rp
}

var report10M struct {
	once sync.Once
	rp   *replayer
}

// BenchmarkReport10M is report generation for 10,000,000 answers (100,000
// learners × 5 skills × 20 opportunities): the scores, curves and mastery
// outcomes (finish), metrics.json and report.html. The target is ≤ 60 s.
// Run it with -benchtime=1x; the answers are fed once (not timed).
func BenchmarkReport10M(b *testing.B) {
	report10M.once.Do(func() { report10M.rp = syntheticReplay(b, 100_000, 5, 20) })
	rp := report10M.rp
	if rp.answers != 10_000_000 {
		b.Fatalf("%d answers fed", rp.answers)
	}
	b.ResetTimer()
	for range b.N {
		res, err := rp.finish()
		if err != nil {
			b.Fatal(err)
		}
		if _, err := res.MetricsJSON(); err != nil {
			b.Fatal(err)
		}
		if err := res.ReportHTML(io.Discard); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(b.Elapsed().Seconds()/float64(b.N), "s/report")
}

// decodedCohort reads a cohort file into decoding chunks, decoded by the
// workers' code (decodeChunk) for a replay of it under its true parameters,
// for the parts of BenchmarkReplayFile.
func decodedCohort(b *testing.B, learners int) ([]*replayChunk, *Replay, int) {
	b.Helper()
	path, truth := writeBenchCohort(b, learners)
	data, err := os.ReadFile(path)
	if err != nil {
		b.Fatal(err)
	}
	r, err := NewReplay(ReplayOptions{Params: []NamedParams{{"truth", truth}}, Logger: zerolog.Nop()})
	if err != nil {
		b.Fatal(err)
	}
	in := &skillInterner{r: r}
	var chunks []*replayChunk
	n := 0
	for len(data) > 0 {
		cut := min(replayChunkSize, len(data))
		if i := bytes.IndexByte(data[cut-1:], '\n'); i >= 0 {
			cut += i
		} else {
			cut = len(data)
		}
		c := &replayChunk{data: data[:cut]}
		data = data[cut:]
		var dec state.NativeDecoder
		decodeChunk(&dec, in, c)
		n += len(c.answers)
		chunks = append(chunks, c)
	}
	return chunks, r, n
}

// BenchmarkReplayDecode is the decoding goroutines' work per answer
// (decodeChunk: the fast path, or state.NativeDecoder for lines it leaves,
// the store's checks, the hashes the applier looks learners and skills up
// by), on one goroutine: ns/op is per answer.
func BenchmarkReplayDecode(b *testing.B) {
	chunks, r, _ := decodedCohort(b, 500)
	var dec state.NativeDecoder
	in := &skillInterner{r: r}
	b.ResetTimer()
	cpu0 := cpuTime()
	defer func() { b.ReportMetric(float64(cpuTime()-cpu0)/float64(b.N), "cpu-ns/answer") }()
	done := 0
	for done < b.N {
		for _, c := range chunks {
			c.reset()
			decodeChunk(&dec, in, c)
			done += len(c.answers)
			if done >= b.N {
				break
			}
		}
	}
}

// BenchmarkReplayApply is the applying goroutine's work per answer as the
// file pass does it (the learner's window, Record.Apply, the scores and
// curves, the numbers of the CSV row and any events; the row itself is
// rendered elsewhere, BenchmarkReplayFormat), on answers decoded
// beforehand: ns/op is per answer.
func BenchmarkReplayApply(b *testing.B) {
	chunks, r, _ := decodedCohort(b, 500)
	out := &replayOutputs{pw: newRowWriter(io.Discard), ew: newRowWriter(io.Discard)}
	b.ResetTimer()
	cpu0 := cpuTime()
	defer func() { b.ReportMetric(float64(cpuTime()-cpu0)/float64(b.N), "cpu-ns/answer") }()
	done := 0
	for done < b.N {
		rp := newReplayer(r, out, "bench", false) // a fresh pass over the same answers
		for _, c := range chunks {
			c.rows, c.multi, c.events = c.rows[:0], c.multi[:0], c.events[:0]
			rp.sink = c
			for i := range c.answers {
				d := &c.answers[i]
				rp.sinkAns = int32(i)
				if err := rp.apply(d); err != nil {
					b.Fatal(err)
				}
			}
			rp.sink = nil
			done += len(c.answers)
			if done >= b.N {
				break
			}
		}
	}
}

// BenchmarkReplayFormat is the rendering of applied answers' predictions.csv
// rows (formatRows, on the decoding goroutines in the file pass), on
// answers decoded and applied beforehand: ns/op is per answer.
func BenchmarkReplayFormat(b *testing.B) {
	chunks, r, _ := decodedCohort(b, 500)
	rp := newReplayer(r, &replayOutputs{pw: newRowWriter(io.Discard), ew: newRowWriter(io.Discard)}, "bench", false)
	for _, c := range chunks {
		rp.sink = c
		for i := range c.answers {
			d := &c.answers[i]
			rp.sinkAns = int32(i)
			if err := rp.apply(d); err != nil {
				b.Fatal(err)
			}
		}
		rp.sink = nil
	}
	b.ResetTimer()
	cpu0 := cpuTime()
	defer func() { b.ReportMetric(float64(cpuTime()-cpu0)/float64(b.N), "cpu-ns/answer") }()
	done := 0
	for done < b.N {
		for _, c := range chunks {
			formatRows(c)
			done += len(c.rows)
			if done >= b.N {
				break
			}
		}
	}
}
