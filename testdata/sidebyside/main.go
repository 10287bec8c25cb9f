// Command sidebyside times attain's EM (fitjob.Fit) on a data file written
// by pomegranate_side.py, for run.sh. It prints one JSON object: the best
// wall and CPU time over the repeats, the final log-likelihood and
// parameters.
//
//	go run ./testdata/sidebyside DATA ITERATIONS REPEATS
package main

import (
	"bufio"
	"encoding/json"
	"fmt"
	"os"
	"runtime"
	"strconv"
	"strings"
	"syscall"
	"time"

	"github.com/attain-dev/attain/fitjob"
	"github.com/attain-dev/attain/state"
)

// start is the starting point of both fits (the same in pomegranate_side.py).
var start = state.Params{Prior: 0.4, Learn: 0.2, Guess: 0.25, Slip: 0.15}

func main() {
	if len(os.Args) != 4 {
		fmt.Fprintln(os.Stderr, "usage: sidebyside DATA ITERATIONS REPEATS")
		os.Exit(2)
	}
	iters, err1 := strconv.Atoi(os.Args[2])
	repeats, err2 := strconv.Atoi(os.Args[3])
	if err1 != nil || err2 != nil || iters < 1 || repeats < 1 {
		fmt.Fprintln(os.Stderr, "sidebyside: ITERATIONS and REPEATS must be positive integers")
		os.Exit(2)
	}
	d, err := read(os.Args[1])
	if err != nil {
		fmt.Fprintln(os.Stderr, "sidebyside:", err)
		os.Exit(1)
	}
	runtime.LockOSThread()
	// Wide-open bounds: pomegranate has none.
	open := fitjob.Bounds{Hi: state.Params{Prior: 1, Learn: 1, Guess: 1, Slip: 1, Forget: 1}}
	opt := fitjob.Options{Init: &start, FixedIter: true, MaxIter: iters, Bounds: open}
	var res fitjob.Result
	bestWall, bestCPU := time.Duration(1<<62), time.Duration(1<<62)
	for range repeats {
		c0, w0 := cpu(), time.Now()
		r, err := fitjob.Fit(d, opt)
		w, c := time.Since(w0), cpu()-c0
		if err != nil {
			fmt.Fprintln(os.Stderr, "sidebyside:", err)
			os.Exit(1)
		}
		res = r
		bestWall, bestCPU = min(bestWall, w), min(bestCPU, c)
	}
	out := map[string]any{
		"tool":         "attain fitjob.Fit (Go " + runtime.Version() + ", GOMAXPROCS " + strconv.Itoa(runtime.GOMAXPROCS(0)) + ")",
		"wall_seconds": bestWall.Seconds(), "cpu_seconds": bestCPU.Seconds(),
		"iterations": res.Iterations, "loglik": res.LogLik, "params": res.Params,
		"learners": d.Learners(), "answers": d.Answers(),
	}
	if err := json.NewEncoder(os.Stdout).Encode(out); err != nil {
		fmt.Fprintln(os.Stderr, "sidebyside:", err)
		os.Exit(1)
	}
}

// read parses one learner per line, each answer a '0' (wrong) or '1'
// (correct).
func read(path string) (*fitjob.Data, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	d := &fitjob.Data{}
	sc := bufio.NewScanner(f)
	sc.Buffer(make([]byte, 1<<20), 1<<26)
	var seq []bool
	for n := 1; sc.Scan(); n++ {
		line := strings.TrimSpace(sc.Text())
		seq = seq[:0]
		for _, ch := range line {
			switch ch {
			case '0':
				seq = append(seq, false)
			case '1':
				seq = append(seq, true)
			default:
				return nil, fmt.Errorf("%s line %d: answer %q is not 0 or 1", path, n, ch)
			}
		}
		d.Add(seq)
	}
	return d, sc.Err()
}

// cpu is this process's user + system CPU time.
func cpu() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}
