package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/config"
	"github.com/attain-dev/attain/fitjob"
	"github.com/attain-dev/attain/state"
	"github.com/attain-dev/attain/stream"
)

func init() {
	commands["replay"] = command{
		summary: "replay answer history under chosen parameters and thresholds; write predictions, metrics and a report",
		run:     runReplay,
	}
}

// listFlag is a flag that may be given several times.
type listFlag []string

func (l *listFlag) String() string     { return strings.Join(*l, ",") }
func (l *listFlag) Set(s string) error { *l = append(*l, s); return nil }

func runReplay(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlags("replay", "usage: attain replay --from FILE|topic:NAME --out DIR [--params FILE|topic:NAME]... [--threshold X]... [--stuck-after N]... [--order at|arrival] [--dedupe-window N] [--items FILE] [--brokers LIST] [--config FILE]",
		"Runs answer history through the model without touching any store, consumer group or offset, and writes DIR/predictions.csv (the prediction before every answer), DIR/events.csv (the reached/stuck events the first parameter set and thresholds would have raised), DIR/metrics.json and DIR/report.html. --threshold and --stuck-after may be repeated to compare thresholds (every combination is replayed); --params may be repeated to compare parameter sets on the same history. Learners' state is kept in memory: nothing outside DIR is written, no consumer group is joined. A file whose answers are in time order per learner is streamed; one that is not, standard input, and a topic are held in memory (about 80 bytes an answer) to be put in order.", stderr)
	var params, thresholds, stuckAfters listFlag
	from := fs.String("from", "", "answer history: a JSON-lines file of native v1 events (\"-\" = standard input), or topic:NAME")
	out := fs.String("out", "", "folder to write predictions.csv, events.csv, metrics.json and report.html to (created if missing)")
	fs.Var(&params, "params", "parameter set: a parameter file, or topic:NAME (the params topic read to its end); repeat to compare sets (default: what the processor would use — the config's params file, or its params topic when params_from_topic is set — else the built-in defaults)")
	fs.Var(&thresholds, "threshold", "mastery threshold in (0, 1]; repeat for a what-if comparison (default: model.threshold of the config, 0.95)")
	fs.Var(&stuckAfters, "stuck-after", "opportunities without mastery before a stuck flag (0 = never); repeat for a what-if comparison (default: model.stuck_after of the config, 10)")
	order := fs.String("order", string(fitjob.OrderAt), "order of a file's answers per learner: \"at\" (by time, ties in file order) or \"arrival\" (file order, as the processor applies a topic); a topic is always replayed in arrival order")
	dedupe := fs.Int("dedupe-window", 0, "applied answer ids remembered per learner to skip repeats (default: consumer.dedupe_window of the config, 32)")
	items := fs.String("items", "", "item map, JSON {\"item\": [\"skill\", ...]}, for events that name an item but no skills (default: items_file of the config)")
	brokers := fs.String("brokers", "", "Kafka bootstrap brokers (comma list) for topic: sources (default: brokers of the config)")
	configPath := fs.String("config", "", "YAML config file for defaults (model thresholds, dedupe window, brokers, params file)")
	listed := fs.Int("list-rejected", fitjob.DefaultRejectsListed, "rejected records to list in metrics.json and the report (all are counted)")
	if err := parseFlags(fs, args, stderr, false); err != nil {
		return err
	}
	switch {
	case fs.NArg() > 0:
		fmt.Fprintf(stderr, "attain replay: unexpected argument %q\n", fs.Arg(0))
		fs.Usage()
		return errUsage
	case *from == "":
		fmt.Fprintln(stderr, "attain replay: --from is required: the answer history to replay")
		fs.Usage()
		return errUsage
	case *out == "":
		fmt.Fprintln(stderr, "attain replay: --out is required: the folder to write the results to")
		fs.Usage()
		return errUsage
	case *listed < 0:
		return fmt.Errorf("--list-rejected = %d: must be 0 or more", *listed)
	}
	cfg, err := config.Load(*configPath, os.Environ(), nil)
	if err != nil {
		return err
	}
	if err := cfg.Validate(); err != nil {
		return err
	}
	log := cfg.Logger(stderr, config.IsTerminal(stderr))
	if *brokers != "" {
		cfg.Brokers = strings.Split(*brokers, ",")
	}

	pols, err := replayPolicies(cfg, thresholds, stuckAfters)
	if err != nil {
		return err
	}
	if len(params) == 0 {
		// The set the processor would run under: the config's params file,
		// with the params topic laid over it when it follows the topic.
		switch {
		case cfg.ParamsFromTopic:
			params = listFlag{"topic:" + cfg.Topics.Params}
		case cfg.Params != "":
			params = listFlag{cfg.Params}
		}
	}
	var sets []fitjob.NamedParams
	for _, p := range params {
		np, err := loadReplayParams(ctx, p, cfg, log)
		if err != nil {
			return err
		}
		sets = append(sets, np)
	}
	if len(sets) == 0 {
		sets = []fitjob.NamedParams{{Name: "built-in defaults", File: state.NewParamFile()}}
	}
	window := cfg.Consumer.DedupeWindow
	if *dedupe != 0 {
		window = *dedupe
	}
	if window < 1 {
		return fmt.Errorf("--dedupe-window = %d: must be 1 or more", window)
	}
	opt := fitjob.ReplayOptions{
		Params: sets, Policies: pols, DedupeWindow: window, Order: fitjob.Order(*order), OutDir: *out,
		RejectsListed: *listed, Logger: log,
	}
	if opt.RejectsListed == 0 {
		opt.RejectsListed = -1 // count only
	}
	if *items == "" {
		*items = cfg.ItemsFile
	}
	if *items != "" {
		m, err := loadItemMap(*items)
		if err != nil {
			return fmt.Errorf("--items: %w", err)
		}
		opt.Decoder.Items = m
	}
	kind, rest, isTopic := strings.Cut(*from, ":")
	isTopic = isTopic && kind == "topic"
	if isTopic {
		// A topic is applied in arrival (offset) order, as the processor
		// applies it (ARCHITECTURE.md, Ordering).
		if flagSet(fs, "order") && *order != string(fitjob.OrderArrival) {
			return fmt.Errorf("--order %s with --from %s: a topic is replayed in arrival order, as the processor applies it; fix: leave out --order (or give --order arrival)", *order, *from)
		}
		opt.Order = fitjob.OrderArrival
	}
	rp, err := fitjob.NewReplay(opt)
	if err != nil {
		return fmt.Errorf("%w; fix: see attain replay -h", err)
	}

	stop := startReplayProgress(rp, stderr, log)
	start := time.Now()
	var res *fitjob.ReplayResult
	switch {
	case isTopic:
		res, err = replayTopic(ctx, rp, rest, opt.Decoder, cfg, log)
	default:
		path := *from
		if kind == "file" {
			path = rest
		}
		res, err = rp.RunFile(ctx, path)
	}
	stop()
	if err != nil {
		return err
	}
	elapsed := time.Since(start)
	metricsPath := filepath.Join(*out, "metrics.json")
	if err := res.WriteMetricsJSON(metricsPath); err != nil {
		return err
	}
	reportPath := filepath.Join(*out, "report.html")
	if err := res.WriteReportHTML(reportPath); err != nil {
		return err
	}
	printReplaySummary(stdout, res, elapsed)
	if abs, err := filepath.Abs(reportPath); err == nil {
		reportPath = abs
	}
	fmt.Fprintf(stdout, "report: %s\n", reportPath)
	return nil
}

// replayTopic replays a topic from its earliest retained offset to the end
// it had at the start, without a consumer group (nothing is committed).
func replayTopic(ctx context.Context, rp *fitjob.Replay, topic string, dec state.NativeDecoder, cfg config.Config, log zerolog.Logger) (*fitjob.ReplayResult, error) {
	if topic == "" {
		topic = cfg.Topics.Answers
	}
	if len(cfg.Brokers) == 0 {
		return nil, fmt.Errorf("--from topic:%s: no brokers to read the topic from; give --brokers host:port (or brokers in the config)", topic)
	}
	src, err := stream.NewTopicSource(stream.TopicSourceOptions{
		Brokers: cfg.Brokers, Topic: topic, Decoder: &dec, MaxEventBytes: cfg.Consumer.MaxEventBytes, Logger: log,
		Reject: func(r stream.TopicReject) {
			reason := r.Code
			if r.Detail != "" {
				reason += ": " + r.Detail
			}
			rp.Reject(fitjob.RejectedRecord{Partition: int32(r.Partition), Offset: r.Offset, Field: r.Field, Reason: reason})
		},
	})
	if err != nil {
		return nil, err
	}
	return rp.RunSource(ctx, src)
}

func flagSet(fs *flag.FlagSet, name string) bool {
	set := false
	fs.Visit(func(f *flag.Flag) {
		if f.Name == name {
			set = true
		}
	})
	return set
}

// replayPolicies is every combination of the given thresholds and
// stuck-after values, in the order given (thresholds outer); the config's
// values stand in for a flag not given.
func replayPolicies(cfg config.Config, thresholds, stuckAfters listFlag) ([]state.Policy, error) {
	ths := []float64{cfg.Model.Threshold}
	if len(thresholds) > 0 {
		ths = ths[:0]
		for _, s := range thresholds {
			x, err := strconv.ParseFloat(s, 64)
			if err != nil || !(x > 0 && x <= 1) {
				return nil, fmt.Errorf("--threshold %q: must be a number in (0, 1], e.g. 0.95", s)
			}
			ths = append(ths, x)
		}
	}
	sas := []uint32{uint32(cfg.Model.StuckAfter)}
	if len(stuckAfters) > 0 {
		sas = sas[:0]
		for _, s := range stuckAfters {
			n, err := strconv.ParseUint(s, 10, 32)
			if err != nil {
				return nil, fmt.Errorf("--stuck-after %q: must be a whole number of opportunities, 0 or more (0 = never flag), e.g. 10", s)
			}
			sas = append(sas, uint32(n))
		}
	}
	var pols []state.Policy
	seen := map[state.Policy]bool{}
	for _, th := range ths {
		for _, sa := range sas {
			p := state.Policy{Threshold: th, StuckAfter: sa}
			if !seen[p] {
				seen[p] = true
				pols = append(pols, p)
			}
		}
	}
	return pols, nil
}

// loadReplayParams reads a parameter file, or the params topic to its end
// laid over the config's params file.
func loadReplayParams(ctx context.Context, spec string, cfg config.Config, log zerolog.Logger) (fitjob.NamedParams, error) {
	kind, topic, ok := strings.Cut(spec, ":")
	if !ok || kind != "topic" {
		pf, err := state.LoadParamFile(spec)
		if err != nil {
			return fitjob.NamedParams{}, fmt.Errorf("--params: %w", err)
		}
		return fitjob.NamedParams{Name: spec, File: pf}, nil
	}
	if topic == "" {
		topic = cfg.Topics.Params
	}
	if len(cfg.Brokers) == 0 {
		return fitjob.NamedParams{}, fmt.Errorf("--params %s: no brokers to read the topic from; give --brokers host:port (or brokers in the config)", spec)
	}
	// As the processor does: the topic's skills laid over the config's
	// params file (or the defaults).
	var base *state.ParamFile
	if cfg.Params != "" {
		var err error
		if base, err = state.LoadParamFile(cfg.Params); err != nil {
			return fitjob.NamedParams{}, fmt.Errorf("--params %s: the base set (params of the config): %w", spec, err)
		}
	}
	// A registry below every real version, so that whatever the topic holds
	// is swapped in.
	reg := state.NewRegistry(&state.ParamFile{Version: 0, Default: state.DefaultParams(), Skills: map[string]state.SkillParams{}})
	f := stream.NewParamsFollower(reg, stream.NewMetrics(), stream.ParamsFollowerOptions{Brokers: cfg.Brokers, Topic: topic, Base: base, Logger: log})
	if err := f.Start(ctx); err != nil {
		return fitjob.NamedParams{}, fmt.Errorf("--params %s: %w", spec, err)
	}
	if err := f.Stop(); err != nil {
		return fitjob.NamedParams{}, fmt.Errorf("--params %s: %w", spec, err)
	}
	pf := reg.Current()
	if len(pf.Skills) == 0 {
		log.Warn().Str("topic", topic).Msg("the params topic holds no skill entries; the default set serves every skill")
	}
	return fitjob.NamedParams{Name: spec, File: pf}, nil
}

// startReplayProgress shows progress until the returned stop is called: a
// bar on a terminal, a log line every 10 s otherwise.
func startReplayProgress(rp *fitjob.Replay, stderr io.Writer, log zerolog.Logger) (stop func()) {
	done := make(chan struct{})
	var wg sync.WaitGroup
	tty := config.IsTerminal(stderr)
	every := 10 * time.Second
	if tty {
		every = 250 * time.Millisecond
	}
	start := time.Now()
	wg.Add(1)
	go func() {
		defer wg.Done()
		t := time.NewTicker(every)
		defer t.Stop()
		shown := false
		for {
			select {
			case <-done:
				if shown {
					fmt.Fprint(stderr, "\r\033[K")
				}
				return
			case <-t.C:
				line := progressLine(rp.Progress(), time.Since(start), tty)
				if tty {
					fmt.Fprint(stderr, "\r\033[K"+line)
					shown = true
				} else {
					log.Info().Msg("replay: " + line)
				}
			}
		}
	}()
	return func() {
		close(done)
		wg.Wait()
	}
}

// progressLine formats one progress report: done share (of the input's
// bytes), answers, rate and the time left at that rate.
func progressLine(p fitjob.ReplayProgress, elapsed time.Duration, bar bool) string {
	rate := float64(p.Answers) / max(elapsed.Seconds(), 1e-9)
	var b strings.Builder
	if p.TotalBytes > 0 {
		frac := min(float64(p.Bytes)/float64(p.TotalBytes), 1)
		if bar {
			const width = 30
			n := int(frac * width)
			b.WriteString("[" + strings.Repeat("#", n) + strings.Repeat(".", width-n) + "] ")
		}
		fmt.Fprintf(&b, "%5.1f%%  ", 100*frac)
		fmt.Fprintf(&b, "%d answers  %.0f answers/s", p.Answers, rate)
		if frac > 0 && frac < 1 {
			left := time.Duration(float64(elapsed) * (1 - frac) / frac).Round(time.Second)
			fmt.Fprintf(&b, "  about %s left", left)
		}
	} else {
		fmt.Fprintf(&b, "%d records, %d answers  %.0f answers/s", p.Records, p.Answers, rate)
	}
	if p.Sorting {
		b.WriteString("  (second pass: sorting by time)")
	}
	return b.String()
}

func printReplaySummary(w io.Writer, res *fitjob.ReplayResult, elapsed time.Duration) {
	fmt.Fprintf(w, "replayed %d answers of %d learners at %d skills from %s in %.1fs (%.0f answers/s); %d repeated ids skipped, %d late, %d records rejected\n",
		res.Answers, res.Learners, len(res.Skills), res.Source, elapsed.Seconds(), float64(res.Answers)/max(elapsed.Seconds(), 1e-9),
		res.Duplicates, res.Late, res.Rejected)
	for _, m := range res.Models {
		fmt.Fprintf(w, "  %s (version %d): AUC %s, RMSE %s, log-loss %s, accuracy %s\n", m.Name, m.Version,
			fmtMetric(m.Overall.AUC), fmtMetric(m.Overall.RMSE), fmtMetric(m.Overall.LogLoss), fmtMetric(m.Overall.Accuracy))
		for _, ms := range m.Mastery {
			fmt.Fprintf(w, "    threshold %g, stuck after %d: %d of %d learner-skills reached mastery (median %s opportunities), %d flagged stuck (%d mastered later)\n",
				ms.Policy.Threshold, ms.Policy.StuckAfter, ms.Reached, ms.LearnerSkills, fmtMetric(ms.Median), ms.Stuck, ms.StuckThenReached)
		}
	}
}

func fmtMetric(x float64) string {
	if x != x {
		return "–"
	}
	return strconv.FormatFloat(x, 'f', 4, 64)
}
