package fitjob

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/state"
)

// The small replay input (testdata/replay/answers.jsonl, made by
// make_input.sh) and the grid of policies the reference fixture was made
// with (testdata/replay/regenerate.sh, make_fixtures.py).
const replayInput = "../testdata/replay/answers.jsonl"

var fixturePolicies = []state.Policy{{Threshold: 0.95, StuckAfter: 10}, {Threshold: 0.95, StuckAfter: 5}, {Threshold: 0.9, StuckAfter: 10}, {Threshold: 0.9, StuckAfter: 5}}

func loadParams(t testing.TB, name string) NamedParams {
	t.Helper()
	path := "../testdata/replay/" + name
	pf, err := state.LoadParamFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return NamedParams{Name: name, File: pf}
}

// runReplay replays path with opt and returns the result and the folder
// the outputs were written to (metrics.json and report.html included).
func runReplay(t testing.TB, path string, opt ReplayOptions) (*Replay, *ReplayResult, string) {
	t.Helper()
	if opt.OutDir == "" {
		opt.OutDir = t.TempDir()
	}
	opt.Logger = zerolog.Nop()
	r, err := NewReplay(opt)
	if err != nil {
		t.Fatal(err)
	}
	res, err := r.RunFile(context.Background(), path)
	if err != nil {
		t.Fatal(err)
	}
	if err := res.WriteMetricsJSON(filepath.Join(opt.OutDir, "metrics.json")); err != nil {
		t.Fatal(err)
	}
	if err := res.WriteReportHTML(filepath.Join(opt.OutDir, "report.html")); err != nil {
		t.Fatal(err)
	}
	return r, res, opt.OutDir
}

func readFile(t testing.TB, path string) []byte {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// metrics.json agrees with Debian's python3-sklearn 1.2.1 and numpy
// (testdata/replay/make_fixtures.py) on the same predictions: AUC,
// log-loss, RMSE, accuracy overall and per skill (per-skill predictions
// recomputed there from the mastery column by the BKT prediction formula,
// Corbett & Anderson 1995), calibration bins, learning curves, and the
// mastery outcomes of every policy of the what-if grid (quartiles by
// numpy.percentile). Tolerance 1e-9.
func TestReplayMatchesSklearnFixture(t *testing.T) {
	_, _, dir := runReplay(t, replayInput, ReplayOptions{Params: []NamedParams{loadParams(t, "params-a.json")}, Policies: fixturePolicies})
	if got, want := readFile(t, filepath.Join(dir, "predictions.csv")), readFile(t, "../testdata/replay/predictions.csv"); !bytes.Equal(got, want) {
		t.Fatalf("predictions.csv differs from the committed fixture the reference values were computed from; if the change is intended, run sh testdata/replay/regenerate.sh and review the diff")
	}
	var got, want map[string]any
	if err := json.Unmarshal(readFile(t, filepath.Join(dir, "metrics.json")), &got); err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(readFile(t, "../testdata/replay/expected.json"), &want); err != nil {
		t.Fatal(err)
	}
	c := &jsonCompare{t: t, tol: 1e-9}
	c.object("overall", got["overall"], want["overall"])
	gs, ws := got["skills"].(map[string]any), want["skills"].(map[string]any)
	if len(gs) != len(ws) || len(ws) != 4 {
		t.Fatalf("skills: got %d, want %d (4)", len(gs), len(ws))
	}
	gw, ww := got["what_if"].([]any), want["what_if"].([]any)
	if len(gw) != len(ww) || len(ww) != len(fixturePolicies) {
		t.Fatalf("what_if: got %d entries, want %d", len(gw), len(ww))
	}
	for name, w := range ws {
		g := gs[name].(map[string]any)
		c.object("skills."+name, g, w)
		// A skill's headline mastery object is its outcome under the first policy.
		c.object("skills."+name+".mastery", g["mastery"], ww[0].(map[string]any)["skills"].(map[string]any)[name])
	}
	for i := range ww {
		c.object(fmt.Sprintf("what_if[%d]", i), gw[i], ww[i])
	}
	// The first what-if entry, but for its per-skill part, is the headline
	// "mastery" object.
	head := map[string]any{}
	for k, v := range ww[0].(map[string]any) {
		if k != "skills" {
			head[k] = v
		}
	}
	c.object("mastery", got["mastery"], head)
	if c.compared < 1000 {
		t.Fatalf("only %d values compared; the fixture is not being read as intended", c.compared)
	}
	t.Logf("%d values agree with the sklearn/numpy reference to 1e-9", c.compared)
}

// jsonCompare compares every key of want (recursively) with got: numbers
// to tol, everything else exactly. Keys only in got are not compared.
type jsonCompare struct {
	t        *testing.T
	tol      float64
	compared int
}

func (c *jsonCompare) object(path string, got, want any) {
	c.t.Helper()
	if want == nil {
		return // nothing to compare (an absent reference section)
	}
	switch w := want.(type) {
	case map[string]any:
		g, ok := got.(map[string]any)
		if !ok {
			c.t.Errorf("%s: got %T, want an object", path, got)
			return
		}
		for k, wv := range w {
			gv, ok := g[k]
			if !ok {
				c.t.Errorf("%s.%s: missing", path, k)
				continue
			}
			if wv == nil {
				c.compared++
				if gv != nil {
					c.t.Errorf("%s.%s = %v, want null", path, k, gv)
				}
				continue
			}
			c.object(path+"."+k, gv, wv)
		}
	case []any:
		g, ok := got.([]any)
		if !ok || len(g) != len(w) {
			c.t.Errorf("%s: got %v, want %d elements", path, got, len(w))
			return
		}
		for i := range w {
			c.object(fmt.Sprintf("%s[%d]", path, i), g[i], w[i])
		}
	case float64:
		c.compared++
		g, ok := got.(float64)
		if !ok || math.Abs(g-w) > c.tol {
			c.t.Errorf("%s = %v, want %v (±%g)", path, got, w, c.tol)
		}
	case string:
		// Reference strings (the generator note) are not compared.
	default:
		c.compared++
		if got != want {
			c.t.Errorf("%s = %v, want %v", path, got, want)
		}
	}
}

// Two replays of the same input under the same parameters give
// byte-identical outputs, whatever the number of decoding goroutines.
func TestReplayDeterministic(t *testing.T) {
	opt := func(workers int) ReplayOptions {
		return ReplayOptions{Params: []NamedParams{loadParams(t, "params-a.json"), loadParams(t, "params-b.json")},
			Policies: fixturePolicies, Workers: workers}
	}
	for _, order := range []Order{OrderAt, OrderArrival} {
		o1, o2, o3 := opt(1), opt(2), opt(5)
		o1.Order, o2.Order, o3.Order = order, order, order
		_, _, d1 := runReplay(t, replayInput, o1)
		_, _, d2 := runReplay(t, replayInput, o2)
		_, _, d3 := runReplay(t, replayInput, o3)
		for _, name := range []string{"predictions.csv", "events.csv", "metrics.json", "report.html"} {
			a := readFile(t, filepath.Join(d1, name))
			if len(a) < 100 {
				t.Fatalf("%s (%s): only %d bytes", name, order, len(a))
			}
			for _, d := range []string{d2, d3} {
				if !bytes.Equal(a, readFile(t, filepath.Join(d, name))) {
					t.Errorf("%s (%s order) differs between two replays of the same input", name, order)
				}
			}
		}
	}
}

// Replay of a file equals the real store fed the same answers in the same
// order (state.OpenStore on disk, Partition.Apply, Commit): the same
// predictions, the same duplicates and late answers, the same final
// records of every learner and the same sequence of reached/stuck events.
func TestReplayMatchesStore(t *testing.T) {
	pa := loadParams(t, "params-a.json")
	pol := state.Policy{Threshold: 0.9, StuckAfter: 5}
	var answers []state.Answer
	f, err := os.Open(replayInput)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	if _, err := ReadAnswers(context.Background(), f, &state.NativeDecoder{}, func(a state.Answer) error {
		answers = append(answers, a)
		return nil
	}, nil); err != nil {
		t.Fatal(err)
	}
	for _, order := range []Order{OrderArrival, OrderAt} {
		t.Run(string(order), func(t *testing.T) {
			feed := slices.Clone(answers)
			if order == OrderAt {
				slices.SortStableFunc(feed, func(a, b state.Answer) int { return a.At.Compare(b.At) })
			}
			r, res, dir := runReplay(t, replayInput, ReplayOptions{Params: []NamedParams{pa}, Policies: []state.Policy{pol, state.DefaultPolicy()}, Order: order})
			st, err := state.OpenStore(t.TempDir(), state.StoreOptions{Policy: pol, DedupeWindow: 32, Logger: zerolog.Nop()})
			if err != nil {
				t.Fatal(err)
			}
			defer st.Close()
			pt, err := st.Partition(0)
			if err != nil {
				t.Fatal(err)
			}
			var dups, late, refused int64
			var preds []float64
			for i, a := range feed {
				ar, err := pt.Apply(a, int64(i+1), pa.File)
				if err != nil {
					refused++ // the store refuses it (the `at` out of range)
					continue
				}
				if ar.Duplicate {
					dups++
					continue
				}
				if ar.Late {
					late++
				}
				var uniq []float64
				var seen []string
				for k, s := range a.Skills {
					if !slices.Contains(seen, s) {
						seen = append(seen, s)
						uniq = append(uniq, ar.PCorrect[k])
					}
				}
				preds = append(preds, Combine(uniq))
				if i%100 == 0 {
					if err := pt.Commit(false); err != nil {
						t.Fatal(err)
					}
				}
			}
			if err := pt.Commit(true); err != nil {
				t.Fatal(err)
			}
			if res.Duplicates != dups || res.Late != late || res.Answers != int64(len(preds)) {
				t.Errorf("replay: %d duplicates, %d late, %d answers; store: %d, %d, %d", res.Duplicates, res.Late, res.Answers, dups, late, len(preds))
			}
			if order == OrderArrival && late == 0 {
				t.Errorf("the input has a late answer in arrival order, but none was counted")
			}
			if refused != 1 || res.RejectedByField["at"] != 3 { // 2 undecodable times + 1 the store refuses
				t.Errorf("store refused %d answers, replay rejected %d for `at`; want 1 and 3", refused, res.RejectedByField["at"])
			}
			// Predictions, row by row.
			rows := readCSV(t, filepath.Join(dir, "predictions.csv"))
			if len(rows)-1 != len(preds) {
				t.Fatalf("predictions.csv has %d rows, the store applied %d answers", len(rows)-1, len(preds))
			}
			for i, row := range rows[1:] {
				p, _ := strconv.ParseFloat(row[4], 64)
				if p != preds[i] {
					t.Fatalf("row %d (%s): p_correct %v, store %v", i+1, row[0], p, preds[i])
				}
			}
			// Final records of every learner.
			learners := map[string]bool{}
			for _, a := range feed {
				learners[a.Learner] = true
			}
			for l := range learners {
				want, ok, err := st.Learner(l)
				if err != nil {
					t.Fatal(err)
				}
				got, gok := r.Learner(l)
				if ok != gok || len(got) != len(want) {
					t.Fatalf("learner %s: replay has %d skills (%v), store %d (%v)", l, len(got), gok, len(want), ok)
				}
				for skill, w := range want {
					if got[skill] != w {
						t.Errorf("learner %s, skill %s: replay %+v, store %+v", l, skill, got[skill], w)
					}
				}
			}
			// The sequence of reached/stuck events.
			var outs []state.Output
			ents, err := st.Outbox(0, 0, 1<<20)
			if err != nil {
				t.Fatal(err)
			}
			for _, e := range ents {
				if e.Output != nil {
					outs = append(outs, *e.Output)
				}
			}
			evs := readCSV(t, filepath.Join(dir, "events.csv"))[1:]
			if len(evs) != len(outs) || len(outs) < 50 {
				t.Fatalf("events.csv has %d events, the store's outbox %d (want the same, and at least 50)", len(evs), len(outs))
			}
			kinds := map[state.Kind]int{}
			for i, o := range outs {
				kinds[o.Kind]++
				want := []string{o.ID, o.Kind.EventType(), o.Learner, o.Skill, strconv.FormatUint(uint64(o.Opportunities), 10),
					strconv.FormatFloat(o.Mastery, 'g', -1, 64), strconv.FormatInt(o.ParamsVersion, 10), o.AnswerID, o.At.UTC().Format(time.RFC3339Nano)}
				if !slices.Equal(evs[i], want) {
					t.Fatalf("event %d: replay %v, store %v", i, evs[i], want)
				}
			}
			if kinds[state.KindReached] == 0 || kinds[state.KindStuck] == 0 {
				t.Errorf("events: %v; the input should raise both kinds", kinds)
			}
		})
	}
}

func readCSV(t testing.TB, path string) [][]string {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	return rows
}

// Malformed records are counted, listed with their line and field, and
// the replay goes on with the rest.
func TestReplayBadInput(t *testing.T) {
	_, res, dir := runReplay(t, replayInput, ReplayOptions{Params: []NamedParams{loadParams(t, "params-a.json")}, RejectsListed: 5})
	if res.Rejected != 8 || res.Answers != 1462 || res.Records != 1472 || res.Blank != 1 || res.Duplicates != 2 {
		t.Fatalf("rejected %d, answers %d, records %d, blank %d, duplicates %d; want 8, 1462, 1472, 1, 2",
			res.Rejected, res.Answers, res.Records, res.Blank, res.Duplicates)
	}
	var m struct {
		Rejected struct {
			Count   int              `json:"count"`
			ByField map[string]int   `json:"by_field"`
			Listed  []RejectedRecord `json:"listed"`
			Max     int              `json:"listed_max"`
		} `json:"rejected"`
	}
	if err := json.Unmarshal(readFile(t, filepath.Join(dir, "metrics.json")), &m); err != nil {
		t.Fatal(err)
	}
	r := m.Rejected
	if r.Count != 8 || r.Max != 5 || len(r.Listed) != 5 {
		t.Fatalf("rejected: count %d, max %d, %d listed; want 8, 5, 5", r.Count, r.Max, len(r.Listed))
	}
	wantFields := map[string]int{"": 2, "skills": 2, "at": 3, "correct": 1}
	for k, v := range wantFields {
		if r.ByField[k] != v {
			t.Errorf("by_field[%q] = %d, want %d (all: %v)", k, r.ByField[k], v, r.ByField)
		}
	}
	want := []struct {
		line  int
		field string
		has   string
	}{{721, "", "JSON"}, {722, "", "JSON"}, {724, "skills", "empty"}, {725, "at", "missing"}, {727, "at", "RFC 3339"}}
	for i, w := range want {
		got := r.Listed[i]
		if got.Line != w.line || got.Field != w.field || !strings.Contains(got.Reason, w.has) {
			t.Errorf("listed[%d] = %+v, want line %d, field %q, reason with %q", i, got, w.line, w.field, w.has)
		}
	}
	// The one the store would refuse is named too (listed when the list is long enough).
	_, res, _ = runReplay(t, replayInput, ReplayOptions{Params: []NamedParams{loadParams(t, "params-a.json")}})
	last := res.RejectedListed[len(res.RejectedListed)-2]
	if last.Line != 1472 || last.Field != "at" || !strings.Contains(last.Reason, "storable range") {
		t.Errorf("line 1472: %+v, want the `at` beyond the storable range", last)
	}
}

// OrderAt applies each learner's answers in `at` order whatever the file's
// order: replaying the file as it is (out of order: read again and sorted in
// memory) gives the same predictions and events as replaying it sorted
// beforehand (streamed), and OrderArrival differs on it.
func TestReplayOrderAt(t *testing.T) {
	lines := strings.Split(strings.TrimRight(string(readFile(t, replayInput)), "\n"), "\n")
	type ln struct {
		at   time.Time
		text string
	}
	var valid []ln
	var dec state.NativeDecoder
	for _, l := range lines {
		a, err := dec.Decode([]byte(l))
		if err == nil && a.At.Year() < 2262 {
			valid = append(valid, ln{a.At, l})
		}
	}
	slices.SortStableFunc(valid, func(a, b ln) int { return a.at.Compare(b.at) })
	var sorted strings.Builder
	for _, l := range valid {
		sorted.WriteString(l.text + "\n")
	}
	sortedPath := filepath.Join(t.TempDir(), "sorted.jsonl")
	if err := os.WriteFile(sortedPath, []byte(sorted.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	pa := []NamedParams{loadParams(t, "params-a.json")}
	_, resA, dA := runReplay(t, replayInput, ReplayOptions{Params: pa})
	_, resB, dB := runReplay(t, sortedPath, ReplayOptions{Params: pa})
	_, resC, dC := runReplay(t, replayInput, ReplayOptions{Params: pa, Order: OrderArrival})
	if !resA.Sorted || resB.Sorted || resC.Sorted {
		t.Errorf("sorted in memory: as-is %v, pre-sorted %v, arrival %v; want true, false, false", resA.Sorted, resB.Sorted, resC.Sorted)
	}
	if resA.OutOfOrder == 0 || resB.OutOfOrder != 0 || resA.Late != 0 || resC.Late == 0 {
		t.Errorf("out of order %d / %d, late %d / %d", resA.OutOfOrder, resB.OutOfOrder, resA.Late, resC.Late)
	}
	for _, name := range []string{"predictions.csv", "events.csv"} {
		if !bytes.Equal(readFile(t, filepath.Join(dA, name)), readFile(t, filepath.Join(dB, name))) {
			t.Errorf("%s: the file replayed in `at` order differs from the same file sorted beforehand", name)
		}
	}
	if bytes.Equal(readFile(t, filepath.Join(dA, "predictions.csv")), readFile(t, filepath.Join(dC, "predictions.csv"))) {
		t.Errorf("arrival order gave the same predictions as `at` order on a file that is out of order")
	}
}

// What-if: the same history under several policies; a lower threshold
// reaches mastery no later, and a stuck flag under one policy follows the
// definition (the N-th opportunity without mastery).
func TestReplayWhatIf(t *testing.T) {
	pols := []state.Policy{{Threshold: 0.95, StuckAfter: 10}, {Threshold: 0.8, StuckAfter: 10}, {Threshold: 0.95, StuckAfter: 0}}
	_, res, _ := runReplay(t, replayInput, ReplayOptions{Params: []NamedParams{loadParams(t, "params-a.json")}, Policies: pols})
	ms := res.Models[0].Mastery
	if len(ms) != 3 {
		t.Fatalf("%d what-if outcomes, want 3", len(ms))
	}
	if !(ms[1].Reached >= ms[0].Reached && ms[1].Median <= ms[0].Median && ms[1].Stuck <= ms[0].Stuck) {
		t.Errorf("threshold 0.8 vs 0.95: reached %d vs %d, median %v vs %v, stuck %d vs %d", ms[1].Reached, ms[0].Reached, ms[1].Median, ms[0].Median, ms[1].Stuck, ms[0].Stuck)
	}
	if ms[1].Reached == ms[0].Reached && ms[1].Median == ms[0].Median {
		t.Errorf("thresholds 0.8 and 0.95 gave the same outcome; the what-if is not applied")
	}
	if ms[2].Stuck != 0 || ms[2].Reached != ms[0].Reached {
		t.Errorf("stuck-after 0 (off): %d stuck, %d reached (policy 0: %d)", ms[2].Stuck, ms[2].Reached, ms[0].Reached)
	}
	if ms[0].Stuck == 0 || ms[0].StuckThenReached > ms[0].Stuck || ms[0].WrongAfter > ms[0].AnsweredAfter || ms[0].AnsweredAfter == 0 {
		t.Errorf("policy 0: %+v", ms[0])
	}
}

// Two parameter sets on the same history: each is scored on its own, and
// metrics.json reports the per-skill differences.
func TestReplayCompareParams(t *testing.T) {
	_, res, dir := runReplay(t, replayInput, ReplayOptions{Params: []NamedParams{loadParams(t, "params-a.json"), loadParams(t, "params-b.json")}})
	_, solo, _ := runReplay(t, replayInput, ReplayOptions{Params: []NamedParams{loadParams(t, "params-b.json")}})
	if res.Models[1].Overall.AUC != solo.Models[0].Overall.AUC || res.Models[1].Overall.LogLoss != solo.Models[0].Overall.LogLoss {
		t.Errorf("set B compared: AUC %v log-loss %v; B alone: %v %v", res.Models[1].Overall.AUC, res.Models[1].Overall.LogLoss, solo.Models[0].Overall.AUC, solo.Models[0].Overall.LogLoss)
	}
	var m struct {
		Comparison []struct {
			Params string `json:"params"`
			Skills map[string]struct {
				AUC        *float64 `json:"auc"`
				Difference struct {
					AUC     *float64 `json:"auc"`
					LogLoss *float64 `json:"logloss"`
				} `json:"difference"`
			} `json:"skills"`
		} `json:"comparison"`
		Skills map[string]struct {
			AUC     *float64 `json:"auc"`
			LogLoss *float64 `json:"logloss"`
		} `json:"skills"`
	}
	if err := json.Unmarshal(readFile(t, filepath.Join(dir, "metrics.json")), &m); err != nil {
		t.Fatal(err)
	}
	if len(m.Comparison) != 1 || m.Comparison[0].Params != "params-b.json" {
		t.Fatalf("comparison: %+v", m.Comparison)
	}
	for _, skill := range []string{"trial-balance", "payroll-deductions"} {
		c := m.Comparison[0].Skills[skill]
		a := m.Skills[skill]
		if c.AUC == nil || a.AUC == nil || c.Difference.AUC == nil || math.Abs(*c.AUC-*a.AUC-*c.Difference.AUC) > 1e-12 || *c.Difference.AUC == 0 {
			t.Errorf("%s: AUC A %v, B %v, difference %v", skill, a.AUC, c.AUC, c.Difference.AUC)
		}
	}
	// journal-entries has the same parameters in both: no difference.
	if d := m.Comparison[0].Skills["journal-entries"].Difference.LogLoss; d == nil || *d != 0 {
		t.Errorf("journal-entries log-loss difference %v, want 0", d)
	}
}

// appendUTC formats exactly as time.Format(time.RFC3339Nano) in UTC, over
// the whole storable range.
func TestAppendUTC(t *testing.T) {
	r := rand.New(rand.NewPCG(1, 2))
	cases := []int64{0, 1, -1, 999_999_999, -1_000_000_000, math.MinInt64, math.MaxInt64, 1756749618312000000, 951782400 * 1e9}
	for range 100000 {
		cases = append(cases, int64(r.Uint64()))
		cases = append(cases, r.Int64N(1e9)*1e9+int64(r.IntN(4))*1e8) // whole seconds and tenths
	}
	for _, at := range cases {
		want := time.Unix(0, at).UTC().Format(time.RFC3339Nano)
		if got := string(appendUTC(nil, at)); got != want {
			t.Fatalf("appendUTC(%d) = %s, want %s", at, got, want)
		}
	}
}

// A CSV field is quoted only when it must be, and reads back as written.
func TestAppendCSVField(t *testing.T) {
	for _, s := range []string{"plain", "with,comma", `with "quotes"`, "line\nbreak", " leading space", "", "semi;colon"} {
		b := appendCSVField(nil, s)
		rec, err := csv.NewReader(bytes.NewReader(append(b, ",end\n"...))).Read()
		if err != nil || len(rec) != 2 || rec[0] != s {
			t.Errorf("%q → %s → %q (%v)", s, b, rec, err)
		}
		if s == "plain" && string(b) != "plain" {
			t.Errorf("plain field quoted: %s", b)
		}
	}
}

func TestReplayOptionsErrors(t *testing.T) {
	_, err := NewReplay(ReplayOptions{})
	if err == nil || !strings.Contains(err.Error(), "no parameter set") {
		t.Errorf("no params: %v", err)
	}
	pa := loadParams(t, "params-a.json")
	_, err = NewReplay(ReplayOptions{Params: []NamedParams{pa}, Policies: []state.Policy{{Threshold: 1.5}}, Order: "sideways"})
	if err == nil || !strings.Contains(err.Error(), "threshold 1.5") || !strings.Contains(err.Error(), `order "sideways"`) {
		t.Errorf("bad threshold and order: %v", err)
	}
}

// Edge cases of reading a file: a line longer than a decoding chunk, CRLF
// endings, no newline at the end, and an empty file (the report still
// renders, with undefined scores left empty).
func TestReplayFileEdges(t *testing.T) {
	dir := t.TempDir()
	long := `{"id":"a1","learner":"hl-1","skills":["trial-balance"],"correct":true,"at":"2025-09-01T18:00:00Z","note":"` + strings.Repeat("x", 3*replayChunkSize) + `"}`
	body := long + "\r\n" + `{"id":"a2","learner":"hl-1","skills":["trial-balance"],"correct":false,"at":"2025-09-01T18:01:00Z"}` + "\r\n" +
		`{"id":"a3","learner":"hl-2","skills":["trial-balance"],"correct":true,"at":"2025-09-01T18:02:00Z"}`
	path := filepath.Join(dir, "edges.jsonl")
	if err := os.WriteFile(path, []byte(body), 0o644); err != nil {
		t.Fatal(err)
	}
	_, res, out := runReplay(t, path, ReplayOptions{Params: []NamedParams{loadParams(t, "params-a.json")}})
	if res.Answers != 3 || res.Rejected != 0 || res.Learners != 2 {
		t.Fatalf("answers %d, rejected %d (%v), learners %d; want 3, 0, 2", res.Answers, res.Rejected, res.RejectedListed, res.Learners)
	}
	rows := readCSV(t, filepath.Join(out, "predictions.csv"))
	if len(rows) != 4 || rows[1][0] != "a1" || rows[3][0] != "a3" {
		t.Errorf("rows: %v", rows)
	}

	empty := filepath.Join(dir, "empty.jsonl")
	if err := os.WriteFile(empty, nil, 0o644); err != nil {
		t.Fatal(err)
	}
	_, res, out = runReplay(t, empty, ReplayOptions{Params: []NamedParams{loadParams(t, "params-a.json")}})
	if res.Answers != 0 || res.Records != 0 || !math.IsNaN(res.Models[0].Overall.AUC) {
		t.Errorf("empty file: %+v", res)
	}
	var m map[string]any
	if err := json.Unmarshal(readFile(t, filepath.Join(out, "metrics.json")), &m); err != nil {
		t.Fatal(err)
	}
	if auc := m["overall"].(map[string]any)["auc"]; auc != nil {
		t.Errorf("empty file: overall auc %v, want null", auc)
	}
	if !bytes.Contains(readFile(t, filepath.Join(out, "report.html")), []byte("</html>")) {
		t.Errorf("empty file: no report")
	}
}

// A replay stopped by its context returns the context's error, leaves no
// output and no temporary file behind, and stops every goroutine it
// started.
func TestReplayCancel(t *testing.T) {
	big := filepath.Join(t.TempDir(), "big.jsonl")
	f, err := os.Create(big)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := WriteCohort(f, Cohort{Learners: 400, Seed: 3}); err != nil {
		t.Fatal(err)
	}
	f.Close()
	before := runtime.NumGoroutine()
	for _, order := range []Order{OrderAt, OrderArrival} {
		out := t.TempDir()
		r, err := NewReplay(ReplayOptions{Params: []NamedParams{loadParams(t, "params-a.json")}, OutDir: out, Order: order, Logger: zerolog.Nop()})
		if err != nil {
			t.Fatal(err)
		}
		ctx, cancel := context.WithCancel(context.Background())
		go func() {
			for r.Progress().Records == 0 {
				time.Sleep(time.Millisecond)
			}
			cancel()
		}()
		_, err = r.RunFile(ctx, big)
		cancel()
		if !errors.Is(err, context.Canceled) {
			t.Fatalf("%s: RunFile after cancel: %v", order, err)
		}
		if names, _ := os.ReadDir(out); len(names) != 0 {
			t.Errorf("%s: left %d files in the output folder", order, len(names))
		}
	}
	deadline := time.Now().Add(5 * time.Second)
	for runtime.NumGoroutine() > before && time.Now().Before(deadline) {
		time.Sleep(10 * time.Millisecond)
	}
	if n := runtime.NumGoroutine(); n > before {
		t.Errorf("%d goroutines after the cancelled replays, %d before", n, before)
	}
}

// sortedAUC equals AUC bit for bit: random predictions with many ties
// (rounded to a few levels), all ties, one class, and real BKT predictions.
func TestSortedAUC(t *testing.T) {
	r := rand.New(rand.NewPCG(5, 6))
	for n := range []int{0, 1, 2, 10, 255, 256, 1000, 100000} {
		for _, levels := range []float64{0, 3, 20, 1000} {
			size := []int{0, 1, 2, 10, 255, 256, 1000, 100000}[n]
			p := make([]float64, size)
			y := make([]bool, size)
			for i := range p {
				p[i] = r.Float64()
				if levels > 0 {
					p[i] = math.Round(p[i]*levels) / levels
				}
				y[i] = r.Float64() < p[i]
			}
			got, want := sortedAUC(p, y), AUC(p, y)
			if !(got == want || math.IsNaN(got) && math.IsNaN(want)) {
				t.Fatalf("n=%d levels=%v: sortedAUC %v, AUC %v", size, levels, got, want)
			}
		}
	}
	_, res, _ := runReplay(t, replayInput, ReplayOptions{Params: []NamedParams{loadParams(t, "params-a.json")}})
	if res.Models[0].Overall.AUC == 0 || math.IsNaN(res.Models[0].Overall.AUC) {
		t.Fatal("no AUC")
	}
}

// fastDecodeCases are lines for the fast path's tests: the common shape
// and its variations, each of which the fast path must either read exactly
// as state.NativeDecoder does or leave to it.
var fastDecodeCases = []string{
	`{"id":"a1","learner":"hl-1","item":"q1","skills":["trial-balance"],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s1","s2","s1"],"correct":false,"at":"2025-09-01T18:00:40Z"}`,
	`{ "id" : "a1" , "learner" : "hl-1" , "skills" : [ "s1" , "s2" ] , "correct" : true , "at" : "2025-09-01T18:00:40.123456789Z" }`,
	`{"version":1,"id":"a,1","learner":" hl-1","skills":["a,b"],"correct":true,"at":"2024-02-29T23:59:59.000000001Z"}`,
	`{"id":"a1","learner":"a-learner-id-longer-than-sixteen","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.100Z","note":"x","n":-1.5e+3,"t":true,"f":false,"z":null,"k":0}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T20:00:40.8+02:00"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.1234567891Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01t18:00:40Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-02-29T18:00:40Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2000-02-29T18:00:40Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"1900-02-29T18:00:40Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-31T18:00:40Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-13-01T18:00:40Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T24:00:00Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T23:60:00Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T23:59:60Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"1500-01-01T00:00:00Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2262-04-11T23:47:16.854775807Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2262-04-11T23:47:16.854775808Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"1677-09-21T00:12:43.145224192Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"9999-12-31T23:59:59Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"0000-01-01T00:00:00Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","version":2}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","version":1.0}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","version":01}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","version":10}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","id":"a2"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","ID":"a2"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","Skills":[]}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","extra":{"a":1}}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","extra":[1]}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","n":01}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","n":1.}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","n":-}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","n":1e}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z","n":nul}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":truex,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":"true","at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z",}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z"}}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z"} x`,
	`{"id":"a1","learner":"hl-1","skills":["s",],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","skills":[],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","skills":[""],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","skills":"s","correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","skills":null,"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","item":null,"skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","item":7,"skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true}`,
	`{"id":"a1","learner":"hl-1","item":"q1","correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a\"1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a\u00e91","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"aé1","learner":"hl-é","skills":["sé"],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	"{\"id\":\"a\x001\",\"learner\":\"hl-1\",\"skills\":[\"s\"],\"correct\":true,\"at\":\"2025-09-01T18:00:40.8Z\"}",
	"{\"id\":\"a1\",\t\"learner\":\"hl-1\",\"skills\":[\"s\"],\"correct\":true,\"at\":\"2025-09-01T18:00:40.8Z\"}",
	"{\"id\":\"a1\x7f\",\"learner\":\"hl-1\",\"skills\":[\"s\"],\"correct\":true,\"at\":\"2025-09-01T18:00:40.8Z\"}",
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z"`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z}`,
	`{"id":"a1" "learner":"hl-1","skills":["s"],"correct":true,"at":"2025-09-01T18:00:40.8Z"}`,
	`{"id":"a1","learner":"hl-1","skills":["s"],"correct":true,"at":2025}`,
	`{}`, `{"}`, `{"":1}`, `[]`, `"x"`, `null`, `{"id":}`,
}

// fastDecode reads exactly what state.NativeDecoder reads, on every line it
// takes, and takes the common shape (so that replay's figures are of the
// fast path).
func TestReplayFastDecode(t *testing.T) {
	var dec state.NativeDecoder
	took := 0
	for _, line := range fastDecodeCases {
		if checkFastDecode(t, &dec, line) {
			took++
		}
	}
	for _, line := range fastDecodeCases[:5] {
		var fd fastDecoder
		var sk []string
		if _, ok := fd.decode(line, &sk); !ok {
			t.Errorf("the fast path left a line of the common shape to the decoder: %s", line)
		}
	}
	// Every line of the replay fixtures of the common shape.
	for _, name := range []string{replayInput, "../testdata/replay/extras-middle.jsonl", "../testdata/replay/extras-end.jsonl"} {
		for _, line := range strings.Split(string(readFile(t, name)), "\n") {
			if checkFastDecode(t, &dec, strings.TrimSpace(line)) {
				took++
			}
		}
	}
	if took < 1000 {
		t.Errorf("the fast path took only %d lines", took)
	}
}

// checkFastDecode compares the two decoders on line and reports whether the
// fast path took it.
func checkFastDecode(t *testing.T, dec *state.NativeDecoder, line string) bool {
	t.Helper()
	var fd fastDecoder
	sk := []string{"before"}
	fa, ok := fd.decode(line, &sk)
	if !ok {
		if len(sk) != 1 {
			t.Errorf("%s: the fast path refused the line but kept %d skills", line, len(sk)-1)
		}
		return false
	}
	a, err := dec.Decode([]byte(line))
	if err != nil {
		t.Errorf("%s: the fast path took a line the decoder rejects (%v)", line, err)
		return true
	}
	if a.At.Before(minReplayAt) || a.At.After(maxReplayAt) {
		t.Errorf("%s: the fast path took a time beyond the storable range", line)
	}
	if fa.id != a.ID || fa.learner != a.Learner || fa.correct != a.Correct || fa.at != a.At.UnixNano() || !slices.Equal(sk[1:], a.Skills) {
		t.Errorf("%s: fast path %+v %q, decoder %+v", line, fa, sk[1:], a)
	}
	if fa.atText != "" && fa.atText != string(appendUTC(nil, fa.at)) {
		t.Errorf("%s: time text %q kept, but appendUTC writes %q", line, fa.atText, appendUTC(nil, fa.at))
	}
	return true
}

func FuzzReplayFastDecode(f *testing.F) {
	for _, line := range fastDecodeCases {
		f.Add(line)
	}
	var dec state.NativeDecoder
	f.Fuzz(func(t *testing.T, line string) {
		checkFastDecode(t, &dec, strings.TrimSpace(line))
	})
}

// parseUTC agrees with time.Parse on every day of 1700–2200 and on times
// within a day.
func TestReplayParseUTC(t *testing.T) {
	var fd fastDecoder
	check := func(s string) {
		t.Helper()
		got, ok := fd.parseUTC(s)
		want, err := time.Parse(time.RFC3339Nano, s)
		if !ok || err != nil || got != want.UnixNano() {
			t.Fatalf("%s: parseUTC %d %v, time.Parse %v %v", s, got, ok, want, err)
		}
	}
	for d := time.Date(1700, 1, 1, 0, 0, 0, 0, time.UTC); d.Year() <= 2200; d = d.AddDate(0, 0, 1) {
		check(d.Format("2006-01-02T15:04:05Z"))
	}
	r := rand.New(rand.NewPCG(7, 8))
	for range 100000 {
		lo, hi := time.Date(1700, 1, 1, 0, 0, 0, 0, time.UTC).Unix(), time.Date(2201, 1, 1, 0, 0, 0, 0, time.UTC).Unix()
		ns := time.Unix(lo+r.Int64N(hi-lo), 0).UnixNano()
		switch r.IntN(3) {
		case 1:
			ns += r.Int64N(1e9)
		case 2:
			ns += r.Int64N(1000) * 1e6
		}
		s := string(appendUTC(nil, ns))
		check(s)
		if _, canonical, _ := fd.parseAt(s); !canonical {
			t.Fatalf("%s: appendUTC's own text is not kept as it is", s)
		}
	}
}

// A replay reads the same answers whichever of the two decoders reads a
// line: the same file with every line made to go the decoder's way (a tab
// after the opening brace, valid JSON the fast path leaves alone) gives the
// same predictions.csv and events.csv and the same counts.
func TestReplayFastPathSameOutputs(t *testing.T) {
	var lines []string
	for _, name := range []string{replayInput} {
		lines = append(lines, strings.Split(string(readFile(t, name)), "\n")...)
	}
	lines = append(lines, fastDecodeCases...)
	var slow strings.Builder
	for _, l := range lines {
		if strings.HasPrefix(l, "{") {
			l = "{\t" + l[1:]
		}
		slow.WriteString(l + "\n")
	}
	dir := t.TempDir()
	fast, slowPath := filepath.Join(dir, "fast.jsonl"), filepath.Join(dir, "slow.jsonl")
	if err := os.WriteFile(fast, []byte(strings.Join(lines, "\n")+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(slowPath, []byte(slow.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	for _, order := range []Order{OrderAt, OrderArrival} {
		opt := ReplayOptions{Params: []NamedParams{loadParams(t, "params-a.json"), loadParams(t, "params-b.json")}, Policies: fixturePolicies, Order: order}
		_, rf, df := runReplay(t, fast, opt)
		_, rs, ds := runReplay(t, slowPath, opt)
		if rf.Answers != rs.Answers || rf.Rejected != rs.Rejected || rf.Duplicates != rs.Duplicates || rf.Late != rs.Late || rf.Learners != rs.Learners || rf.Answers < 1400 {
			t.Errorf("%s: fast path %d answers, %d rejected, %d duplicates, %d late, %d learners; decoder %d, %d, %d, %d, %d",
				order, rf.Answers, rf.Rejected, rf.Duplicates, rf.Late, rf.Learners, rs.Answers, rs.Rejected, rs.Duplicates, rs.Late, rs.Learners)
		}
		for _, name := range []string{"predictions.csv", "events.csv"} {
			if !bytes.Equal(readFile(t, filepath.Join(df, name)), readFile(t, filepath.Join(ds, name))) {
				t.Errorf("%s (%s order): the fast path's differs from the decoder's", name, order)
			}
		}
	}
}

// needsQuotesString, eight bytes at a time, agrees with a byte-by-byte
// reading: every special byte at every position of strings of 1–24 bytes,
// among plain, high and neighbouring bytes.
func TestReplayNeedsQuotes(t *testing.T) {
	want := func(s string) bool {
		return s != "" && (s[0] == ' ' || strings.ContainsAny(s, ",\"\r\n"))
	}
	for n := 1; n <= 24; n++ {
		for _, fill := range []byte{'a', 0xff, 0x80, '+', '-', '!', '#', '\t', '\f', 0x0b, 0x0e, 0x0c} {
			base := bytes.Repeat([]byte{fill}, n)
			if got := needsQuotesString(string(base)); got != want(string(base)) {
				t.Errorf("%q: %v", base, got)
			}
			for i := range n {
				for _, c := range []byte{',', '"', '\r', '\n', ' '} {
					b := slices.Clone(base)
					b[i] = c
					if got := needsQuotesString(string(b)); got != want(string(b)) {
						t.Errorf("%q: %v", b, got)
					}
				}
			}
		}
	}
}
