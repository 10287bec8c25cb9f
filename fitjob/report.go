package fitjob

import (
	"encoding/json"
	"fmt"
	"math"
	"os"
	"slices"
	"sort"
	"strconv"
	"sync"
	"time"

	"github.com/attain-dev/attain/state"
)

// ReplayResult is everything a replay measured: what was read, and per
// parameter set the prediction scores, learning curves and mastery
// outcomes under every policy. WriteMetricsJSON and WriteReportHTML render
// it.
type ReplayResult struct {
	Source       string
	Order        Order
	Sorted       bool // the file was out of `at` order and was sorted in memory
	DedupeWindow int
	// Records counts the input records read (blank lines not included),
	// valid or not; Answers those applied.
	Records, Blank, Answers int64
	Duplicates              int64 // skipped: id already applied for the learner
	// Late counts answers applied after one of the same learner dated
	// later (the store's ApplyResult.Late: arrival order only); OutOfOrder
	// those dated earlier than the learner's previous answer in the source,
	// which OrderAt moved into place.
	Late, OutOfOrder   int64
	Rejected           int64
	RejectedByField    map[string]int64 // "" = the record as a whole
	RejectedListed     []RejectedRecord // the first RejectsListed, in input order
	RejectsListMax     int
	Learners           int
	FirstAt, LastAt    time.Time // range of `at` of the applied answers (zero when none)
	Skills             []string  // sorted
	Policies           []state.Policy
	Models             []ModelResult // in ReplayOptions.Params order
	CurveOpportunities int
}

// ModelResult is one parameter set's replay.
type ModelResult struct {
	Name    string
	Version int64
	Created time.Time
	Overall ScoreSummary
	Skills  []SkillResult    // in ReplayResult.Skills order
	Mastery []MasteryStats   // per policy, all skills together
	File    *state.ParamFile `json:"-"`
}

// SkillResult is one skill under one parameter set.
type SkillResult struct {
	Skill       string
	Params      state.Params
	Version     int64
	UsesDefault bool // the set has no entry for the skill: its default serves it
	Fit         *state.FitInfo
	Learners    int
	Scores      ScoreSummary
	Curve       []CurvePoint
	Mastery     []MasteryStats // per policy
}

// ScoreSummary are next-answer prediction scores; a score that is
// undefined (no answers, or one outcome class only for AUC) is NaN.
type ScoreSummary struct {
	Answers, Correct, Learners int
	AUC, RMSE, LogLoss         float64
	Accuracy                   float64
	Calibration                [CalibrationBins]CalibrationBin
}

// CurvePoint is one opportunity of a learning curve: among the answers
// given at that opportunity (1 = a learner's first answer at the skill),
// the share that were wrong and the mean predicted chance of a wrong
// answer.
type CurvePoint struct {
	Opportunity    int
	Answers        int64
	ObservedError  float64
	PredictedError float64
}

// MasteryStats are the mastery outcomes of learner-skills under one
// policy.
type MasteryStats struct {
	Policy          state.Policy
	LearnerSkills   int // learner-skills with at least one answer
	Reached         int // learner-skills that reached mastery at least once
	LearnersReached int // distinct learners who reached mastery of at least one of the skills counted
	ReachEvents     int // upward crossings (reached events)
	// Opportunities until the first reach, over the learner-skills that
	// reached mastery: quartiles by linear interpolation between order
	// statistics (Hyndman & Fan 1996, definition 7, numpy's default).
	Median, Q1, Q3, Mean float64 // NaN when none reached
	Min, Max             int
	Distribution         []OpportunityCount // ascending
	Stuck                int                // flagged stuck
	StuckThenReached     int                // of those, reached mastery later
	// After their first reach: learner-skills that answered again, and
	// those whose next answer was wrong.
	AnsweredAfter, WrongAfter int
}

// WrongAfterShare is WrongAfter / AnsweredAfter (NaN when none answered
// again).
func (m MasteryStats) WrongAfterShare() float64 {
	if m.AnsweredAfter == 0 {
		return math.NaN()
	}
	return float64(m.WrongAfter) / float64(m.AnsweredAfter)
}

// OpportunityCount is one bar of the opportunities-to-mastery
// distribution.
type OpportunityCount struct {
	Opportunities int `json:"opportunities"`
	LearnerSkills int `json:"learner_skills"`
}

// finish computes the result of the pass.
func (rp *replayer) finish() (*ReplayResult, error) {
	opt := &rp.r.opt
	rp.trimRejects()
	res := &ReplayResult{
		Source: rp.source, Order: rp.order, Sorted: rp.sorted, DedupeWindow: rp.window,
		Records: rp.records, Blank: rp.blank, Answers: rp.answers, Duplicates: rp.duplicates, Late: rp.late, OutOfOrder: rp.outOfOrder,
		Rejected: rp.rejected, RejectedByField: rp.rejectByField, RejectedListed: rp.rejectList, RejectsListMax: max(opt.RejectsListed, 0),
		Learners: len(rp.learners), Policies: slices.Clone(opt.Policies), CurveOpportunities: opt.CurveOpportunities,
	}
	if rp.hasAt {
		res.FirstAt, res.LastAt = time.Unix(0, rp.firstAt).UTC(), time.Unix(0, rp.lastAt).UTC()
	}
	// Skills sorted by name; sidx[k] is the replay index of sorted skill k.
	sidx := make([]int32, len(rp.skills))
	for i := range sidx {
		sidx[i] = int32(i)
	}
	sort.Slice(sidx, func(a, b int) bool { return rp.skills[sidx[a]].name < rp.skills[sidx[b]].name })
	pos := make([]int, len(rp.skills)) // replay index → sorted position
	for k, s := range sidx {
		res.Skills = append(res.Skills, rp.skills[s].name)
		pos[s] = k
	}
	// Learners per skill.
	skillLearners := make([]int, len(rp.skills))
	for _, ls := range rp.lskills {
		skillLearners[ls.skill]++
	}
	// Scores are summarised in parallel (sorting for AUC dominates); every
	// job writes only its own slot, so the result does not depend on the
	// schedule.
	var jobs []scoreJob
	res.Models = make([]ModelResult, len(opt.Params))
	for m, np := range opt.Params {
		acc := &rp.models[m]
		mr := &res.Models[m]
		*mr = ModelResult{Name: np.Name, Version: np.File.Version, Created: np.File.Created, File: np.File}
		jobs = append(jobs, scoreJob{&acc.overall, &mr.Overall})
		mr.Skills = make([]SkillResult, len(sidx))
		for k, s := range sidx {
			si := &rp.skills[s]
			sp, has := np.File.Skills[si.name]
			sr := &mr.Skills[k]
			*sr = SkillResult{
				Skill: si.name, Params: si.params[m], Version: si.versions[m], UsesDefault: !has,
				Learners: skillLearners[s],
			}
			if has {
				sr.Fit = sp.Fit
			}
			jobs = append(jobs, scoreJob{&acc.skills[s], &sr.Scores})
			for o, c := range acc.curves[s] {
				if c.n == 0 {
					continue
				}
				sr.Curve = append(sr.Curve, CurvePoint{Opportunity: o + 1, Answers: c.n,
					ObservedError: float64(c.wrong) / float64(c.n), PredictedError: c.predWrong / float64(c.n)})
			}
		}
		for pi, pol := range opt.Policies {
			overall, perSkill := rp.masteryStats(m, pi, pol)
			mr.Mastery = append(mr.Mastery, overall)
			for s := range rp.skills {
				mr.Skills[pos[s]].Mastery = append(mr.Skills[pos[s]].Mastery, perSkill[s])
			}
		}
	}
	runScoreJobs(jobs, opt.Workers)
	for m := range res.Models {
		res.Models[m].Overall.Learners = len(rp.learners)
		for k := range res.Models[m].Skills {
			res.Models[m].Skills[k].Scores.Learners = res.Models[m].Skills[k].Learners
		}
	}
	return res, nil
}

type scoreJob struct {
	in  *Scores
	out *ScoreSummary
}

// runScoreJobs summarises every job on up to workers goroutines and waits
// for them.
func runScoreJobs(jobs []scoreJob, workers int) {
	next := make(chan scoreJob)
	var wg sync.WaitGroup
	for range max(1, min(workers, len(jobs))) {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for j := range next {
				*j.out = summariseScores(j.in)
			}
		}()
	}
	for _, j := range jobs {
		next <- j
	}
	close(next)
	wg.Wait()
}

func summariseScores(s *Scores) ScoreSummary {
	return ScoreSummary{
		Answers: s.N(), Correct: s.Correct(),
		AUC: sortedAUC(s.p, s.y), RMSE: s.RMSE(), LogLoss: s.LogLoss(), Accuracy: s.Accuracy(),
		Calibration: s.Calibration(),
	}
}

// sortedAUC is AUC (metrics.go) computed the same way — groups of equal
// predictions walked in increasing order, 2U accumulated in the same
// float64 operations, so the result is bit for bit the same
// (TestSortedAUC) — but with the pairs packed into one uint64 each
// (the prediction's bits, which order like the numbers for p ≥ 0, shifted
// left, the outcome in the low bit) and radix-sorted: on 10 million
// answers the sort that dominates the report takes a fraction of the time
// of a comparison sort of (p, y) structs. Predictions outside [0, 1] (not
// from BKT) go to AUC.
func sortedAUC(p []float64, y []bool) float64 {
	keys := make([]uint64, len(p))
	for i, x := range p {
		if !(x >= 0 && x <= 1) {
			return AUC(p, y)
		}
		k := math.Float64bits(x) << 1 // bit 63 is 0 for x ≥ 0 (−0 becomes +0, equal anyway)
		if y[i] {
			k |= 1
		}
		keys[i] = k
	}
	radixSort(keys)
	var u2 float64
	var negBelow, pos, neg int
	for i := 0; i < len(keys); {
		j := i
		var gp, gn int
		for ; j < len(keys) && keys[j]>>1 == keys[i]>>1; j++ {
			if keys[j]&1 == 1 {
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

// radixSort sorts keys ascending: least-significant-digit radix sort, 8
// passes of 8 bits, skipping a pass whose digit is the same in every key
// (most of them for probabilities, whose top bits barely vary).
func radixSort(keys []uint64) {
	if len(keys) < 256 {
		slices.Sort(keys)
		return
	}
	buf := make([]uint64, len(keys))
	src, dst := keys, buf
	for shift := uint(0); shift < 64; shift += 8 {
		var count [256]int
		for _, k := range src {
			count[(k>>shift)&0xff]++
		}
		if count[(src[0]>>shift)&0xff] == len(src) {
			continue // every key has this digit
		}
		sum := 0
		for d := range count {
			count[d], sum = sum, sum+count[d]
		}
		for _, k := range src {
			d := (k >> shift) & 0xff
			dst[count[d]] = k
			count[d]++
		}
		src, dst = dst, src
	}
	if &src[0] != &keys[0] {
		copy(keys, src)
	}
}

// masteryStats computes the outcomes of parameter set m under policy pi,
// over all skills and per skill (by replay index).
func (rp *replayer) masteryStats(m, pi int, pol state.Policy) (MasteryStats, []MasteryStats) {
	nm, np := rp.nModels, rp.nPol
	perSkill := make([]MasteryStats, len(rp.skills))
	opps := make([][]uint32, len(rp.skills))
	var all []uint32
	overall := MasteryStats{Policy: pol}
	for i := range perSkill {
		perSkill[i].Policy = pol
	}
	for li := range rp.learners {
		reachedAny := false
		for _, ref := range rp.learners[li].skills {
			t := &rp.tracks[(int(ref.ls)*nm+m)*np+pi]
			for _, st := range []*MasteryStats{&perSkill[ref.skill], &overall} {
				st.LearnerSkills++
				st.ReachEvents += int(t.reaches)
				if t.firstReach > 0 {
					st.Reached++
				}
				if t.stuckAt > 0 {
					st.Stuck++
					if t.firstReach > t.stuckAt {
						st.StuckThenReached++
					}
				}
				if t.next >= 2 {
					st.AnsweredAfter++
					if t.next == 3 {
						st.WrongAfter++
					}
				}
			}
			if t.firstReach > 0 {
				reachedAny = true
				perSkill[ref.skill].LearnersReached++
				opps[ref.skill] = append(opps[ref.skill], t.firstReach)
				all = append(all, t.firstReach)
			}
		}
		if reachedAny {
			overall.LearnersReached++
		}
	}
	for s := range perSkill {
		setOpportunityStats(&perSkill[s], opps[s])
	}
	setOpportunityStats(&overall, all)
	return overall, perSkill
}

func setOpportunityStats(st *MasteryStats, opps []uint32) {
	st.Median, st.Q1, st.Q3, st.Mean = math.NaN(), math.NaN(), math.NaN(), math.NaN()
	if len(opps) == 0 {
		return
	}
	slices.Sort(opps)
	st.Min, st.Max = int(opps[0]), int(opps[len(opps)-1])
	st.Q1, st.Median, st.Q3 = quantile7(opps, 0.25), quantile7(opps, 0.5), quantile7(opps, 0.75)
	var sum float64
	for i := 0; i < len(opps); {
		j := i
		for j < len(opps) && opps[j] == opps[i] {
			j++
		}
		st.Distribution = append(st.Distribution, OpportunityCount{Opportunities: int(opps[i]), LearnerSkills: j - i})
		sum += float64(opps[i]) * float64(j-i)
		i = j
	}
	st.Mean = sum / float64(len(opps))
}

// quantile7 is the q-quantile of sorted x by linear interpolation between
// the order statistics at (n−1)q (Hyndman & Fan 1996, definition 7; the
// default of numpy.percentile and R's quantile).
func quantile7(x []uint32, q float64) float64 {
	h := float64(len(x)-1) * q
	lo := int(math.Floor(h))
	if lo+1 >= len(x) {
		return float64(x[len(x)-1])
	}
	return float64(x[lo]) + (h-float64(lo))*(float64(x[lo+1])-float64(x[lo]))
}

// ---- metrics.json ----

// jnum is a float64 that encodes NaN and ±Inf as null (JSON has no NaN).
type jnum float64

func (f jnum) MarshalJSON() ([]byte, error) {
	x := float64(f)
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return []byte("null"), nil
	}
	return json.Marshal(x)
}

type jScores struct {
	AUC         jnum      `json:"auc"`
	RMSE        jnum      `json:"rmse"`
	LogLoss     jnum      `json:"logloss"`
	Accuracy    jnum      `json:"accuracy"`
	Answers     int       `json:"answers"`
	Correct     int       `json:"correct"`
	Learners    int       `json:"learners"`
	Calibration []jCalBin `json:"calibration"`
}

type jCalBin struct {
	Lo            jnum `json:"lo"`
	Hi            jnum `json:"hi"`
	Count         int  `json:"count"`
	MeanPredicted jnum `json:"mean_predicted"`
	ObservedRate  jnum `json:"observed_correct"`
}

type jSkill struct {
	jScores
	Params        state.Params   `json:"params"`
	ParamsVersion int64          `json:"params_version"`
	UsesDefault   bool           `json:"uses_default"`
	Fit           *state.FitInfo `json:"fit,omitempty"`
	LearningCurve []jCurvePoint  `json:"learning_curve"`
	Mastery       jMastery       `json:"mastery"`
}

type jCurvePoint struct {
	Opportunity    int   `json:"opportunity"`
	Answers        int64 `json:"answers"`
	ObservedError  jnum  `json:"observed_error"`
	PredictedError jnum  `json:"predicted_error"`
}

type jOpps struct {
	Median       jnum               `json:"median"`
	Q1           jnum               `json:"q1"`
	Q3           jnum               `json:"q3"`
	Mean         jnum               `json:"mean"`
	Min          *int               `json:"min"`
	Max          *int               `json:"max"`
	Distribution []OpportunityCount `json:"distribution"`
}

type jMastery struct {
	Threshold        float64 `json:"threshold"`
	StuckAfter       uint32  `json:"stuck_after"`
	LearnerSkills    int     `json:"learner_skills"`
	Reached          int     `json:"reached"`
	LearnersReached  int     `json:"learners_reached"`
	ReachEvents      int     `json:"reach_events"`
	Opportunities    jOpps   `json:"opportunities_to_mastery"`
	Stuck            int     `json:"stuck"`
	StuckThenReached int     `json:"stuck_then_reached"`
	AnsweredAfter    int     `json:"answered_after_mastery"`
	WrongAfter       int     `json:"wrong_after_mastery"`
	WrongAfterShare  jnum    `json:"wrong_after_mastery_share"`
}

type jWhatIf struct {
	jMastery
	Skills map[string]jMastery `json:"skills"`
}

type jDiff struct {
	AUC      jnum `json:"auc"`
	RMSE     jnum `json:"rmse"`
	LogLoss  jnum `json:"logloss"`
	Accuracy jnum `json:"accuracy"`
}

type jCompareSkill struct {
	jScores
	Params        state.Params `json:"params"`
	ParamsVersion int64        `json:"params_version"`
	UsesDefault   bool         `json:"uses_default"`
	Difference    jDiff        `json:"difference"`
}

type jCompare struct {
	Params     string                   `json:"params"`
	Version    int64                    `json:"version"`
	Overall    jScores                  `json:"overall"`
	Difference jDiff                    `json:"difference"`
	Skills     map[string]jCompareSkill `json:"skills"`
	WhatIf     []jWhatIf                `json:"what_if"`
}

type jParamSet struct {
	Name    string `json:"name"`
	Version int64  `json:"version"`
	Created string `json:"created,omitempty"`
}

type jData struct {
	Records    int64  `json:"records"`
	Answers    int64  `json:"answers"`
	Learners   int    `json:"learners"`
	Skills     int    `json:"skills"`
	Duplicates int64  `json:"duplicates"`
	Late       int64  `json:"late"`
	OutOfOrder int64  `json:"out_of_order"`
	BlankLines int64  `json:"blank_lines"`
	FirstAt    string `json:"first_at,omitempty"`
	LastAt     string `json:"last_at,omitempty"`
}

type jRejected struct {
	Count   int64            `json:"count"`
	ByField map[string]int64 `json:"by_field"`
	Listed  []RejectedRecord `json:"listed"`
	Max     int              `json:"listed_max"`
}

type jMetrics struct {
	Source       string            `json:"source"`
	Order        Order             `json:"order"`
	Sorted       bool              `json:"sorted_in_memory"`
	DedupeWindow int               `json:"dedupe_window"`
	CombineRule  string            `json:"combine_rule"`
	Data         jData             `json:"data"`
	Params       []jParamSet       `json:"params"`
	Overall      jScores           `json:"overall"`
	Skills       map[string]jSkill `json:"skills"`
	Mastery      jMastery          `json:"mastery"`
	WhatIf       []jWhatIf         `json:"what_if"`
	Comparison   []jCompare        `json:"comparison"`
	Rejected     jRejected         `json:"rejected"`
}

func jsonScores(s ScoreSummary) jScores {
	j := jScores{AUC: jnum(s.AUC), RMSE: jnum(s.RMSE), LogLoss: jnum(s.LogLoss), Accuracy: jnum(s.Accuracy),
		Answers: s.Answers, Correct: s.Correct, Learners: s.Learners}
	for _, b := range s.Calibration {
		j.Calibration = append(j.Calibration, jCalBin{Lo: jnum(b.Lo), Hi: jnum(b.Hi), Count: b.Count,
			MeanPredicted: jnum(b.MeanPredicted), ObservedRate: jnum(b.ObservedRate)})
	}
	return j
}

func jsonMastery(m MasteryStats) jMastery {
	j := jMastery{
		Threshold: m.Policy.Threshold, StuckAfter: m.Policy.StuckAfter,
		LearnerSkills: m.LearnerSkills, Reached: m.Reached, LearnersReached: m.LearnersReached, ReachEvents: m.ReachEvents,
		Opportunities: jOpps{Median: jnum(m.Median), Q1: jnum(m.Q1), Q3: jnum(m.Q3), Mean: jnum(m.Mean),
			Distribution: m.Distribution},
		Stuck: m.Stuck, StuckThenReached: m.StuckThenReached,
		AnsweredAfter: m.AnsweredAfter, WrongAfter: m.WrongAfter, WrongAfterShare: jnum(m.WrongAfterShare()),
	}
	if m.Reached > 0 {
		lo, hi := m.Min, m.Max
		j.Opportunities.Min, j.Opportunities.Max = &lo, &hi
	}
	if j.Opportunities.Distribution == nil {
		j.Opportunities.Distribution = []OpportunityCount{}
	}
	return j
}

func jsonWhatIf(mr *ModelResult) []jWhatIf {
	var out []jWhatIf
	for pi, m := range mr.Mastery {
		w := jWhatIf{jMastery: jsonMastery(m), Skills: map[string]jMastery{}}
		for _, sr := range mr.Skills {
			w.Skills[sr.Skill] = jsonMastery(sr.Mastery[pi])
		}
		out = append(out, w)
	}
	return out
}

func scoreDiff(b, a ScoreSummary) jDiff {
	return jDiff{AUC: jnum(b.AUC - a.AUC), RMSE: jnum(b.RMSE - a.RMSE), LogLoss: jnum(b.LogLoss - a.LogLoss), Accuracy: jnum(b.Accuracy - a.Accuracy)}
}

func rfc3339OrEmpty(t time.Time) string {
	if t.IsZero() {
		return ""
	}
	return t.UTC().Format(time.RFC3339Nano)
}

// MetricsJSON renders res as metrics.json: indented, keys of maps sorted,
// no wall-clock times, so the same replay gives the same bytes.
func (res *ReplayResult) MetricsJSON() ([]byte, error) {
	if len(res.Models) == 0 {
		return nil, fmt.Errorf("attain: replay result has no parameter set")
	}
	m0 := &res.Models[0]
	j := jMetrics{
		Source: res.Source, Order: res.Order, Sorted: res.Sorted, DedupeWindow: res.DedupeWindow, CombineRule: CombineRule,
		Data: jData{Records: res.Records, Answers: res.Answers, Learners: res.Learners, Skills: len(res.Skills),
			Duplicates: res.Duplicates, Late: res.Late, OutOfOrder: res.OutOfOrder, BlankLines: res.Blank,
			FirstAt: rfc3339OrEmpty(res.FirstAt), LastAt: rfc3339OrEmpty(res.LastAt)},
		Overall:    jsonScores(m0.Overall),
		Skills:     map[string]jSkill{},
		Mastery:    jsonMastery(m0.Mastery[0]),
		WhatIf:     jsonWhatIf(m0),
		Comparison: []jCompare{},
		Rejected: jRejected{Count: res.Rejected, ByField: res.RejectedByField, Listed: res.RejectedListed,
			Max: res.RejectsListMax},
	}
	if j.Rejected.Listed == nil {
		j.Rejected.Listed = []RejectedRecord{}
	}
	if j.Rejected.ByField == nil {
		j.Rejected.ByField = map[string]int64{}
	}
	for _, mr := range res.Models {
		ps := jParamSet{Name: mr.Name, Version: mr.Version}
		if !mr.Created.IsZero() {
			ps.Created = mr.Created.UTC().Format(time.RFC3339)
		}
		j.Params = append(j.Params, ps)
	}
	for _, sr := range m0.Skills {
		js := jSkill{jScores: jsonScores(sr.Scores), Params: sr.Params, ParamsVersion: sr.Version, UsesDefault: sr.UsesDefault,
			Fit: sr.Fit, Mastery: jsonMastery(sr.Mastery[0]), LearningCurve: []jCurvePoint{}}
		for _, c := range sr.Curve {
			js.LearningCurve = append(js.LearningCurve, jCurvePoint{Opportunity: c.Opportunity, Answers: c.Answers,
				ObservedError: jnum(c.ObservedError), PredictedError: jnum(c.PredictedError)})
		}
		j.Skills[sr.Skill] = js
	}
	for mi := 1; mi < len(res.Models); mi++ {
		mr := &res.Models[mi]
		c := jCompare{Params: mr.Name, Version: mr.Version, Overall: jsonScores(mr.Overall),
			Difference: scoreDiff(mr.Overall, m0.Overall), Skills: map[string]jCompareSkill{}, WhatIf: jsonWhatIf(mr)}
		for k, sr := range mr.Skills {
			c.Skills[sr.Skill] = jCompareSkill{jScores: jsonScores(sr.Scores), Params: sr.Params, ParamsVersion: sr.Version,
				UsesDefault: sr.UsesDefault, Difference: scoreDiff(sr.Scores, m0.Skills[k].Scores)}
		}
		j.Comparison = append(j.Comparison, c)
	}
	b, err := json.MarshalIndent(j, "", "  ")
	if err != nil {
		return nil, fmt.Errorf("attain: encoding metrics.json: %w", err)
	}
	return append(b, '\n'), nil
}

// WriteMetricsJSON writes MetricsJSON to path atomically.
func (res *ReplayResult) WriteMetricsJSON(path string) error {
	b, err := res.MetricsJSON()
	if err != nil {
		return err
	}
	return writeOutput(path, b)
}

// writeOutput writes b to path atomically, readable by everyone (a report
// for people, not a secret).
func writeOutput(path string, b []byte) error {
	if err := state.WriteFileAtomic(path, b); err != nil {
		return err
	}
	if err := os.Chmod(path, 0o644); err != nil {
		return fmt.Errorf("attain: writing %s: %w", path, err)
	}
	return nil
}

// policyLabel names a policy in tables: "0.95 / 10".
func policyLabel(p state.Policy) string {
	stuck := "off"
	if p.StuckAfter > 0 {
		stuck = strconv.FormatUint(uint64(p.StuckAfter), 10)
	}
	return strconv.FormatFloat(p.Threshold, 'g', -1, 64) + " / " + stuck
}
