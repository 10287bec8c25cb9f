package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"strings"
	"text/tabwriter"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/fitjob"
	"github.com/attain-dev/attain/state"
)

func init() {
	commands["refit"] = command{
		summary: "fit every skill's parameters from answer history and write a parameter file",
		run:     runRefit,
	}
}

// maxRejectedShown is how many rejected lines refit prints before it only
// counts them.
const maxRejectedShown = 10

func runRefit(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("refit", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: attain refit --from FILE --out FILE [--folds K] [--seed S] [--min-learners N] [--min-answers N] [--fit-forget] [--previous FILE] [--items FILE]")
		fmt.Fprintln(stderr, "\nFits every skill with enough data by EM on all its learners, scores it by next-answer prediction on learners held out in a k-fold split, and writes a new parameter file; skills without enough data keep the previous or default set.\n\nflags:")
		fs.PrintDefaults()
	}
	from := fs.String("from", "", "answer history: a JSON-lines file of native v1 events (\"-\" = standard input)")
	out := fs.String("out", "", "parameter file to write (required; written atomically, only when at least one skill was fitted)")
	folds := fs.Int("folds", fitjob.DefaultFolds, "cross-validation folds, split by learner (1 = no held-out metrics)")
	seed := fs.Int64("seed", 1, "seed of the fold split and of EM's random starts")
	minLearners := fs.Int("min-learners", fitjob.DefaultMinLearners, "learners a skill needs to be fitted")
	minAnswers := fs.Int("min-answers", 0, "answers a skill needs to be fitted (0 = no minimum)")
	fitForget := fs.Bool("fit-forget", false, "fit forget too (default: forget fixed at 0, classic BKT)")
	previous := fs.String("previous", "", "parameter set in force: the new version is one more, its default is kept, and skills that cannot be fitted keep their entry")
	items := fs.String("items", "", "item map, JSON {\"item\": [\"skill\", ...]}, for events that name an item but no skills")
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return err
		}
		return errUsage
	}
	switch {
	case fs.NArg() > 0:
		fmt.Fprintf(stderr, "attain refit: unexpected argument %q\n", fs.Arg(0))
		fs.Usage()
		return errUsage
	case *from == "":
		fmt.Fprintln(stderr, "attain refit: --from is required: the answer history to fit")
		fs.Usage()
		return errUsage
	case *out == "":
		fmt.Fprintln(stderr, "attain refit: --out is required: the parameter file to write")
		fs.Usage()
		return errUsage
	case *folds < 1:
		return fmt.Errorf("--folds = %d: must be 1 (no cross-validation) or more", *folds)
	case *minLearners < 1:
		return fmt.Errorf("--min-learners = %d: must be 1 or more", *minLearners)
	case *minAnswers < 0:
		return fmt.Errorf("--min-answers = %d: must be 0 or more", *minAnswers)
	}

	opt := fitjob.RefitOptions{
		Folds: *folds, Seed: *seed, MinLearners: *minLearners, MinAnswers: *minAnswers,
		Fit:    fitjob.Options{FitForget: *fitForget},
		Logger: zerolog.Nop(),
	}
	if *previous != "" {
		pf, err := state.LoadParamFile(*previous)
		if err != nil {
			return fmt.Errorf("--previous: %w", err)
		}
		opt.Previous = pf
	}
	var dec state.NativeDecoder
	if *items != "" {
		m, err := loadItemMap(*items)
		if err != nil {
			return fmt.Errorf("--items: %w", err)
		}
		dec.Items = m
	}

	var rejected int
	src, stats, err := openSource(*from, dec, func(e *fitjob.LineError) {
		rejected++
		if rejected <= maxRejectedShown {
			fmt.Fprintf(stderr, "attain refit: %s: skipped %v\n", *from, e)
		}
	})
	if err != nil {
		return err
	}
	h, err := fitjob.LoadHistory(ctx, src)
	if err != nil {
		return err
	}
	if st := stats(); rejected > 0 || st.Lines == 0 {
		if rejected > maxRejectedShown {
			fmt.Fprintf(stderr, "attain refit: %s: … and %d more rejected lines\n", *from, rejected-maxRejectedShown)
		}
		switch {
		case st.Lines == 0:
			fmt.Fprintf(stderr, "attain refit: %s is empty\n", *from)
		default:
			fmt.Fprintf(stderr, "attain refit: %s: %d of %d lines rejected, %d answers read\n", *from, rejected, st.Lines, st.Answers)
		}
	}
	if h.Duplicates > 0 {
		fmt.Fprintf(stderr, "attain refit: %s: %d answers repeat an id already seen for the same learner; each counted once\n", *from, h.Duplicates)
	}

	rep, err := fitjob.Refit(ctx, h, opt)
	if err != nil {
		if errors.Is(err, fitjob.ErrNothingToFit) {
			fix := "give a history with answers"
			switch {
			case h.Answers() > 0:
				fix = "give more history, or lower --min-learners (or --min-answers) to fit thinner skills"
			case rejected > 0:
				fix = "correct the rejected lines above"
			}
			return fmt.Errorf("%w; no parameter file written; fix: %s", err, fix)
		}
		return err
	}
	if err := rep.File.WriteFile(*out); err != nil {
		return err
	}
	printRefitTable(stdout, rep)
	fmt.Fprintf(stdout, "wrote %s: version %d, %d of %d skills fitted, %d learners, %d answers, in %.1fs\n",
		*out, rep.File.Version, rep.Fitted(), len(rep.Skills), rep.Learners, rep.Answers, rep.Elapsed.Seconds())
	return nil
}

// openSource picks the history source named by --from and returns it with
// a function giving its read counts afterwards. Only files exist so far;
// "topic:NAME" and "store:DIR" are reserved for the topic and store
// sources.
func openSource(from string, dec state.NativeDecoder, reject func(*fitjob.LineError)) (fitjob.Source, func() fitjob.ReadStats, error) {
	kind, rest, ok := strings.Cut(from, ":")
	if ok && (kind == "topic" || kind == "store") {
		return nil, nil, fmt.Errorf("--from %s: %s sources are not available yet; export the history to a JSON-lines file and give its path", from, kind)
	}
	if ok && kind == "file" {
		from = rest
	}
	fsrc := &fitjob.FileSource{Path: from, Decoder: dec, Reject: reject}
	return fsrc, func() fitjob.ReadStats { return fsrc.Stats }, nil
}

func loadItemMap(path string) (map[string][]string, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("attain: reading item map: %w", err)
	}
	var m map[string][]string
	if err := json.Unmarshal(b, &m); err != nil {
		return nil, fmt.Errorf("attain: item map %s: must be a JSON object of item → list of skills: %w", path, err)
	}
	return m, nil
}

func printRefitTable(w io.Writer, rep *fitjob.RefitReport) {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "skill\tlearners\tanswers\tprior\tlearn\tguess\tslip\tforget\theld-out AUC\theld-out log-loss\tdecision")
	for _, sr := range rep.Skills {
		auc, ll := "-", "-"
		if sr.Fit != nil && sr.Fit.Heldout != nil {
			auc, ll = fmt.Sprintf("%.4f", sr.Fit.Heldout.AUC), fmt.Sprintf("%.4f", sr.Fit.Heldout.LogLoss)
		}
		decision := string(sr.Decision)
		switch {
		case sr.Decision == fitjob.DecisionFitted && sr.Fit != nil:
			conv := "converged"
			if !sr.Fit.Converged {
				conv = "not converged"
			}
			decision += fmt.Sprintf(" (%d iterations, %s)", sr.Fit.Iterations, conv)
			if len(sr.Fit.Warnings) > 0 {
				decision += "; warning: " + strings.Join(sr.Fit.Warnings, "; ")
			}
		case sr.Reason != "":
			decision += ": " + sr.Reason
		}
		p := sr.Params
		fmt.Fprintf(tw, "%s\t%d\t%d\t%.4f\t%.4f\t%.4f\t%.4f\t%.4f\t%s\t%s\t%s\n",
			sr.Skill, sr.Learners, sr.Answers, p.Prior, p.Learn, p.Guess, p.Slip, p.Forget, auc, ll, decision)
	}
	tw.Flush()
	if n := rep.Overall.N(); n > 0 {
		if m, ok := rep.Overall.Metrics(); ok {
			fmt.Fprintf(w, "overall, held out (%d folds by learner; %d answers, each scored once, items with several skills by the %s): AUC %.4f, RMSE %.4f, log-loss %.4f, accuracy %.4f\n",
				rep.Folds, n, fitjob.CombineRule, m.AUC, m.RMSE, m.LogLoss, rep.Overall.Accuracy())
		}
	}
}
