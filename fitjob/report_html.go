package fitjob

import (
	"bytes"
	"fmt"
	"html/template"
	"image/color"
	"io"
	"math"
	"sort"
	"strconv"
	"strings"
	"time"

	"gonum.org/v1/plot"
	"gonum.org/v1/plot/font"
	"gonum.org/v1/plot/plotter"
	"gonum.org/v1/plot/vg"
	"gonum.org/v1/plot/vg/draw"
	"gonum.org/v1/plot/vg/vgsvg"

	"github.com/attain-dev/attain/state"
)

// The replay report: one self-contained HTML file, with its plots as inline
// SVG drawn by gonum.org/v1/plot (fonts are named, never embedded or
// fetched: the browser uses its own sans-serif face), and print styles so
// that it stays readable on paper.

// WriteReportHTML writes the report to path atomically.
func (res *ReplayResult) WriteReportHTML(path string) error {
	var buf bytes.Buffer
	if err := res.ReportHTML(&buf); err != nil {
		return err
	}
	return writeOutput(path, buf.Bytes())
}

// ReportHTML renders the report. The same result gives the same bytes.
func (res *ReplayResult) ReportHTML(w io.Writer) error {
	if len(res.Models) == 0 {
		return fmt.Errorf("attain: replay result has no parameter set")
	}
	v, err := res.reportView()
	if err != nil {
		return err
	}
	var buf bytes.Buffer
	if err := reportTemplate.Execute(&buf, v); err != nil {
		return fmt.Errorf("attain: rendering the report: %w", err)
	}
	_, err = w.Write(buf.Bytes())
	return err
}

// Colours of the plots (fixed, so that the output is the same every time;
// distinguishable in grey when printed).
var (
	colObserved  = color.RGBA{R: 0x1f, G: 0x4e, B: 0x79, A: 0xff} // dark blue
	colPredicted = color.RGBA{R: 0xc0, G: 0x50, B: 0x10, A: 0xff} // burnt orange
	colSecond    = color.RGBA{R: 0x3a, G: 0x7d, B: 0x44, A: 0xff} // green: the compared set
	colBars      = color.RGBA{R: 0x5b, G: 0x8d, B: 0xb8, A: 0xff}
	colGuide     = color.Gray{Y: 0x99}
)

// ---- the view the template renders ----

type reportView struct {
	Title        string
	Source       string
	Order        string
	Sorted       bool
	FirstAt      string
	LastAt       string
	Records      int64
	Answers      int64
	Learners     int
	SkillCount   int
	Duplicates   int64
	Late         int64
	OutOfOrder   int64
	Rejected     int64
	Blank        int64
	DedupeWindow int
	CombineRule  string
	Sets         []viewSet
	Policy       string
	Overall      []viewScoreRow
	Skills       []viewSkill
	Curves       []viewPlot
	Calibration  template.HTML
	Distribution template.HTML
	WhatIf       []viewWhatIf
	Compare      []viewCompare
	RejectRows   []viewReject
	RejectFields []viewCount
	RejectsMore  int64
	CurveMax     int
}

type viewSet struct {
	Label, Name, Version, Created string
}

type viewScoreRow struct {
	Set                                           string
	Answers, Learners                             int
	AUC, RMSE, LogLoss, Accuracy, ObservedCorrect string
}

type viewSkill struct {
	Name                                          string
	Params                                        string
	Version                                       int64
	Fit                                           string
	Learners, Answers                             int
	AUC, RMSE, LogLoss, Accuracy                  string
	Reached, Median, Stuck, StuckThenReached      string
	Prior, Learn, Guess, Slip, Forget, WrongAfter string
}

type viewPlot struct {
	Title string
	SVG   template.HTML
}

type viewWhatIf struct {
	Set, Threshold, StuckAfter            string
	Reached, LearnersReached, Median, IQR string
	Stuck, StuckThenReached, WrongAfter   string
}

type viewCompare struct {
	Name    string
	Overall []viewDiff
	Skills  []viewCompareSkill
}

type viewDiff struct {
	Metric, A, B, Delta string
}

type viewCompareSkill struct {
	Name                                 string
	ParamsA, ParamsB                     string
	AUCA, AUCB, AUCD                     string
	LogLossA, LogLossB, LogLossD         string
	RMSEA, RMSEB, RMSED                  string
	ReachedA, ReachedB, MedianA, MedianB string
}

type viewReject struct {
	Where, Field, Reason string
}

type viewCount struct {
	Name  string
	Count int64
}

func fmtF(x float64, digits int) string {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return "–"
	}
	return strconv.FormatFloat(x, 'f', digits, 64)
}

func fmtSigned(x float64, digits int) string {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return "–"
	}
	s := strconv.FormatFloat(x, 'f', digits, 64)
	if x >= 0 {
		s = "+" + s
	}
	return s
}

func fmtShare(n, of int) string {
	if of == 0 {
		return "0"
	}
	return fmt.Sprintf("%d (%.1f%%)", n, 100*float64(n)/float64(of))
}

func fmtTime(t time.Time) string {
	if t.IsZero() {
		return "–"
	}
	return t.UTC().Format(time.RFC3339)
}

// paramsText is the five parameters in the order prior / learn / guess /
// slip / forget.
func paramsText(p state.Params) string {
	return fmt.Sprintf("%.3f / %.3f / %.3f / %.3f / %.3f", p.Prior, p.Learn, p.Guess, p.Slip, p.Forget)
}

func setLabel(i int) string {
	return string(rune('A' + i%26))
}

func (res *ReplayResult) reportView() (*reportView, error) {
	m0 := &res.Models[0]
	v := &reportView{
		Title: "Replay report", Source: res.Source, Order: string(res.Order), Sorted: res.Sorted,
		FirstAt: fmtTime(res.FirstAt), LastAt: fmtTime(res.LastAt),
		Records: res.Records, Answers: res.Answers, Learners: res.Learners, SkillCount: len(res.Skills),
		Duplicates: res.Duplicates, Late: res.Late, OutOfOrder: res.OutOfOrder, Rejected: res.Rejected, Blank: res.Blank,
		DedupeWindow: res.DedupeWindow, CombineRule: CombineRule, Policy: policyLabel(res.Policies[0]),
		CurveMax: res.CurveOpportunities,
	}
	for i, mr := range res.Models {
		created := "–"
		if !mr.Created.IsZero() {
			created = mr.Created.UTC().Format(time.RFC3339)
		}
		v.Sets = append(v.Sets, viewSet{Label: setLabel(i), Name: mr.Name, Version: strconv.FormatInt(mr.Version, 10), Created: created})
		v.Overall = append(v.Overall, viewScoreRow{
			Set: setLabel(i) + " (" + mr.Name + ")", Answers: mr.Overall.Answers, Learners: mr.Overall.Learners,
			AUC: fmtF(mr.Overall.AUC, 4), RMSE: fmtF(mr.Overall.RMSE, 4), LogLoss: fmtF(mr.Overall.LogLoss, 4),
			Accuracy: fmtF(mr.Overall.Accuracy, 4), ObservedCorrect: fmtF(float64(mr.Overall.Correct)/float64(max(mr.Overall.Answers, 1)), 4),
		})
	}
	for _, sr := range m0.Skills {
		ms := sr.Mastery[0]
		fit := "default set (no entry for this skill)"
		if !sr.UsesDefault {
			fit = "no fit information"
		}
		if f := sr.Fit; f != nil {
			conv := "converged"
			if !f.Converged {
				conv = "not converged"
			}
			fit = fmt.Sprintf("%d learners, %d answers, %d iterations, %s", f.Learners, f.Answers, f.Iterations, conv)
			if h := f.Heldout; h != nil {
				fit += fmt.Sprintf("; held out: AUC %.4f, RMSE %.4f, log-loss %.4f", h.AUC, h.RMSE, h.LogLoss)
			}
			if len(f.Warnings) > 0 {
				fit += "; warning: " + strings.Join(f.Warnings, "; ")
			}
		}
		v.Skills = append(v.Skills, viewSkill{
			Name: sr.Skill, Params: paramsText(sr.Params), Version: sr.Version, Fit: fit,
			Prior: fmtF(sr.Params.Prior, 3), Learn: fmtF(sr.Params.Learn, 3), Guess: fmtF(sr.Params.Guess, 3),
			Slip: fmtF(sr.Params.Slip, 3), Forget: fmtF(sr.Params.Forget, 3),
			Learners: sr.Learners, Answers: sr.Scores.Answers,
			AUC: fmtF(sr.Scores.AUC, 4), RMSE: fmtF(sr.Scores.RMSE, 4), LogLoss: fmtF(sr.Scores.LogLoss, 4), Accuracy: fmtF(sr.Scores.Accuracy, 4),
			Reached: fmtShare(ms.Reached, ms.LearnerSkills), Median: fmtF(ms.Median, 1),
			Stuck: strconv.Itoa(ms.Stuck), StuckThenReached: strconv.Itoa(ms.StuckThenReached),
			WrongAfter: fmtShareF(ms.WrongAfter, ms.AnsweredAfter),
		})
		svg, err := curvePlot(res, sr.Skill)
		if err != nil {
			return nil, err
		}
		v.Curves = append(v.Curves, viewPlot{Title: sr.Skill, SVG: svg})
	}
	var err error
	if v.Calibration, err = calibrationPlot(res); err != nil {
		return nil, err
	}
	if v.Distribution, err = distributionPlot(res); err != nil {
		return nil, err
	}
	for mi, mr := range res.Models {
		for _, ms := range mr.Mastery {
			stuck := strconv.FormatUint(uint64(ms.Policy.StuckAfter), 10)
			if ms.Policy.StuckAfter == 0 {
				stuck = "off"
			}
			v.WhatIf = append(v.WhatIf, viewWhatIf{
				Set: setLabel(mi), Threshold: strconv.FormatFloat(ms.Policy.Threshold, 'g', -1, 64), StuckAfter: stuck,
				Reached: fmtShare(ms.Reached, ms.LearnerSkills), LearnersReached: fmtShare(ms.LearnersReached, res.Learners),
				Median: fmtF(ms.Median, 1), IQR: fmtF(ms.Q1, 1) + "–" + fmtF(ms.Q3, 1),
				Stuck: strconv.Itoa(ms.Stuck), StuckThenReached: strconv.Itoa(ms.StuckThenReached),
				WrongAfter: fmtShareF(ms.WrongAfter, ms.AnsweredAfter),
			})
		}
	}
	for mi := 1; mi < len(res.Models); mi++ {
		mr := &res.Models[mi]
		c := viewCompare{Name: setLabel(mi) + " (" + mr.Name + ") against A (" + m0.Name + ")"}
		for _, d := range []struct {
			name string
			a, b float64
		}{
			{"AUC", m0.Overall.AUC, mr.Overall.AUC},
			{"RMSE", m0.Overall.RMSE, mr.Overall.RMSE},
			{"log-loss", m0.Overall.LogLoss, mr.Overall.LogLoss},
			{"accuracy", m0.Overall.Accuracy, mr.Overall.Accuracy},
		} {
			c.Overall = append(c.Overall, viewDiff{Metric: d.name, A: fmtF(d.a, 4), B: fmtF(d.b, 4), Delta: fmtSigned(d.b-d.a, 4)})
		}
		for k, sb := range mr.Skills {
			sa := m0.Skills[k]
			c.Skills = append(c.Skills, viewCompareSkill{
				Name: sa.Skill, ParamsA: paramsText(sa.Params), ParamsB: paramsText(sb.Params),
				AUCA: fmtF(sa.Scores.AUC, 4), AUCB: fmtF(sb.Scores.AUC, 4), AUCD: fmtSigned(sb.Scores.AUC-sa.Scores.AUC, 4),
				LogLossA: fmtF(sa.Scores.LogLoss, 4), LogLossB: fmtF(sb.Scores.LogLoss, 4), LogLossD: fmtSigned(sb.Scores.LogLoss-sa.Scores.LogLoss, 4),
				RMSEA: fmtF(sa.Scores.RMSE, 4), RMSEB: fmtF(sb.Scores.RMSE, 4), RMSED: fmtSigned(sb.Scores.RMSE-sa.Scores.RMSE, 4),
				ReachedA: fmtShare(sa.Mastery[0].Reached, sa.Mastery[0].LearnerSkills), ReachedB: fmtShare(sb.Mastery[0].Reached, sb.Mastery[0].LearnerSkills),
				MedianA: fmtF(sa.Mastery[0].Median, 1), MedianB: fmtF(sb.Mastery[0].Median, 1),
			})
		}
		v.Compare = append(v.Compare, c)
	}
	for _, rj := range res.RejectedListed {
		var where string
		switch {
		case rj.Line > 0:
			where = fmt.Sprintf("line %d", rj.Line)
		case rj.Offset >= 0:
			where = fmt.Sprintf("partition %d, offset %d", rj.Partition, rj.Offset)
		default:
			where = "answer " + rj.AnswerID
		}
		field := rj.Field
		if field == "" {
			field = "(whole record)"
		}
		v.RejectRows = append(v.RejectRows, viewReject{Where: where, Field: field, Reason: rj.Reason})
	}
	for _, f := range sortedFieldNames(res.RejectedByField) {
		name := f
		if name == "" {
			name = "(whole record)"
		}
		v.RejectFields = append(v.RejectFields, viewCount{Name: name, Count: res.RejectedByField[f]})
	}
	v.RejectsMore = res.Rejected - int64(len(res.RejectedListed))
	return v, nil
}

func fmtShareF(n, of int) string {
	if of == 0 {
		return "–"
	}
	return fmt.Sprintf("%.1f%% of %d", 100*float64(n)/float64(of), of)
}

func sortedFieldNames(m map[string]int64) []string {
	out := make([]string, 0, len(m))
	for k := range m {
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}

// ---- plots ----

// newPlot returns a plot whose text is all in the sans-serif face.
func newPlot(title, x, y string) *plot.Plot {
	p := plot.New()
	p.Title.Text, p.X.Label.Text, p.Y.Label.Text = title, x, y
	sans := func(f *font.Font) { f.Variant = "Sans" }
	sans(&p.Title.TextStyle.Font)
	sans(&p.X.Label.TextStyle.Font)
	sans(&p.Y.Label.TextStyle.Font)
	sans(&p.X.Tick.Label.Font)
	sans(&p.Y.Tick.Label.Font)
	sans(&p.Legend.TextStyle.Font)
	p.Title.TextStyle.Font.Size = vg.Points(11)
	p.X.Label.TextStyle.Font.Size = vg.Points(9)
	p.Y.Label.TextStyle.Font.Size = vg.Points(9)
	p.X.Tick.Label.Font.Size = vg.Points(8)
	p.Y.Tick.Label.Font.Size = vg.Points(8)
	p.Legend.TextStyle.Font.Size = vg.Points(8)
	p.Add(plotter.NewGrid())
	return p
}

// svgOf draws p as an SVG element for inlining: the XML prolog and the
// generator comment are dropped, and the fixed size becomes a viewBox that
// scales with the page.
func svgOf(p *plot.Plot, w, h vg.Length, label string) (template.HTML, error) {
	c := vgsvg.NewWith(vgsvg.UseWH(w, h))
	p.Draw(draw.New(c))
	var buf bytes.Buffer
	if _, err := c.WriteTo(&buf); err != nil {
		return "", fmt.Errorf("attain: drawing plot %q: %w", label, err)
	}
	b := buf.Bytes()
	i := bytes.Index(b, []byte("<svg"))
	if i < 0 {
		return "", fmt.Errorf("attain: drawing plot %q: no svg element in the output", label)
	}
	b = b[i:]
	// `<svg width="288pt" height="216pt" viewBox=…` → role and label for
	// screen readers; CSS sizes it.
	b = bytes.Replace(b, []byte("<svg "), []byte(`<svg role="img" aria-label="`+template.HTMLEscapeString(label)+`" class="plot" `), 1)
	return template.HTML(b), nil // #nosec: gonum's own markup, its text escaped by vgsvg
}

// intTicks marks whole numbers only (opportunities), labelled at a step of
// 1, 2 or 5 × 10^k giving at most 8 labels.
func intTicks(lo, hi float64) []plot.Tick {
	first, last := math.Ceil(lo), math.Floor(hi)
	if last < first {
		return nil
	}
	step := 1.0
	for n := 0; (last-first)/step > 8; n++ {
		step = []float64{1, 2, 5}[n%3] * math.Pow(10, float64(n/3))
		if (last-first)/step <= 8 {
			break
		}
	}
	var ts []plot.Tick
	for x := first; x <= last; x++ {
		t := plot.Tick{Value: x}
		if math.Mod(x, step) == 0 {
			t.Label = strconv.FormatFloat(x, 'f', 0, 64)
		}
		if t.Label != "" || step <= 5 {
			ts = append(ts, t)
		}
	}
	return ts
}

// unitTicks marks 0, 0.25, …, 1 (labelled at halves) on an axis that runs
// past 1 to leave room for the legend.
func unitTicks(float64, float64) []plot.Tick {
	return []plot.Tick{{Value: 0, Label: "0"}, {Value: 0.25}, {Value: 0.5, Label: "0.5"}, {Value: 0.75}, {Value: 1, Label: "1"}}
}

func curvePlot(res *ReplayResult, skill string) (template.HTML, error) {
	p := newPlot(skill, "opportunity (answers at the skill so far + 1)", "share of wrong answers")
	p.Y.Min, p.Y.Max = 0, 1.3 // the legend sits above 1
	p.Y.Tick.Marker = plot.TickerFunc(unitTicks)
	p.X.Tick.Marker = plot.TickerFunc(intTicks)
	for mi := range res.Models {
		var sr *SkillResult
		for k := range res.Models[mi].Skills {
			if res.Models[mi].Skills[k].Skill == skill {
				sr = &res.Models[mi].Skills[k]
			}
		}
		if sr == nil || len(sr.Curve) == 0 {
			continue
		}
		obs := make(plotter.XYs, len(sr.Curve))
		pred := make(plotter.XYs, len(sr.Curve))
		for i, c := range sr.Curve {
			obs[i] = plotter.XY{X: float64(c.Opportunity), Y: c.ObservedError}
			pred[i] = plotter.XY{X: float64(c.Opportunity), Y: c.PredictedError}
		}
		if mi == 0 {
			l, s, err := plotter.NewLinePoints(obs)
			if err != nil {
				return "", err
			}
			l.Color, s.Color = colObserved, colObserved
			l.Width = vg.Points(1)
			s.Radius = vg.Points(1.6)
			p.Add(l, s)
			p.Legend.Add("observed", l, s)
		}
		if mi > 1 {
			continue // the report compares the first two sets in plots
		}
		l, err := plotter.NewLine(pred)
		if err != nil {
			return "", err
		}
		l.Width = vg.Points(1.4)
		l.Color = colPredicted
		l.Dashes = []vg.Length{vg.Points(4), vg.Points(2)}
		name := "predicted (A)"
		if mi == 1 {
			l.Color = colSecond
			l.Dashes = []vg.Length{vg.Points(1.5), vg.Points(1.5)}
			name = "predicted (B)"
		}
		p.Add(l)
		p.Legend.Add(name, l)
	}
	p.Legend.Top = true
	return svgOf(p, 3.6*vg.Inch, 2.5*vg.Inch, "learning curve of "+skill)
}

func calibrationPlot(res *ReplayResult) (template.HTML, error) {
	p := newPlot("Predicted against observed", "mean predicted chance of a correct answer", "observed share of correct answers")
	p.X.Min, p.X.Max, p.Y.Min, p.Y.Max = 0, 1, 0, 1
	diag, err := plotter.NewLine(plotter.XYs{{X: 0, Y: 0}, {X: 1, Y: 1}})
	if err != nil {
		return "", err
	}
	diag.Color = colGuide
	diag.Dashes = []vg.Length{vg.Points(2), vg.Points(2)}
	p.Add(diag)
	p.Legend.Add("perfect agreement", diag)
	for mi := range res.Models {
		if mi > 1 {
			break
		}
		var xy plotter.XYs
		for _, b := range res.Models[mi].Overall.Calibration {
			if b.Count > 0 {
				xy = append(xy, plotter.XY{X: b.MeanPredicted, Y: b.ObservedRate})
			}
		}
		if len(xy) == 0 {
			continue
		}
		l, s, err := plotter.NewLinePoints(xy)
		if err != nil {
			return "", err
		}
		col := colObserved
		if mi == 1 {
			col = colSecond
			s.Shape = draw.BoxGlyph{}
		}
		l.Color, s.Color = col, col
		s.Radius = vg.Points(2.2)
		p.Add(l, s)
		p.Legend.Add("set "+setLabel(mi)+", all answers", l, s)
	}
	p.Legend.Top = true
	p.Legend.Left = true
	return svgOf(p, 4*vg.Inch, 4*vg.Inch, "calibration plot")
}

func distributionPlot(res *ReplayResult) (template.HTML, error) {
	ms := res.Models[0].Mastery[0]
	p := newPlot("Opportunities until mastery was first reached (set A, threshold "+strconv.FormatFloat(ms.Policy.Threshold, 'g', -1, 64)+")",
		"opportunities", "learner-skills")
	p.Y.Min = 0
	p.X.Tick.Marker = plot.TickerFunc(intTicks)
	if len(ms.Distribution) == 0 {
		// Nothing reached mastery: an empty frame with a note.
		p.X.Min, p.X.Max, p.Y.Max = 0, 1, 1
		p.Title.Text += ": none reached mastery"
	} else {
		h := &plotter.Histogram{Width: 1, FillColor: colBars, LineStyle: draw.LineStyle{Color: color.White, Width: vg.Points(0.5)}}
		for _, c := range ms.Distribution {
			x := float64(c.Opportunities)
			h.Bins = append(h.Bins, plotter.HistogramBin{Min: x - 0.5, Max: x + 0.5, Weight: float64(c.LearnerSkills)})
		}
		p.Add(h)
	}
	return svgOf(p, 6*vg.Inch, 2.8*vg.Inch, "distribution of opportunities until mastery")
}

// ---- the page ----

var reportTemplate = template.Must(template.New("report").Parse(`<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8"/>
<meta name="viewport" content="width=device-width, initial-scale=1"/>
<title>{{.Title}}: {{.Source}}</title>
<style>
body { font-family: system-ui, -apple-system, "Segoe UI", Helvetica, Arial, sans-serif; margin: 2em auto; max-width: 75em; padding: 0 1em; color: #222; line-height: 1.4; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; }
h2 { font-size: 1.25em; margin-top: 2em; border-bottom: 1px solid #ccc; padding-bottom: 0.2em; }
h3 { font-size: 1.05em; }
table { border-collapse: collapse; margin: 0.8em 0; font-size: 0.9em; }
th, td { border: 1px solid #ccc; padding: 0.25em 0.5em; text-align: right; vertical-align: top; }
th { background: #f2f2f2; }
td.t, th.t { text-align: left; }
.muted { color: #666; font-size: 0.9em; }
.grid { display: flex; flex-wrap: wrap; gap: 1em; }
figure { margin: 0; }
figure.curve { flex: 1 1 22em; max-width: 28em; }
figure.wide { max-width: 48em; }
figure.square { max-width: 28em; }
svg.plot { width: 100%; height: auto; display: block; }
div.scroll { overflow-x: auto; }
dl.facts { display: grid; grid-template-columns: max-content auto; gap: 0.2em 1em; }
dl.facts dt { font-weight: 600; }
dl.facts dd { margin: 0; }
@media print {
  body { margin: 0; max-width: none; font-size: 10pt; color: #000; }
  h2 { break-after: avoid; page-break-after: avoid; }
  table, figure, dl { break-inside: avoid; page-break-inside: avoid; }
  th { background: none; }
  figure.curve { flex-basis: 45%; }
  div.scroll { overflow: visible; }
}
</style>
</head>
<body>
<header>
<h1>{{.Title}}</h1>
<p class="muted">What the model would have predicted, and what it would have decided, had these answers been processed under the parameter sets and thresholds below. Nothing was changed in any running store or topic.</p>
</header>

<section id="data">
<h2>What was replayed</h2>
<dl class="facts">
<dt>Source</dt><dd>{{.Source}}</dd>
<dt>Answers dated</dt><dd>from {{.FirstAt}} to {{.LastAt}}</dd>
<dt>Records read</dt><dd>{{.Records}} ({{.Answers}} answers applied, {{.Duplicates}} repeated ids skipped, {{.Rejected}} rejected{{if .Blank}}, {{.Blank}} blank lines ignored{{end}})</dd>
<dt>Learners, skills</dt><dd>{{.Learners}} learners, {{.SkillCount}} skills</dd>
<dt>Order</dt><dd>{{if eq .Order "at"}}each learner's answers by time (<code>at</code>), ties in file order; {{.OutOfOrder}} answers came in the file after a later-dated answer of the same learner{{if .Sorted}} and were moved into place (the file was sorted in memory){{end}}{{else}}each learner's answers in arrival order, as the processor applies them; {{.Late}} answers were dated earlier than an answer of the same learner applied before them (late) and were applied where they arrived{{end}}</dd>
<dt>Repeated ids</dt><dd>an answer whose id is among the last {{.DedupeWindow}} applied for the same learner is skipped, as the processor does</dd>
<dt>Parameter sets</dt><dd>{{range .Sets}}<div>{{.Label}}: {{.Name}}, version {{.Version}}, created {{.Created}}</div>{{end}}</dd>
<dt>Mastery threshold / stuck after</dt><dd>{{.Policy}} (the first of the what-if settings; the tables below use it unless they say otherwise)</dd>
</dl>
</section>

<section id="quality">
<h2>How well the next answer was predicted</h2>
<p class="muted">Every answer is scored by the prediction made before it was seen. An item tagged with several skills is scored once, by the {{.CombineRule}}. AUC 0.5 is chance; lower RMSE and log-loss are better; accuracy counts a prediction of 0.5 or more as "correct".</p>
<table>
<thead><tr><th class="t">set</th><th>answers</th><th>learners</th><th>AUC</th><th>RMSE</th><th>log-loss</th><th>accuracy</th><th>observed share correct</th></tr></thead>
<tbody>
{{range .Overall}}<tr><td class="t">{{.Set}}</td><td>{{.Answers}}</td><td>{{.Learners}}</td><td>{{.AUC}}</td><td>{{.RMSE}}</td><td>{{.LogLoss}}</td><td>{{.Accuracy}}</td><td>{{.ObservedCorrect}}</td></tr>
{{end}}</tbody>
</table>
</section>

<section id="skills">
<h2>Skill by skill (set A)</h2>
<h3>Parameters</h3>
<div class="scroll"><table>
<thead><tr><th class="t">skill</th><th>prior</th><th>learn</th><th>guess</th><th>slip</th><th>forget</th><th>version</th><th class="t">how they were estimated</th></tr></thead>
<tbody>
{{range .Skills}}<tr><td class="t">{{.Name}}</td><td>{{.Prior}}</td><td>{{.Learn}}</td><td>{{.Guess}}</td><td>{{.Slip}}</td><td>{{.Forget}}</td><td>{{.Version}}</td><td class="t">{{.Fit}}</td></tr>
{{end}}</tbody>
</table></div>
<h3>On this history</h3>
<div class="scroll"><table>
<thead><tr><th class="t">skill</th><th>learners</th><th>answers</th><th>AUC</th><th>RMSE</th><th>log-loss</th><th>accuracy</th><th>reached mastery</th><th>median opportunities</th><th>flagged stuck</th><th>stuck, mastered later</th><th>wrong right after mastery</th></tr></thead>
<tbody>
{{range .Skills}}<tr><td class="t">{{.Name}}</td><td>{{.Learners}}</td><td>{{.Answers}}</td><td>{{.AUC}}</td><td>{{.RMSE}}</td><td>{{.LogLoss}}</td><td>{{.Accuracy}}</td><td>{{.Reached}}</td><td>{{.Median}}</td><td>{{.Stuck}}</td><td>{{.StuckThenReached}}</td><td>{{.WrongAfter}}</td></tr>
{{end}}</tbody>
</table></div>
</section>

<section id="curves">
<h2>Learning curves</h2>
<p class="muted">For each opportunity (a learner's first, second, … answer at the skill, up to the {{.CurveMax}}th), the share of answers that were wrong (points) and the share the model expected to be wrong (dashed). Where the two lines part, the model is too hopeful or too gloomy about learners at that stage.</p>
<div class="grid">
{{range .Curves}}<figure class="curve">{{.SVG}}</figure>
{{end}}</div>
</section>

<section id="calibration">
<h2>Calibration</h2>
<p class="muted">Answers grouped by their predicted chance of being correct, in tenths: the mean prediction of each group against the share that was correct. Points on the diagonal mean the predictions can be read as probabilities.</p>
<figure class="square">{{.Calibration}}</figure>
</section>

<section id="mastery">
<h2>How long learners took to reach mastery</h2>
<p class="muted">For every learner-skill that reached mastery, the number of answers at that skill up to and including the one that first took the estimate to the threshold.</p>
<figure class="wide">{{.Distribution}}</figure>
</section>

<section id="whatif">
<h2>What the thresholds would have changed</h2>
<p class="muted">The same history under each combination of mastery threshold and stuck-after setting. "Wrong right after mastery" is, among learner-skills that reached mastery and answered again, the share whose next answer at the skill was wrong. A stuck flag means "worth a look", not a verdict: some learners past that line are still making progress, as the "mastered later" column shows.</p>
<div class="scroll"><table>
<thead><tr><th class="t">set</th><th>threshold</th><th>stuck after</th><th>learner-skills reaching mastery</th><th>learners reaching mastery of a skill</th><th>median opportunities</th><th>quartiles</th><th>flagged stuck</th><th>stuck, mastered later</th><th>wrong right after mastery</th></tr></thead>
<tbody>
{{range .WhatIf}}<tr><td class="t">{{.Set}}</td><td>{{.Threshold}}</td><td>{{.StuckAfter}}</td><td>{{.Reached}}</td><td>{{.LearnersReached}}</td><td>{{.Median}}</td><td>{{.IQR}}</td><td>{{.Stuck}}</td><td>{{.StuckThenReached}}</td><td>{{.WrongAfter}}</td></tr>
{{end}}</tbody>
</table></div>
</section>
{{range .Compare}}
<section class="compare">
<h2>Parameter sets compared: {{.Name}}</h2>
<table>
<thead><tr><th class="t">all answers</th><th>A</th><th>B</th><th>B − A</th></tr></thead>
<tbody>
{{range .Overall}}<tr><td class="t">{{.Metric}}</td><td>{{.A}}</td><td>{{.B}}</td><td>{{.Delta}}</td></tr>
{{end}}</tbody>
</table>
<div class="scroll"><table>
<thead><tr><th class="t">skill</th><th class="t">parameters A (prior / learn / guess / slip / forget)</th><th class="t">parameters B</th><th>AUC A</th><th>AUC B</th><th>B − A</th><th>log-loss A</th><th>log-loss B</th><th>B − A</th><th>RMSE A</th><th>RMSE B</th><th>B − A</th><th>reached A</th><th>reached B</th><th>median A</th><th>median B</th></tr></thead>
<tbody>
{{range .Skills}}<tr><td class="t">{{.Name}}</td><td class="t">{{.ParamsA}}</td><td class="t">{{.ParamsB}}</td><td>{{.AUCA}}</td><td>{{.AUCB}}</td><td>{{.AUCD}}</td><td>{{.LogLossA}}</td><td>{{.LogLossB}}</td><td>{{.LogLossD}}</td><td>{{.RMSEA}}</td><td>{{.RMSEB}}</td><td>{{.RMSED}}</td><td>{{.ReachedA}}</td><td>{{.ReachedB}}</td><td>{{.MedianA}}</td><td>{{.MedianB}}</td></tr>
{{end}}</tbody>
</table></div>
</section>
{{end}}
<section id="rejected">
<h2>Records that could not be used</h2>
{{if .Rejected}}<p>{{.Rejected}} records were rejected and left out; the replay went on without them.</p>
<table>
<thead><tr><th class="t">field</th><th>records</th></tr></thead>
<tbody>
{{range .RejectFields}}<tr><td class="t">{{.Name}}</td><td>{{.Count}}</td></tr>
{{end}}</tbody>
</table>
<table>
<thead><tr><th class="t">where</th><th class="t">field</th><th class="t">why</th></tr></thead>
<tbody>
{{range .RejectRows}}<tr><td class="t">{{.Where}}</td><td class="t">{{.Field}}</td><td class="t">{{.Reason}}</td></tr>
{{end}}</tbody>
</table>
{{if .RejectsMore}}<p class="muted">… and {{.RejectsMore}} more, counted above but not listed.</p>{{end}}
{{else}}<p>None: every record decoded.</p>
{{end}}</section>

<footer>
<p class="muted">Mastery estimates are probabilities that depend on how items are tagged with skills; use them to support teachers' and learners' decisions, not alone to decide high-stakes outcomes.</p>
</footer>
</body>
</html>
`))
