package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"

	"github.com/attain-dev/attain/fitjob"
)

func init() {
	commands["simulate"] = command{
		summary: "write a simulated cohort's answers (native JSON lines) and its true parameters",
		run:     runSimulate,
	}
}

func runSimulate(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("simulate", "usage: attain simulate --out FILE [--learners N] [--opportunities N] [--seed S] [--skills LIST] [--items N] [--truth FILE]",
		"Writes a simulated cohort of the Harbour Lane scenario (or the listed skills) as native v1 JSON lines, in `at` order, and its true parameters as a parameter file.", stderr)
	sc := fitjob.HarbourLane()
	defaultSkills := make([]string, len(sc.Skills))
	for i, s := range sc.Skills {
		defaultSkills[i] = s.Skill
	}
	out := fs.String("out", "", "answers file to write (required; \"-\" = standard output)")
	truth := fs.String("truth", "", "parameter file of the true parameters (default: the --out file + \".truth.json\")")
	learners := fs.Int("learners", 2000, "learners in the cohort")
	opps := fs.Int("opportunities", 30, "answers per learner per skill")
	items := fs.Int("items", 40, "practice items per skill")
	seed := fs.Int64("seed", 1, "random seed: the same seed writes the same cohort")
	skills := fs.String("skills", strings.Join(defaultSkills, ","), "comma-separated skills; the scenario's own skills keep their true parameters, other names get parameters drawn from the seed")
	if err := parseFlags(fs, args, stderr, true); err != nil {
		return err
	}
	if *out == "" {
		fmt.Fprintln(stderr, "attain simulate: --out is required: the file to write the answers to")
		fs.Usage()
		return errUsage
	}
	if *truth == "" {
		if *out == "-" {
			fmt.Fprintln(stderr, "attain simulate: with --out -, give --truth FILE for the true parameters")
			return errUsage
		}
		*truth = *out + ".truth.json"
	}
	names := strings.Split(*skills, ",")
	for i := range names {
		names[i] = strings.TrimSpace(names[i])
	}
	picked, err := fitjob.PickSkills(sc, names, *seed)
	if err != nil {
		return fmt.Errorf("--skills: %w", err)
	}
	c := fitjob.Cohort{Learners: *learners, Opportunities: *opps, Items: *items, Skills: picked, Seed: *seed}
	// Zero means "default" to the simulator; on the command line it is a
	// mistake.
	for _, f := range []struct {
		name string
		v    int
	}{{"learners", *learners}, {"opportunities", *opps}, {"items", *items}} {
		if f.v < 1 {
			return fmt.Errorf("--%s = %d: must be 1 or more", f.name, f.v)
		}
	}
	if _, err := fitjob.NewGenerator(c); err != nil {
		return err
	}

	var n int
	if *out == "-" {
		n, err = fitjob.WriteCohort(stdout, c)
	} else {
		n, err = writeFileAtomically(*out, func(w io.Writer) (int, error) { return fitjob.WriteCohort(w, c) })
	}
	if err != nil {
		return err
	}
	if err := c.Truth().WriteFile(*truth); err != nil {
		return err
	}
	if *out != "-" {
		fmt.Fprintf(stdout, "wrote %d answers (%d learners × %d skills × %d opportunities) to %s; true parameters in %s\n",
			n, *learners, len(picked), *opps, *out, *truth)
	}
	return nil
}

// writeFileAtomically streams write's output to a synced temporary file
// beside path and renames it into place, so that a failure leaves nothing
// behind and a reader never sees half a file.
func writeFileAtomically(path string, write func(io.Writer) (int, error)) (int, error) {
	tmp, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".tmp*")
	if err != nil {
		return 0, fmt.Errorf("attain: writing %s: %w", path, err)
	}
	n, err := write(tmp)
	if err == nil {
		err = tmp.Sync()
	}
	if cerr := tmp.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Rename(tmp.Name(), path)
	}
	if err != nil {
		os.Remove(tmp.Name())
		return 0, fmt.Errorf("attain: writing %s: %w", path, err)
	}
	return n, nil
}
