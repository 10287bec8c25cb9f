package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/config"
	"github.com/attain-dev/attain/fitjob"
	"github.com/attain-dev/attain/state"
	"github.com/attain-dev/attain/stream"
)

func init() {
	commands["refit"] = command{
		summary: "refit every skill's parameters from answer history, gate them against the set in force, write or publish the accepted ones",
		run:     runRefit,
	}
}

// maxRejectedShown is how many rejected records refit prints before it
// only counts them.
const maxRejectedShown = 10

const refitUsage = `usage: attain refit --from SOURCE [--brokers LIST] [--out FILE] [--report FILE] [--publish] [--dry-run] [--current FILE|topic]
                    [--config FILE] [--folds K] [--seed S] [--min-learners N] [--min-answers N] [--margin X]
                    [--fit-forget] [--screen-answers N] [--order at|arrival] [--items FILE] [--scratch DIR]

Fits every skill of the history by EM on all its learners and, once per fold, without that
fold's learners; a skill's new parameters replace the ones in force only if it has enough
data, the fit is not degenerate (guess and slip below 0.5), and its held-out log-loss beats
the set in force on the same learners by --margin. Every skill's verdict and its reason are
printed, logged and written to the --report.

SOURCE is a JSON-lines file of native v1 events ("-" = standard input; file:PATH also works),
topic:NAME (every partition from the earliest retained offset to the end at the start; no
consumer group), or store:DIR (a processor's data directory; the processor must be stopped:
Pebble locks a store it has open).

An accepted set gets the next version: with --publish it is sent to the params topic
(topics.params), all skills in one batch; with --out the whole new parameter file is written
(atomically). --dry-run prints the verdicts and writes nothing.

flags:`

func runRefit(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("refit", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintln(stderr, refitUsage)
		fs.PrintDefaults()
	}
	from := fs.String("from", "", "answer history: FILE, topic:NAME or store:DIR (required)")
	brokers := fs.String("brokers", "", "Kafka bootstrap brokers, comma list, for topic: sources, --publish and --current topic (default: brokers of the config, env ATTAIN_BROKERS)")
	out := fs.String("out", "", "parameter file to write with the new set (atomically; only when a skill was accepted)")
	reportPath := fs.String("report", "", "refit report to write (JSON: every skill's verdict, reason and figures)")
	publish := fs.Bool("publish", false, "send the accepted skills to the params topic (topics.params) as the next version")
	dryRun := fs.Bool("dry-run", false, "print the verdicts; write and publish nothing")
	current := fs.String("current", "", "the set in force to judge against: a parameter file, or \"topic\" (the params topic read to its end); default: the params topic with --publish, else the config's params file, else the built-in defaults")
	previous := fs.String("previous", "", "the same as --current FILE (kept for older scripts)")
	configPath := fs.String("config", "", "YAML config file (refit.*, brokers, topics, consumer.max_event_bytes, items_file, data_dir)")
	folds := fs.Int("folds", 0, "cross-validation folds, split by learner, at least 2 (default: refit.folds, 5)")
	seed := fs.Int64("seed", 1, "seed of the fold split and of EM's random starts")
	minLearners := fs.Int("min-learners", 0, "learners a skill needs (default: refit.min_learners, 50)")
	minAnswers := fs.Int("min-answers", 0, "answers a skill needs (default: refit.min_answers, 500)")
	margin := fs.Float64("margin", math.NaN(), "held-out log-loss improvement a skill needs, in nats per answer (default: refit.margin, 0)")
	fitForget := fs.Bool("fit-forget", false, "fit forget too (default: forget fixed at 0, classic BKT)")
	screen := fs.Int("screen-answers", 0, fmt.Sprintf("fits of more answers than this run the random starts on a subsample of that size first (default %d; -1 = never)", fitjob.DefaultScreenAnswers))
	order := fs.String("order", "", "order of each learner's answers: \"at\" (by time, ties in source order; the default for files) or \"arrival\" (source order; the default for topics)")
	items := fs.String("items", "", "item map, JSON {\"item\": [\"skill\", ...]}, for events that name an item but no skills (default: items_file of the config)")
	scratch := fs.String("scratch", "", "folder for the on-disk grouping of the history, about 25 bytes per answer (default: the system temporary folder)")
	if err := parseFlags(fs, args, stderr, false); err != nil {
		return err
	}
	set := map[string]bool{}
	fs.Visit(func(f *flag.Flag) { set[f.Name] = true })
	switch {
	case fs.NArg() > 0:
		fmt.Fprintf(stderr, "attain refit: unexpected argument %q\n", fs.Arg(0))
		fs.Usage()
		return errUsage
	case *from == "":
		fmt.Fprintln(stderr, "attain refit: --from is required: the answer history to fit")
		fs.Usage()
		return errUsage
	case *out == "" && *reportPath == "" && !*publish && !*dryRun:
		fmt.Fprintln(stderr, "attain refit: nothing to do with the result: give --out FILE, --report FILE, --publish, or --dry-run")
		fs.Usage()
		return errUsage
	case *current != "" && *previous != "":
		return fmt.Errorf("--current and --previous name the same thing; give one")
	case *order != "" && *order != "at" && *order != "arrival":
		return fmt.Errorf("--order = %q: must be \"at\" or \"arrival\"", *order)
	}
	if *previous != "" {
		*current = *previous
	}

	cfg, err := config.Load(*configPath, os.Environ(), nil)
	if err != nil {
		return err
	}
	if set["brokers"] {
		cfg.Brokers = splitList(*brokers)
	}
	if set["folds"] {
		cfg.Refit.Folds = *folds
	}
	if set["min-learners"] {
		cfg.Refit.MinLearners = *minLearners
	}
	if set["min-answers"] {
		cfg.Refit.MinAnswers = *minAnswers
	}
	if set["margin"] {
		cfg.Refit.Margin = *margin
	}
	if *items != "" {
		cfg.ItemsFile = *items
	}
	if err := refitFlagErrors(cfg, set); err != nil {
		return err
	}
	if err := cfg.Validate(); err != nil {
		return err
	}
	log := cfg.Logger(stderr, config.IsTerminal(stderr))
	if *dryRun && (*out != "" || *reportPath != "" || *publish) {
		fmt.Fprintln(stderr, "attain refit: --dry-run: --out, --report and --publish are ignored; nothing is written or published")
		*out, *reportPath, *publish = "", "", false
	}
	needBrokers := func(what string) error {
		if len(cfg.Brokers) == 0 {
			return fmt.Errorf("%s needs Kafka brokers; fix: give --brokers host:port[,host:port…] (or brokers in the config, or ATTAIN_BROKERS)", what)
		}
		return nil
	}
	if *publish {
		if err := needBrokers("--publish"); err != nil {
			return err
		}
		// A new cluster may not have the params topic yet; it is made as
		// attain run makes it (one partition, compacted).
		tctx, cancel := context.WithTimeout(ctx, 30*time.Second)
		err := stream.EnsureTopics(tctx, cfg.Brokers, []stream.TopicSpec{{Name: cfg.Topics.Params, Partitions: 1, Compacted: true}}, log)
		cancel()
		if err != nil {
			return err
		}
	}

	// The set in force.
	cur, curName, err := loadCurrent(ctx, *current, *publish, cfg, log)
	if err != nil {
		return err
	}

	var dec state.NativeDecoder
	if cfg.ItemsFile != "" {
		m, err := loadItemMap(cfg.ItemsFile)
		if err != nil {
			return fmt.Errorf("--items: %w", err)
		}
		dec.Items = m
	}
	src, err := openSource(*from, dec, cfg, needBrokers, stderr, log)
	if err != nil {
		return err
	}
	defer src.close()

	opt := fitjob.GatedRefitOptions{
		Gate:          fitjob.GateOptions{MinLearners: cfg.Refit.MinLearners, MinAnswers: cfg.Refit.MinAnswers, Margin: cfg.Refit.Margin},
		Folds:         cfg.Refit.Folds,
		Seed:          *seed,
		Fit:           fitjob.Options{FitForget: *fitForget},
		ScreenAnswers: *screen,
		Current:       cur,
		Sorter:        fitjob.SorterOptions{Dir: *scratch, ArrivalOrder: *order == "arrival" || (*order == "" && src.kind == "topic"), Logger: log},
		Logger:        log,
	}
	rep, err := fitjob.GatedRefit(ctx, src.Source, opt)
	src.summary()
	rejected := *src.rejected
	if err != nil {
		if errors.Is(err, fitjob.ErrNothingToFit) {
			fix := "give a history with answers"
			if rejected > 0 {
				fix = "correct the rejected records above"
			}
			return fmt.Errorf("%w; no parameter file written, nothing published; fix: %s", err, fix)
		}
		return err
	}
	rep.Data.Rejected = rejected
	if rep.Data.Duplicates > 0 {
		fmt.Fprintf(stderr, "attain refit: %s: %d answers repeat an id already seen for the same learner; each counted once\n", src.Name(), rep.Data.Duplicates)
	}
	printRefitTable(stdout, rep, curName)

	fitted := 0
	for _, sv := range rep.Skills {
		if sv.Verdict != fitjob.VerdictTooLittleData {
			fitted++
		}
	}
	if fitted == 0 {
		var why []string
		for _, sv := range rep.Skills {
			why = append(why, sv.Skill+": "+sv.Reason)
		}
		return fmt.Errorf("%w: no skill has enough data (%s); no parameter file written, nothing published; fix: give more history, or lower --min-learners / --min-answers (refit.min_learners, refit.min_answers)",
			fitjob.ErrNothingToFit, strings.Join(why, "; "))
	}
	if *dryRun {
		fmt.Fprintf(stdout, "dry run: %d of %d skills would be accepted as version %d; nothing written or published\n", rep.Accepted, len(rep.Skills), opt.Current.Version+1)
		return nil
	}

	// Publish first, then files: a set on disk that was never published
	// would look in force when it is not. Each step is whole or not at all.
	if rep.Accepted > 0 && *publish {
		res, err := stream.PublishParams(ctx, stream.ParamsPublishOptions{Brokers: cfg.Brokers, Topic: cfg.Topics.Params, Logger: log}, rep.Version, rep.Publish)
		if err != nil {
			return fmt.Errorf("%w; nothing written", err)
		}
		rep.Published, rep.Topic = true, cfg.Topics.Params
		fmt.Fprintf(stdout, "published version %d (%d skills) to %s at offset %d\n", rep.Version, res.Skills, cfg.Topics.Params, res.BaseOffset)
	}
	if rep.Accepted > 0 && *out != "" {
		if err := rep.File.WriteFile(*out); err != nil {
			return err
		}
		rep.ParamFile = *out
		fmt.Fprintf(stdout, "wrote %s: version %d\n", *out, rep.Version)
	}
	if *reportPath != "" {
		if err := rep.WriteFile(*reportPath); err != nil {
			return err
		}
		fmt.Fprintf(stdout, "wrote the refit report %s\n", *reportPath)
	}
	if rep.Accepted == 0 {
		fmt.Fprintf(stdout, "no skill accepted: the set in force (version %d) stays; no parameter file written, nothing published\n", cur.Version)
		return nil
	}
	fmt.Fprintf(stdout, "version %d: %d of %d skills accepted, %d learners, %d answers, in %.1fs\n",
		rep.Version, rep.Accepted, len(rep.Skills), rep.Data.Learners, rep.Data.Answers, rep.ElapsedSeconds)
	return nil
}

func splitList(s string) []string {
	var out []string
	for _, p := range strings.Split(s, ",") {
		if p = strings.TrimSpace(p); p != "" {
			out = append(out, p)
		}
	}
	return out
}

// refitFlagErrors names the flag (rather than the config key) of a bad
// value given on the command line.
func refitFlagErrors(cfg config.Config, set map[string]bool) error {
	var errs []error
	if set["folds"] && cfg.Refit.Folds < 2 {
		errs = append(errs, fmt.Errorf("--folds = %d: must be 2 or more (the gate needs held-out learners)", cfg.Refit.Folds))
	}
	if set["min-learners"] && cfg.Refit.MinLearners < 1 {
		errs = append(errs, fmt.Errorf("--min-learners = %d: must be 1 or more", cfg.Refit.MinLearners))
	}
	if set["min-answers"] && cfg.Refit.MinAnswers < 1 {
		errs = append(errs, fmt.Errorf("--min-answers = %d: must be 1 or more", cfg.Refit.MinAnswers))
	}
	if set["margin"] && !(cfg.Refit.Margin >= 0 && !math.IsInf(cfg.Refit.Margin, 1)) {
		errs = append(errs, fmt.Errorf("--margin = %v: must be a finite number of at least 0", cfg.Refit.Margin))
	}
	return errors.Join(errs...)
}

// loadCurrent returns the set in force and a name for it. With --publish
// the params topic always counts (laid over the file, if one is given),
// so that the new version continues the topic's.
func loadCurrent(ctx context.Context, spec string, publish bool, cfg config.Config, log zerolog.Logger) (*state.ParamFile, string, error) {
	file := spec
	fromTopic := publish
	if spec == "topic" {
		file, fromTopic = "", true
	}
	if file == "" && spec == "" {
		file = cfg.Params
	}
	base := state.NewParamFile()
	name := "built-in defaults"
	if file != "" {
		pf, err := state.LoadParamFile(file)
		if err != nil {
			return nil, "", fmt.Errorf("--current: %w", err)
		}
		base, name = pf, file
	}
	if !fromTopic {
		return base, name, nil
	}
	if len(cfg.Brokers) == 0 {
		return nil, "", fmt.Errorf("--current topic needs Kafka brokers; fix: give --brokers host:port (or brokers in the config)")
	}
	pf, err := stream.ReadParams(ctx, cfg.Brokers, cfg.Topics.Params, base, log)
	if err != nil {
		return nil, "", fmt.Errorf("reading the set in force from %s: %w", cfg.Topics.Params, err)
	}
	return pf, cfg.Topics.Params + " over " + name, nil
}

// refitSource is a history source, the count of its rejected records so
// far, and what to say about them once read.
type refitSource struct {
	fitjob.Source
	kind     string // "file", "topic" or "store"
	rejected *int64
	summary  func() // prints the source's read counts, after reading
	close    func()
}

// openSource opens the history named by --from: a file, topic:NAME or
// store:DIR. Rejected records are printed (the first few) and counted.
func openSource(from string, dec state.NativeDecoder, cfg config.Config, needBrokers func(string) error, stderr io.Writer, log zerolog.Logger) (refitSource, error) {
	kind, rest, ok := strings.Cut(from, ":")
	if !ok || (kind != "topic" && kind != "store" && kind != "file") {
		kind, rest = "file", from
	}
	rs := refitSource{kind: kind, rejected: new(int64), summary: func() {}, close: func() {}}
	shown := func(what string) {
		if *rs.rejected++; *rs.rejected <= maxRejectedShown {
			fmt.Fprintf(stderr, "attain refit: %s: skipped %s\n", from, what)
		}
	}
	moreShown := func() {
		if n := *rs.rejected; n > maxRejectedShown {
			what := "records"
			if kind == "file" {
				what = "lines"
			}
			fmt.Fprintf(stderr, "attain refit: %s: … and %d more rejected %s\n", from, n-maxRejectedShown, what)
		}
	}
	switch kind {
	case "topic":
		if rest == "" {
			rest = cfg.Topics.Answers
		}
		if err := needBrokers("--from topic:" + rest); err != nil {
			return rs, err
		}
		dec.MaxBytes = cfg.Consumer.MaxEventBytes
		src, err := stream.NewTopicSource(stream.TopicSourceOptions{
			Brokers: cfg.Brokers, Topic: rest, Decoder: &dec, MaxEventBytes: cfg.Consumer.MaxEventBytes, Logger: log,
			Reject: func(r stream.TopicReject) {
				shown(fmt.Sprintf("partition %d offset %d: %s: %s", r.Partition, r.Offset, r.Code, r.Detail))
			},
		})
		if err != nil {
			return rs, err
		}
		rs.Source = src
		rs.summary = func() {
			moreShown()
			st := src.Stats()
			fmt.Fprintf(stderr, "attain refit: %s: read %d records of %d partitions in %.1fs (%.0f answers/s), %d rejected\n",
				src.Name(), st.Records, st.Partitions, st.Elapsed.Seconds(), float64(st.Answers)/max(st.Elapsed.Seconds(), 1e-9), st.Rejected)
			if st.Missing > 0 {
				fmt.Fprintf(stderr, "attain refit: %s: %d offsets held no record (compacted, transaction markers, or deleted by retention while reading)\n", src.Name(), st.Missing)
			}
		}
		return rs, nil
	case "store":
		if rest == "" {
			rest = cfg.DataDir
		}
		src, err := fitjob.OpenStoreSource(rest, log)
		if err != nil {
			return rs, fmt.Errorf("--from store:%s: %w", rest, err)
		}
		rs.Source, rs.close = src, func() { src.Close() }
		return rs, nil
	}
	if rest != "-" {
		if _, err := os.Stat(rest); err != nil {
			return rs, fmt.Errorf("--from %s: %w", from, err)
		}
	}
	fsrc := &fitjob.FileSource{Path: rest, Decoder: dec, Reject: func(e *fitjob.LineError) { shown(e.Error()) }}
	rs.Source = fsrc
	rs.summary = func() {
		moreShown()
		switch st := fsrc.Stats; {
		case st.Lines == 0:
			fmt.Fprintf(stderr, "attain refit: %s is empty\n", rest)
		case st.Rejected > 0:
			fmt.Fprintf(stderr, "attain refit: %s: %d of %d lines rejected, %d answers read\n", rest, st.Rejected, st.Lines, st.Answers)
		}
	}
	return rs, nil
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

// printRefitTable prints one row per skill: its data, the candidate's
// parameters, both held-out log-losses and the verdict with its reason;
// then the held-out log-loss over all skills' answers.
func printRefitTable(w io.Writer, rep *fitjob.GateReport, current string) {
	fmt.Fprintf(w, "refit of %s: %d answers, %d learners, %s to %s; judged against %s (version %d)\n",
		rep.Source, rep.Data.Answers, rep.Data.Learners, fmtDay(rep.Data.First), fmtDay(rep.Data.Last), current, rep.CurrentVersion)
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "skill\tlearners\tanswers\tprior\tlearn\tguess\tslip\tforget\theld-out AUC\theld-out log-loss\tin force\tverdict")
	var candLL, curLL float64
	var n int
	for _, sv := range rep.Skills {
		row := []string{sv.Skill, fmt.Sprint(sv.Learners), fmt.Sprint(sv.Answers)}
		if c := sv.Candidate; c != nil {
			p := c.Params
			row = append(row, f4(p.Prior), f4(p.Learn), f4(p.Guess), f4(p.Slip), f4(p.Forget))
		} else {
			row = append(row, "-", "-", "-", "-", "-")
		}
		auc, ll, inForce := "-", "-", "-"
		if sv.Candidate != nil && sv.Candidate.Heldout != nil {
			h := sv.Candidate.Heldout
			ll = f4(h.LogLoss)
			if h.AUC != nil {
				auc = f4(*h.AUC)
			}
			if ch := sv.Current.Heldout; ch != nil {
				inForce = f4(ch.LogLoss)
				candLL += h.LogLoss * float64(h.Answers)
				curLL += ch.LogLoss * float64(ch.Answers)
				n += h.Answers
			}
		}
		verdict := sv.Verdict.String()
		if sv.Reason != "" {
			verdict += ": " + sv.Reason
		}
		if sv.Candidate != nil && len(sv.Candidate.Warnings) > 0 {
			verdict += "; warning: " + strings.Join(sv.Candidate.Warnings, "; ")
		}
		row = append(row, auc, ll, inForce, verdict)
		fmt.Fprintln(tw, strings.Join(row, "\t"))
	}
	tw.Flush()
	if n > 0 {
		fmt.Fprintf(w, "overall, held out (%d folds by learner; %d answers of the fitted skills, each skill's answers scored by that skill): log-loss %.4f refitted, %.4f in force\n",
			rep.Options.Folds, n, candLL/float64(n), curLL/float64(n))
	}
	fmt.Fprintf(w, "%d accepted, %d rejected\n", rep.Accepted, rep.Rejected)
}

func f4(x float64) string { return fmt.Sprintf("%.4f", x) }

func fmtDay(t time.Time) string {
	if t.IsZero() {
		return "-"
	}
	return t.UTC().Format(time.RFC3339)
}
