package fitjob

import (
	"fmt"
	"math/rand/v2"
	"runtime"
	"syscall"
	"testing"
	"time"

	"github.com/attain-dev/attain/state"
)

var emBenchTruth = state.Params{Prior: 0.3, Learn: 0.12, Guess: 0.2, Slip: 0.1}

// emThreadCPU is the calling OS thread's CPU time (Linux RUSAGE_THREAD = 1);
// ok is false elsewhere. The machine is shared, so besides wall time the
// benchmarks report the CPU time of the benchmarking thread, which other
// processes do not inflate.
func emThreadCPU() (time.Duration, bool) {
	var ru syscall.Rusage
	if runtime.GOOS != "linux" || syscall.Getrusage(1, &ru) != nil {
		return 0, false
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano()), true
}

// emPerAnswer reports wall and thread-CPU nanoseconds per answer per op.
func emPerAnswer(b *testing.B, answers int, cpu0 time.Duration, unit string) {
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(answers), unit)
	if cpu1, ok := emThreadCPU(); ok {
		b.ReportMetric(float64((cpu1-cpu0).Nanoseconds())/float64(b.N)/float64(answers), "cpu-"+unit)
	}
}

// BenchmarkEMIteration is one EM iteration (E-step over every sequence +
// M-step) on simulated data; ns/answer/iter is the figure to watch (target
// ≤ 10 on one core).
func BenchmarkEMIteration(b *testing.B) {
	for _, shape := range []struct{ learners, answers int }{{2000, 30}, {20_000, 5}, {10, 10_000}} {
		b.Run(fmt.Sprintf("%dx%d", shape.learners, shape.answers), func(b *testing.B) {
			d := emSim(rand.New(rand.NewPCG(1, 2)), emBenchTruth, shape.learners, shape.answers)
			for _, forget := range []bool{false, true} {
				b.Run(fmt.Sprintf("forget=%v", forget), func(b *testing.B) {
					runtime.LockOSThread()
					defer runtime.UnlockOSThread()
					o, err := Options{FitForget: forget}.normalised()
					if err != nil {
						b.Fatal(err)
					}
					p := state.Params{Prior: 0.4, Learn: 0.2, Guess: 0.25, Slip: 0.15}
					if forget {
						p.Forget = 0.05
					}
					sc := newScratch(shape.answers)
					b.ReportAllocs()
					b.ResetTimer()
					cpu0, _ := emThreadCPU()
					for range b.N {
						kn := newKernel(p)
						c := kn.estepData(d, sc)
						p = o.mstep(&c, p)
					}
					emPerAnswer(b, d.Answers(), cpu0, "ns/answer/iter")
				})
			}
		})
	}
}

// BenchmarkLogLik is the forward pass alone.
func BenchmarkLogLik(b *testing.B) {
	runtime.LockOSThread()
	defer runtime.UnlockOSThread()
	d := emSim(rand.New(rand.NewPCG(1, 2)), emBenchTruth, 2000, 30)
	b.ReportAllocs()
	b.ResetTimer()
	cpu0, _ := emThreadCPU()
	for range b.N {
		_ = LogLik(d, emBenchTruth)
	}
	emPerAnswer(b, d.Answers(), cpu0, "ns/answer")
}

// BenchmarkFit is a whole fit with default options (default start + 5
// random starts, to convergence) of 2000 learners × 30 answers.
func BenchmarkFit(b *testing.B) {
	runtime.LockOSThread()
	defer runtime.UnlockOSThread()
	d := emSim(rand.New(rand.NewPCG(1, 2)), emBenchTruth, 2000, 30)
	b.ReportAllocs()
	b.ResetTimer()
	cpu0, _ := emThreadCPU()
	iters := 0
	for range b.N {
		r, err := Fit(d, Options{Seed: 1})
		if err != nil {
			b.Fatal(err)
		}
		iters = r.Iterations
	}
	if cpu1, ok := emThreadCPU(); ok {
		b.ReportMetric(float64((cpu1-cpu0).Nanoseconds())/float64(b.N), "cpu-ns/op")
	}
	b.ReportMetric(float64(iters), "iterations(best)")
}
