package fitjob

import (
	"math"
	"slices"

	"github.com/attain-dev/attain/state"
)

// Next-answer prediction metrics. Every function takes predictions p
// (P(correct), in [0, 1]) and outcomes y (true = correct) of equal length;
// the checks against python3-sklearn 1.2.1 are in metrics_test.go.

// LogLossEps is the clipping bound of LogLoss: predictions are clipped to
// [eps, 1−eps] before taking logs. It is float64 machine epsilon (2^−52),
// the default of sklearn.metrics.log_loss in scikit-learn 1.2.1 (eps="auto"
// = np.finfo(float64).eps; before 1.2 it was 1e-15).
const LogLossEps = 0x1p-52

// AUC is the area under the ROC curve, computed as the Mann-Whitney
// statistic with tied predictions given their average rank: the probability
// that a random correct answer got a higher prediction than a random wrong
// one, ties counting one half. It is NaN when y holds only one class.
func AUC(p []float64, y []bool) float64 {
	type pair struct {
		p float64
		y bool
	}
	ps := make([]pair, len(p))
	for i := range p {
		ps[i] = pair{p[i], y[i]}
	}
	slices.SortFunc(ps, func(a, b pair) int {
		switch {
		case a.p < b.p:
			return -1
		case a.p > b.p:
			return 1
		}
		return 0
	})
	// Walk groups of equal predictions in increasing order. A correct answer
	// in a group beats every wrong answer below the group and ties (½) with
	// the wrong answers inside it; this is the rank-sum U with average ranks,
	// kept in integers and halves so that it is exact.
	var u2 float64 // 2U
	var negBelow, pos, neg int
	for i := 0; i < len(ps); {
		j := i
		var gp, gn int
		for ; j < len(ps) && ps[j].p == ps[i].p; j++ {
			if ps[j].y {
				gp++
			} else {
				gn++
			}
		}
		u2 += float64(gp) * float64(2*negBelow+gn)
		negBelow += gn
		pos += gp
		neg += gn
		i = j
	}
	if pos == 0 || neg == 0 {
		return math.NaN()
	}
	return u2 / 2 / (float64(pos) * float64(neg))
}

// RMSE is the root mean squared difference between prediction and outcome
// (1 = correct, 0 = wrong). NaN when empty.
func RMSE(p []float64, y []bool) float64 {
	if len(p) == 0 {
		return math.NaN()
	}
	var s float64
	for i := range p {
		d := b2f(y[i]) - p[i]
		s += d * d
	}
	return math.Sqrt(s / float64(len(p)))
}

// LogLoss is the mean negative natural-log likelihood of the outcomes
// under the predictions, with p clipped to [LogLossEps, 1−LogLossEps] and the
// pair (1−p, p) renormalised to sum to one, exactly as
// sklearn.metrics.log_loss does in scikit-learn 1.2.1. NaN when empty.
func LogLoss(p []float64, y []bool) float64 {
	if len(p) == 0 {
		return math.NaN()
	}
	var s float64
	for i := range p {
		s += logLoss1(p[i], y[i])
	}
	return s / float64(len(p))
}

func logLoss1(p float64, y bool) float64 {
	p = min(max(p, LogLossEps), 1-LogLossEps)
	q := 1 - p
	sum := q + p // not always exactly 1 in floating point; sklearn divides by it
	if y {
		return -math.Log(p / sum)
	}
	return -math.Log(q / sum)
}

// Accuracy is the share of answers whose outcome matches the prediction
// thresholded at 0.5 (p ≥ 0.5 predicts correct; common practice). NaN when
// empty.
func Accuracy(p []float64, y []bool) float64 {
	if len(p) == 0 {
		return math.NaN()
	}
	var hit int
	for i := range p {
		if (p[i] >= 0.5) == y[i] {
			hit++
		}
	}
	return float64(hit) / float64(len(p))
}

// CalibrationBins is the number of equal-width bins of Calibration.
const CalibrationBins = 10

// CalibrationBin is one row of a calibration table.
type CalibrationBin struct {
	Lo, Hi        float64 // the bin is [Lo, Hi); the last one is [0.9, 1]
	Count         int
	MeanPredicted float64 // NaN when Count is 0
	ObservedRate  float64 // share of correct answers; NaN when Count is 0
}

// Calibration bins the predictions into [0, 0.1), [0.1, 0.2), …, [0.9, 1]
// (an edge value goes to the upper bin; 1 goes to the last) and reports per
// bin the count, the mean prediction and the observed rate of correct
// answers. Edges are the float64 nearest to k/10.
func Calibration(p []float64, y []bool) [CalibrationBins]CalibrationBin {
	var bins [CalibrationBins]CalibrationBin
	var sumP, sumY [CalibrationBins]float64
	for i := range p {
		b := calibrationBin(p[i])
		bins[b].Count++
		sumP[b] += p[i]
		sumY[b] += b2f(y[i])
	}
	for b := range bins {
		bins[b].Lo = float64(b) / CalibrationBins
		bins[b].Hi = float64(b+1) / CalibrationBins
		bins[b].MeanPredicted, bins[b].ObservedRate = math.NaN(), math.NaN()
		if n := float64(bins[b].Count); n > 0 {
			bins[b].MeanPredicted = sumP[b] / n
			bins[b].ObservedRate = sumY[b] / n
		}
	}
	return bins
}

func calibrationBin(p float64) int {
	b := 0
	for b < CalibrationBins-1 && p >= float64(b+1)/CalibrationBins {
		b++
	}
	return b
}

func b2f(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

// Scores accumulates next-answer predictions and their outcomes, for one
// skill or for all answers, and computes the metrics above over them. The
// zero value is empty and ready to use. Not safe for concurrent use.
type Scores struct {
	p []float64
	y []bool
}

// Add records one prediction made before an answer and the answer's outcome.
func (s *Scores) Add(p float64, correct bool) {
	s.p = append(s.p, p)
	s.y = append(s.y, correct)
}

// Merge appends every pair of o, in o's order.
func (s *Scores) Merge(o *Scores) {
	s.p = append(s.p, o.p...)
	s.y = append(s.y, o.y...)
}

// N is the number of scored answers.
func (s *Scores) N() int { return len(s.p) }

// Correct is the number of correct answers among them.
func (s *Scores) Correct() int {
	var n int
	for _, y := range s.y {
		if y {
			n++
		}
	}
	return n
}

// AUC, RMSE, LogLoss, Accuracy and Calibration are the functions of the
// same names over the accumulated pairs.
func (s *Scores) AUC() float64      { return AUC(s.p, s.y) }
func (s *Scores) RMSE() float64     { return RMSE(s.p, s.y) }
func (s *Scores) LogLoss() float64  { return LogLoss(s.p, s.y) }
func (s *Scores) Accuracy() float64 { return Accuracy(s.p, s.y) }
func (s *Scores) Calibration() [CalibrationBins]CalibrationBin {
	return Calibration(s.p, s.y)
}

// Metrics returns AUC, RMSE and log-loss in the parameter file's form, and
// ok=false when one of them is undefined (no answers, or only one outcome
// class for AUC): JSON cannot carry NaN.
func (s *Scores) Metrics() (m state.Metrics, ok bool) {
	m = state.Metrics{AUC: s.AUC(), RMSE: s.RMSE(), LogLoss: s.LogLoss()}
	ok = !math.IsNaN(m.AUC) && !math.IsNaN(m.RMSE) && !math.IsNaN(m.LogLoss)
	return m, ok
}
