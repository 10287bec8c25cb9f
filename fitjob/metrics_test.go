package fitjob

import (
	"encoding/json"
	"math"
	"os"
	"testing"
	"time"

	"github.com/attain-dev/attain/state"
)

type sklearnCase struct {
	Name        string    `json:"name"`
	Y           []int     `json:"y"`
	P           []float64 `json:"p"`
	AUC         float64   `json:"auc"`
	LogLoss     float64   `json:"logloss"`
	RMSE        float64   `json:"rmse"`
	Accuracy    float64   `json:"accuracy"`
	Calibration *struct {
		ProbTrue []float64 `json:"prob_true"`
		ProbPred []float64 `json:"prob_pred"`
	} `json:"calibration"`
}

func loadSklearnCases(t *testing.T) []sklearnCase {
	t.Helper()
	b, err := os.ReadFile("../testdata/sklearn/fixtures.json")
	if err != nil {
		t.Fatal(err)
	}
	var f struct {
		Sklearn string        `json:"sklearn"`
		Cases   []sklearnCase `json:"cases"`
	}
	if err := json.Unmarshal(b, &f); err != nil {
		t.Fatal(err)
	}
	if f.Sklearn != "1.2.1" {
		t.Fatalf("fixtures made with sklearn %s, want 1.2.1 (regenerate with /usr/bin/python3)", f.Sklearn)
	}
	if len(f.Cases) < 5 {
		t.Fatalf("only %d fixture cases", len(f.Cases))
	}
	return f.Cases
}

func metricsRelEq(got, want, tol float64) bool {
	if got == want {
		return true
	}
	return math.Abs(got-want) <= tol*math.Max(math.Abs(want), math.SmallestNonzeroFloat64)
}

// Reference: python3-sklearn 1.2.1 (Debian), by testdata/sklearn/make_fixtures.py:
// roc_auc_score, log_loss, mean_squared_error(squared=False), accuracy_score,
// calibration_curve(n_bins=10, strategy="uniform").
func TestMetricsMatchSklearn(t *testing.T) {
	const tol = 1e-12
	for _, c := range loadSklearnCases(t) {
		t.Run(c.Name, func(t *testing.T) {
			y := make([]bool, len(c.Y))
			for i, v := range c.Y {
				y[i] = v == 1
			}
			checks := []struct {
				name      string
				got, want float64
			}{
				{"auc (sklearn roc_auc_score)", AUC(c.P, y), c.AUC},
				{"logloss (sklearn log_loss)", LogLoss(c.P, y), c.LogLoss},
				{"rmse (sklearn mean_squared_error, squared=False)", RMSE(c.P, y), c.RMSE},
				{"accuracy (sklearn accuracy_score of p >= 0.5)", Accuracy(c.P, y), c.Accuracy},
			}
			for _, ch := range checks {
				if !metricsRelEq(ch.got, ch.want, tol) {
					t.Errorf("%s = %.17g, sklearn %.17g (rel diff %.3g)", ch.name, ch.got, ch.want, math.Abs(ch.got-ch.want)/math.Abs(ch.want))
				}
			}
			var s Scores
			for i := range c.P {
				s.Add(c.P[i], y[i])
			}
			if m, ok := s.Metrics(); !ok || m.AUC != AUC(c.P, y) || m.LogLoss != LogLoss(c.P, y) || m.RMSE != RMSE(c.P, y) {
				t.Errorf("Scores.Metrics = %+v, %v; want the functions' values", m, ok)
			}
			if c.Calibration == nil {
				return // a prediction on a bin edge: sklearn 1.2.1 bins edges downwards
			}
			// sklearn's calibration_curve lists the non-empty bins only.
			var k int
			for _, b := range Calibration(c.P, y) {
				if b.Count == 0 {
					continue
				}
				if k >= len(c.Calibration.ProbTrue) {
					t.Fatalf("more non-empty bins than sklearn's %d", len(c.Calibration.ProbTrue))
				}
				if !metricsRelEq(b.ObservedRate, c.Calibration.ProbTrue[k], tol) || !metricsRelEq(b.MeanPredicted, c.Calibration.ProbPred[k], tol) {
					t.Errorf("bin [%g,%g): observed %.17g predicted %.17g; sklearn calibration_curve %.17g %.17g",
						b.Lo, b.Hi, b.ObservedRate, b.MeanPredicted, c.Calibration.ProbTrue[k], c.Calibration.ProbPred[k])
				}
				k++
			}
			if k != len(c.Calibration.ProbTrue) {
				t.Errorf("%d non-empty bins, sklearn %d", k, len(c.Calibration.ProbTrue))
			}
		})
	}
}

// Worked by hand from the Mann-Whitney definition (pairs won + ½ pairs tied,
// over all pairs): positives {0.5, 0.5, 0.9}, negatives {0.1, 0.5}:
// 0.5 vs 0.1 win, 0.5 vs 0.5 tie (×2 positives), 0.9 wins both:
// (1 + ½) + (1 + ½) + 2 = 5 of 6 pairs.
func TestAUCTiesByHand(t *testing.T) {
	p := []float64{0.5, 0.1, 0.5, 0.9, 0.5}
	y := []bool{true, false, true, true, false}
	if got, want := AUC(p, y), 5.0/6; math.Abs(got-want) > 1e-15 {
		t.Errorf("AUC = %v, want %v", got, want)
	}
	if got := AUC([]float64{0.3, 0.4}, []bool{true, true}); !math.IsNaN(got) {
		t.Errorf("AUC of one class = %v, want NaN", got)
	}
	var s Scores
	s.Add(0.7, true)
	if _, ok := s.Metrics(); ok {
		t.Error("Metrics of one class reported ok")
	}
}

// The bin convention [k/10, (k+1)/10), with 1 in the last bin, is ours
// (the brief's table); sklearn 1.2.1 puts an edge in the lower bin, so edges
// are checked here by hand.
func TestCalibrationEdges(t *testing.T) {
	p := []float64{0, 0.1, 0.3, 0.29999, 0.5, 0.9, 0.95, 1}
	y := []bool{false, true, true, false, true, false, true, true}
	bins := Calibration(p, y)
	want := map[int]int{0: 1, 1: 1, 2: 1, 3: 1, 5: 1, 9: 3}
	for b, bin := range bins {
		if bin.Count != want[b] {
			t.Errorf("bin %d [%g,%g): count %d, want %d", b, bin.Lo, bin.Hi, bin.Count, want[b])
		}
		if bin.Count == 0 && !math.IsNaN(bin.MeanPredicted) {
			t.Errorf("empty bin %d: mean %v, want NaN", b, bin.MeanPredicted)
		}
	}
	if got := bins[9].ObservedRate; math.Abs(got-2.0/3) > 1e-15 {
		t.Errorf("last bin observed %v, want 2/3", got)
	}
	if got := bins[9].MeanPredicted; math.Abs(got-(0.9+0.95+1)/3) > 1e-15 {
		t.Errorf("last bin mean %v", got)
	}
}

func TestCombine(t *testing.T) {
	if got := Combine([]float64{0.8}); got != 0.8 {
		t.Errorf("one skill: %v", got)
	}
	if got := Combine([]float64{0.2, 0.6, 0.7}); math.Abs(got-0.5) > 1e-15 {
		t.Errorf("mean of 0.2, 0.6, 0.7 = %v, want 0.5", got)
	}
}

// Evaluate predicts before applying, scores a multi-skill answer once
// overall, and walks each learner in `at` order whatever the input order.
// Expected values come from the BKT equations (Corbett & Anderson, 1995)
// evaluated step by step here.
func TestEvaluateReplay(t *testing.T) {
	pa := state.Params{Prior: 0.3, Learn: 0.2, Guess: 0.2, Slip: 0.1}
	pb := state.Params{Prior: 0.6, Learn: 0.1, Guess: 0.25, Slip: 0.05}
	pf := &state.ParamFile{Version: 1, Default: state.DefaultParams(), Skills: map[string]state.SkillParams{
		"a": {Params: pa}, "b": {Params: pb},
	}}
	t0 := time.Date(2025, 1, 1, 0, 0, 0, 0, time.UTC)
	var hb HistoryBuilder
	// Given out of order; the second answer is tagged with both skills.
	hb.Add(state.Answer{ID: "3", Learner: "x", Skills: []string{"b"}, Correct: false, At: t0.Add(3 * time.Minute)})
	hb.Add(state.Answer{ID: "1", Learner: "x", Skills: []string{"a"}, Correct: true, At: t0.Add(time.Minute)})
	hb.Add(state.Answer{ID: "2", Learner: "x", Skills: []string{"a", "b", "a"}, Correct: true, At: t0.Add(2 * time.Minute)})
	if hb.Add(state.Answer{ID: "2", Learner: "x", Skills: []string{"a"}, Correct: false, At: t0}) {
		t.Error("a repeated id was added")
	}
	h := hb.History()
	if h.Duplicates != 1 || h.Answers() != 3 {
		t.Fatalf("duplicates %d answers %d, want 1 and 3", h.Duplicates, h.Answers())
	}
	ev := h.Evaluate(nil, pf)

	la := pa.Prior
	p1 := pa.Predict(la) // answer 1, skill a
	la = pa.Step(la, true)
	p2a, p2b := pa.Predict(la), pb.Predict(pb.Prior) // answer 2, both
	la = pa.Step(la, true)
	lb := pb.Step(pb.Prior, true)
	p3 := pb.Predict(lb) // answer 3, skill b

	if ev.Overall.N() != 3 {
		t.Fatalf("overall scored %d answers, want 3 (once per answer)", ev.Overall.N())
	}
	wantOverall := []float64{p1, (p2a + p2b) / 2, p3}
	for i, w := range wantOverall {
		if math.Abs(ev.Overall.p[i]-w) > 1e-15 {
			t.Errorf("overall prediction %d = %v, want %v", i, ev.Overall.p[i], w)
		}
	}
	if ev.Skills[0].N() != 2 || ev.Skills[1].N() != 2 {
		t.Fatalf("per-skill counts %d, %d; want 2, 2", ev.Skills[0].N(), ev.Skills[1].N())
	}
	// Records carry 1 − P(L) separately (state.Params.StepPair), so they
	// may differ from Step/Predict on P(L) alone in the last bits.
	if math.Abs(ev.Skills[0].p[1]-p2a) > 1e-15 || math.Abs(ev.Skills[1].p[0]-p2b) > 1e-15 || math.Abs(ev.Skills[1].p[1]-p3) > 1e-15 {
		t.Errorf("per-skill predictions %v %v, want [%v %v] [%v %v]", ev.Skills[0].p, ev.Skills[1].p, p1, p2a, p2b, p3)
	}
	if got := ev.Overall.y; !got[0] || !got[1] || got[2] {
		t.Errorf("outcomes %v, want [true true false]", got)
	}
}

func TestFoldsDeterministicAndBalanced(t *testing.T) {
	a, b := Folds(103, 5, 7), Folds(103, 5, 7)
	c := Folds(103, 5, 8)
	var size [5]int
	same := true
	for i := range a {
		if a[i] != b[i] {
			t.Fatal("same seed gave different folds")
		}
		if a[i] != c[i] {
			same = false
		}
		size[a[i]]++
	}
	if same {
		t.Error("different seeds gave the same folds")
	}
	for f, n := range size {
		if n < 20 || n > 21 {
			t.Errorf("fold %d has %d learners, want 20 or 21", f, n)
		}
	}
}
