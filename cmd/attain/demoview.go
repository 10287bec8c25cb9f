package main

import (
	"fmt"
	"io"
	"slices"
	"strconv"
	"strings"
	"time"
	"unicode/utf8"

	"github.com/attain-dev/attain/state"
	"github.com/attain-dev/attain/stream"
)

// demoSnapshot is what the demo's view shows at one moment.
type demoSnapshot struct {
	Stage     string
	Total     int64 // input messages the run produces: the cohort plus the malformed ones
	Malformed int
	Produced  int64 // input messages the broker has acknowledged
	Answers   int64 // cohort answers among them

	// The daemon's counters (staged by the processor) and its outbox.
	Applied, Duplicates, DeadLettered, Rederived int64
	OutboxDepth                                  int64

	Skills []demoSkillRow
	// Read back from the output topics.
	ReachedEvents, StuckEvents, DuplicateEvents, OtherEvents int64
	MasteredLearners, StuckLearners, ActiveLearners          int
	DeadLetterBodies                                         []stream.DeadLetterBody

	MasteryTopic, DeadLetterTopic string
	Threshold                     float64
	StuckAfter                    int

	// Swap is the half-way refit (nil before it); VersionBefore and
	// VersionAfter count events read back by params_version, on answers
	// produced before and after the swap.
	Swap                        *demoSwap
	VersionBefore, VersionAfter map[int64]int64
	// OddEvents are (up to three) events on answers after the swap that
	// carry the old version.
	OddEvents []string
}

// demoSkillRow is one skill's line of the view and the summary.
type demoSkillRow struct {
	Skill      string
	Learners   int   // learners who have answered it (produced)
	Answers    int64 // answers produced
	Mastered   int   // learners with a reached event
	Stuck      int   // learners with a stuck event
	MedianOpps float64
	HasMedian  bool
}

// demoSummary is the final snapshot and what only the end knows.
type demoSummary struct {
	demoSnapshot
	Elapsed, Producing time.Duration
	Learners           int
	Interrupted        bool
	Settled            bool
	Truth              []state.Params // per skill, in Skills order
}

// demoView draws the live view: on a terminal, a block of lines redrawn
// in place (ANSI cursor movement) at every update; elsewhere, a plain
// progress line every demoPlainEvery and a line at every change of step.
type demoView struct {
	w         io.Writer
	tty       bool
	start     time.Time
	drawn     int // lines of the last frame (terminal)
	lastPlain time.Time
	lastStage string
	samples   []demoSample
	swapShown bool // plain output: the swap's lines are written once
}

type demoSample struct {
	t                 time.Time
	produced, applied int64
}

func newDemoView(w io.Writer, tty bool) *demoView {
	return &demoView{w: w, tty: tty, start: time.Now()}
}

// ANSI control sequences (ECMA-48): hide and show the cursor, move it up,
// erase to the end of the line and of the screen.
const (
	ansiHideCursor = "\x1b[?25l"
	ansiShowCursor = "\x1b[?25h"
	ansiEraseLine  = "\x1b[K"
	ansiEraseDown  = "\x1b[J"
)

// header prints the fixed lines once.
func (v *demoView) header(lines []string) {
	var b strings.Builder
	for _, l := range lines {
		b.WriteString(l + "\n")
	}
	b.WriteString("\n")
	if v.tty {
		b.WriteString(ansiHideCursor)
	}
	io.WriteString(v.w, b.String())
}

// update shows s.
func (v *demoView) update(s demoSnapshot) {
	now := time.Now()
	prodRate, applRate := v.rates(now, s)
	if v.tty {
		v.redraw(v.frame(now, s, prodRate, applRate))
		return
	}
	if s.Stage != v.lastStage {
		fmt.Fprintf(v.w, "%7s  %s\n", seconds(now.Sub(v.start)), s.Stage)
		v.lastStage = s.Stage
	}
	if s.Swap != nil && !v.swapShown {
		for _, l := range swapLines(s.Swap) {
			fmt.Fprintf(v.w, "%7s  %s\n", "", l)
		}
		v.swapShown = true
	}
	if now.Sub(v.lastPlain) >= demoPlainEvery {
		v.plainLine(now, s, applRate)
		v.lastPlain = now
	}
}

// finish shows the final state and gives the terminal its cursor back.
func (v *demoView) finish(s demoSnapshot) {
	now := time.Now()
	prodRate, applRate := v.rates(now, s)
	if v.tty {
		v.redraw(v.frame(now, s, prodRate, applRate))
		io.WriteString(v.w, ansiShowCursor+"\n")
		return
	}
	if s.Stage != v.lastStage {
		fmt.Fprintf(v.w, "%7s  %s\n", seconds(now.Sub(v.start)), s.Stage)
	}
	v.plainLine(now, s, applRate)
	io.WriteString(v.w, "\n")
}

// rates returns produced and applied answers per second over the last
// second.
func (v *demoView) rates(now time.Time, s demoSnapshot) (produced, applied float64) {
	v.samples = append(v.samples, demoSample{now, s.Produced, s.Applied + s.Duplicates + s.DeadLettered})
	i := 0
	for i < len(v.samples)-1 && now.Sub(v.samples[i+1].t) >= time.Second {
		i++
	}
	v.samples = v.samples[i:]
	first, last := v.samples[0], v.samples[len(v.samples)-1]
	dt := last.t.Sub(first.t).Seconds()
	if dt < 0.2 {
		return 0, 0
	}
	return float64(last.produced-first.produced) / dt, float64(last.applied-first.applied) / dt
}

// frame is the terminal view's block of lines (at most 78 columns).
func (v *demoView) frame(now time.Time, s demoSnapshot, prodRate, applRate float64) []string {
	done := s.Applied + s.Duplicates + s.DeadLettered
	lines := []string{
		fmt.Sprintf("%7s  %s", seconds(now.Sub(v.start)), s.Stage),
		fmt.Sprintf("  %s %3.0f%%", bar(40, done, s.Produced, s.Total), percent(done, s.Total)),
		fmt.Sprintf("  applied %s · dead-lettered %s · produced %s of %s",
			thousands(s.Applied+s.Duplicates), thousands(s.DeadLettered), thousands(s.Produced), thousands(s.Total)),
		fmt.Sprintf("  answers per second: produced %s · applied %s", thousands(int64(prodRate+0.5)), thousands(int64(applRate+0.5))),
		"",
	}
	rows := [][]string{{"skill", "learners", "mastered", "stuck"}}
	for _, r := range s.Skills {
		rows = append(rows, []string{r.Skill, thousands(int64(r.Learners)), thousands(int64(r.Mastered)), thousands(int64(r.Stuck))})
	}
	lines = append(lines, table("  ", rows)...)
	lines = append(lines, "",
		fmt.Sprintf("  stuck learners: %s · outbox depth: %s", thousands(int64(s.StuckLearners)), thousands(s.OutboxDepth)),
		fmt.Sprintf("  dead letters: %s (see %s)", thousands(s.DeadLettered), s.DeadLetterTopic))
	if s.Swap != nil {
		lines = append(lines, "")
		for _, l := range swapLines(s.Swap) {
			lines = append(lines, "  "+l)
		}
	}
	return lines
}

// plainLine is the progress line written when stdout is not a terminal.
func (v *demoView) plainLine(now time.Time, s demoSnapshot, applRate float64) {
	done := s.Applied + s.Duplicates + s.DeadLettered
	mastered := 0
	for _, r := range s.Skills {
		mastered += r.Mastered
	}
	fmt.Fprintf(v.w, "%7s  produced %s/%s (%.0f%%), applied %s, %s answers/s, mastered %s, stuck learners %s, outbox %s, dead letters %s\n",
		seconds(now.Sub(v.start)), thousands(s.Produced), thousands(s.Total), percent(s.Produced, s.Total),
		thousands(done), thousands(int64(applRate+0.5)), thousands(int64(mastered)),
		thousands(int64(s.StuckLearners)), thousands(s.OutboxDepth), thousands(s.DeadLettered))
}

// viewColumns is the widest line the terminal view draws: a line that
// wrapped would throw the cursor movement of the next redraw off, and 80
// columns is the common default terminal width (common practice).
const viewColumns = 79

// redraw replaces the last frame with lines.
func (v *demoView) redraw(lines []string) {
	var b strings.Builder
	if v.drawn > 0 {
		fmt.Fprintf(&b, "\r\x1b[%dA", v.drawn)
	}
	for _, l := range lines {
		if utf8.RuneCountInString(l) > viewColumns {
			l = string([]rune(l)[:viewColumns])
		}
		b.WriteString(l + ansiEraseLine + "\n")
	}
	b.WriteString(ansiEraseDown)
	io.WriteString(v.w, b.String())
	v.drawn = len(lines)
}

// bar draws done (full blocks), then produced but not yet done (shaded),
// then the rest of total (light shade), in width cells.
func bar(width int, done, produced, total int64) string {
	if total <= 0 {
		return "[" + strings.Repeat("░", width) + "]"
	}
	cells := func(n int64) int { return int(min(max(n, 0), total) * int64(width) / total) }
	d, p := cells(done), cells(produced)
	p = max(p, d)
	return "[" + strings.Repeat("█", d) + strings.Repeat("▒", p-d) + strings.Repeat("░", width-p) + "]"
}

func percent(n, total int64) float64 {
	if total <= 0 {
		return 0
	}
	return 100 * float64(n) / float64(total)
}

// seconds spells d as "12.3s".
func seconds(d time.Duration) string {
	return strconv.FormatFloat(d.Seconds(), 'f', 1, 64) + "s"
}

// thousands spells n with a comma between groups of three digits.
func thousands(n int64) string {
	s := strconv.FormatInt(n, 10)
	neg := strings.HasPrefix(s, "-")
	if neg {
		s = s[1:]
	}
	var b strings.Builder
	for i, c := range s {
		if i > 0 && (len(s)-i)%3 == 0 {
			b.WriteByte(',')
		}
		b.WriteRune(c)
	}
	if neg {
		return "-" + b.String()
	}
	return b.String()
}

// table lays rows out in columns two spaces apart, the first column
// (names) flush left and the others (numbers) flush right, each line
// prefixed with indent. Widths count runes.
func table(indent string, rows [][]string) []string {
	var widths []int
	for _, r := range rows {
		for i, c := range r {
			if i >= len(widths) {
				widths = append(widths, 0)
			}
			widths[i] = max(widths[i], utf8.RuneCountInString(c))
		}
	}
	out := make([]string, len(rows))
	for j, r := range rows {
		var b strings.Builder
		b.WriteString(indent)
		for i, c := range r {
			pad := strings.Repeat(" ", widths[i]-utf8.RuneCountInString(c))
			switch {
			case i == 0:
				b.WriteString(c + pad)
			default:
				b.WriteString("  " + pad + c)
			}
		}
		out[j] = strings.TrimRight(b.String(), " ")
	}
	return out
}

// wrap breaks text at spaces into lines of at most width runes, the first
// prefixed with first and the others with rest (a word longer than a line
// stays whole).
func wrap(text, first, rest string, width int) []string {
	var out []string
	cur := first
	empty := true
	for _, w := range strings.Fields(text) {
		if !empty && utf8.RuneCountInString(cur)+1+utf8.RuneCountInString(w) > width {
			out = append(out, cur)
			cur, empty = rest, true
		}
		if !empty {
			cur += " "
		}
		cur += w
		empty = false
	}
	return append(out, cur)
}

// writeDemoSummary prints the end-of-run summary.
func writeDemoSummary(w io.Writer, s demoSummary) {
	var b strings.Builder
	line := func(l string) { b.WriteString(l + "\n") }
	lines := func(ls []string) {
		for _, l := range ls {
			line(l)
		}
	}
	switch {
	case s.Interrupted && s.Settled:
		line("Summary (interrupted: the answers produced so far, all of them applied)")
	case s.Interrupted:
		line("Summary (interrupted: the processor had not applied every answer produced when the demo stopped waiting)")
	case !s.Settled:
		line("Summary (incomplete: the processor did not catch up with the answers produced in time)")
	default:
		line("Summary")
	}
	line("")

	// Outcome per skill.
	rows := [][]string{{"skill", "learners", "answers", "mastered", "stuck", "median opps"}}
	var answers int64
	var mastered, stuck int
	for _, r := range s.Skills {
		med := "-"
		if r.HasMedian {
			med = strconv.FormatFloat(r.MedianOpps, 'f', -1, 64)
		}
		rows = append(rows, []string{r.Skill, thousands(int64(r.Learners)), thousands(r.Answers),
			thousands(int64(r.Mastered)), thousands(int64(r.Stuck)), med})
		answers += r.Answers
		mastered += r.Mastered
		stuck += r.Stuck
	}
	rows = append(rows, []string{"all skills", thousands(int64(s.ActiveLearners)), thousands(answers),
		thousands(int64(mastered)), thousands(int64(stuck)), ""})
	lines(table("", rows))
	line(fmt.Sprintf("mastered: learners whose estimate reached %v; median opps: opportunities", s.Threshold))
	line(fmt.Sprintf("it took them; stuck: learners not at mastery after %d opportunities (worth", s.StuckAfter))
	line("a look, not a verdict); \"all skills\" counts learner-skill pairs.")
	line("")

	// The simulation's truth, skill by skill.
	line("True parameters of the simulated cohort (what a refit should recover):")
	rows = [][]string{{"skill", "prior", "learn", "guess", "slip", "forget"}}
	for i, r := range s.Skills {
		if i >= len(s.Truth) {
			break
		}
		p := s.Truth[i]
		f := func(x float64) string { return strconv.FormatFloat(x, 'f', 2, 64) }
		rows = append(rows, []string{r.Skill, f(p.Prior), f(p.Learn), f(p.Guess), f(p.Slip), f(p.Forget)})
	}
	lines(table("", rows))
	line("")

	// The half-way refit and swap.
	if s.Swap != nil {
		lines(swapLines(s.Swap))
		for _, k := range s.Swap.Skills {
			if !k.Accepted {
				lines(wrap(k.Skill+": "+k.Reason, "  ", "      ", viewColumns))
			}
		}
		line(fmt.Sprintf("events by params_version: on answers before the swap %s; after it %s",
			versionCounts(s.VersionBefore), versionCounts(s.VersionAfter)))
		for _, e := range s.OddEvents {
			lines(wrap("after the swap under the old version: "+e, "  ", "      ", viewColumns))
		}
		line("")
	}

	// Totals.
	done := s.Applied + s.Duplicates + s.DeadLettered
	learners := "learners: " + thousands(int64(s.Learners))
	if s.ActiveLearners != s.Learners {
		learners += fmt.Sprintf(" (%s answered so far)", thousands(int64(s.ActiveLearners)))
	}
	line(fmt.Sprintf("%s; at some skill %s reached mastery and %s were stuck",
		learners, thousands(int64(s.MasteredLearners)), thousands(int64(s.StuckLearners))))
	line(fmt.Sprintf("input messages: %s produced (%s answers + %d malformed)",
		thousands(s.Produced), thousands(s.Answers), s.Produced-s.Answers))
	line(fmt.Sprintf("  applied %s + duplicates %s + dead-lettered %s = %s",
		thousands(s.Applied), thousands(s.Duplicates), thousands(s.DeadLettered), thousands(done)))
	line(fmt.Sprintf("mastery events on %s: %s reached, %s stuck (%s repeated ids)",
		s.MasteryTopic, thousands(s.ReachedEvents), thousands(s.StuckEvents), thousands(s.DuplicateEvents)))
	if s.OtherEvents > 0 {
		line(fmt.Sprintf("events on %s the demo could not read: %s", s.MasteryTopic, thousands(s.OtherEvents)))
	}
	line(fmt.Sprintf("dead letters: %s (see %s)", thousands(s.DeadLettered), s.DeadLetterTopic))
	for _, dl := range s.DeadLetterBodies {
		lines(wrap(fmt.Sprintf("%s/%d@%d: %s", dl.Source.Topic, dl.Source.Partition, dl.Source.Offset, dl.Reason), "  ", "      ", viewColumns))
	}
	if s.OutboxDepth > 0 {
		line(fmt.Sprintf("outbox entries not yet published: %s", thousands(s.OutboxDepth)))
	}
	rate := 0.0
	if s.Producing > 0 {
		rate = float64(s.Answers) / s.Producing.Seconds()
	}
	line(fmt.Sprintf("elapsed %s (answers produced over %s, %s a second)",
		seconds(s.Elapsed), seconds(s.Producing), thousands(int64(rate+0.5))))
	io.WriteString(w, b.String())
}

// swapLines describe the half-way refit: the versions and when the new
// one came in, then per skill the parameters before and after beside the
// simulation's truth.
func swapLines(sw *demoSwap) []string {
	if sw == nil {
		return nil
	}
	if sw.Err != "" {
		return wrap("half-way refit failed, params v"+strconv.FormatInt(sw.From, 10)+" stay in force: "+sw.Err, "", "  ", viewColumns)
	}
	var out []string
	if sw.To == sw.From {
		out = append(out, fmt.Sprintf("half-way refit: the gate rejected every skill; params v%d stay in force", sw.From))
	} else {
		out = append(out, fmt.Sprintf("params v%d → v%d at answer %s: %d of %d skills refitted", sw.From, sw.To,
			thousands(sw.AtAnswer), sw.Accepted, sw.Accepted+sw.Rejected))
	}
	out = append(out, fmt.Sprintf("(refit on %s answers of %s learners in %s; each cell: v%d → v%d, then the truth)",
		thousands(sw.Answers), thousands(sw.Learners), seconds(time.Duration(sw.Seconds*float64(time.Second))), sw.From, sw.To))
	rows := [][]string{{"skill", "prior", "learn", "guess", "slip"}}
	f := func(x float64) string {
		s := strconv.FormatFloat(x, 'f', 2, 64)
		return strings.TrimPrefix(s, "0")
	}
	cell := func(b, a, t float64) string { return f(b) + "→" + f(a) + " " + f(t) }
	rejected := false
	for _, k := range sw.Skills {
		name := k.Skill
		if !k.Accepted {
			name += "*"
			rejected = true
		}
		rows = append(rows, []string{name,
			cell(k.Before.Prior, k.After.Prior, k.Truth.Prior), cell(k.Before.Learn, k.After.Learn, k.Truth.Learn),
			cell(k.Before.Guess, k.After.Guess, k.Truth.Guess), cell(k.Before.Slip, k.After.Slip, k.Truth.Slip)})
	}
	out = append(out, table("", rows)...)
	if rejected {
		out = append(out, fmt.Sprintf("* rejected by the gate: keeps the parameters of v%d", sw.From))
	}
	return out
}

// versionCounts spells event counts by params version: "v1 352, v2 3".
func versionCounts(m map[int64]int64) string {
	if len(m) == 0 {
		return "none"
	}
	vs := make([]int64, 0, len(m))
	for v := range m {
		vs = append(vs, v)
	}
	slices.Sort(vs)
	parts := make([]string, len(vs))
	for i, v := range vs {
		parts[i] = fmt.Sprintf("v%d %s", v, thousands(m[v]))
	}
	return strings.Join(parts, ", ")
}
