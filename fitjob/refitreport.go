package fitjob

import (
	"encoding/json"
	"fmt"
	"time"

	"github.com/attain-dev/attain/state"
)

// GateReport is the refit report: what a gated refit read, what it decided
// for every skill and why, and the new parameter set. Its JSON form (field
// names below) is written by `attain refit --report FILE`; extend it, do not
// rename.
type GateReport struct {
	Created time.Time `json:"created"`
	// Source names where the history came from (a file, topic:NAME,
	// store:DIR).
	Source string `json:"source"`
	// CurrentVersion is the version of the set in force the candidates were
	// judged against; Version that of the new set (0: no skill accepted, no
	// new set).
	CurrentVersion int64         `json:"current_version"`
	Version        int64         `json:"version"`
	Options        ReportOptions `json:"options"`
	Data           ReportData    `json:"data"`
	// Skills lists every skill of the history, in byte order of the names,
	// each with its verdict.
	Skills   []SkillVerdict `json:"skills"`
	Accepted int            `json:"accepted"`
	Rejected int            `json:"rejected"`
	// Published says whether the accepted sets were sent to the params
	// topic (set by the caller that publishes), ParamFile where the new set
	// was written ("" when not written), DryRun whether nothing was
	// written on purpose.
	Published bool   `json:"published"`
	Topic     string `json:"topic,omitempty"`
	ParamFile string `json:"param_file,omitempty"`
	DryRun    bool   `json:"dry_run,omitempty"`
	// ReadSeconds is the time spent reading the source into the on-disk
	// grouping; ElapsedSeconds the whole refit.
	ReadSeconds    float64 `json:"read_seconds"`
	ElapsedSeconds float64 `json:"elapsed_seconds"`

	// File is the new parameter set: the set in force with every accepted
	// skill replaced (version Version); nil when no skill was accepted.
	File *state.ParamFile `json:"-"`
	// Publish holds the accepted skills' entries, as they go on the params
	// topic (each with "version" = Version).
	Publish map[string]state.SkillParams `json:"-"`
}

// ReportOptions are the options a refit ran with.
type ReportOptions struct {
	Folds         int     `json:"folds"`
	Seed          int64   `json:"seed"`
	MinLearners   int     `json:"min_learners"`
	MinAnswers    int     `json:"min_answers"`
	Margin        float64 `json:"margin"`
	FitForget     bool    `json:"fit_forget"`
	Starts        int     `json:"starts"`
	ScreenAnswers int     `json:"screen_answers"`
}

// ReportData describes the history read.
type ReportData struct {
	Answers    int64 `json:"answers"`
	Learners   int64 `json:"learners"`
	Duplicates int64 `json:"duplicates"`
	// Rejected counts input records that did not decode (set by the
	// caller, which reads the source).
	Rejected int64 `json:"rejected"`
	// MultiSkill counts answers tagged with more than one skill; each of
	// their skills is fitted and scored on its own.
	MultiSkill int64     `json:"multi_skill_answers"`
	First      time.Time `json:"first"`
	Last       time.Time `json:"last"`
	// ScratchBytes is the size of the on-disk grouping (deleted when the
	// refit ends): what the scratch folder must hold.
	ScratchBytes uint64 `json:"scratch_bytes"`
}

// SkillVerdict is what the gate decided for one skill.
type SkillVerdict struct {
	Skill   string  `json:"skill"`
	Verdict Verdict `json:"verdict"`
	// Reason gives the figures behind the verdict.
	Reason   string `json:"reason"`
	Learners int    `json:"learners"`
	Answers  int    `json:"answers"`
	Correct  int    `json:"correct"`
	// First and Last are the earliest and latest `at` of the skill's
	// answers: the data range of the fit.
	First time.Time `json:"first"`
	Last  time.Time `json:"last"`
	// Current is the set in force for the skill and its held-out scores.
	Current ParamsEval `json:"current"`
	// Candidate is the refitted set (nil when the skill was not fitted).
	Candidate *CandidateEval `json:"candidate,omitempty"`
	// LogLossGain is the current held-out log-loss minus the candidate's
	// (positive: the candidate predicts better).
	LogLossGain *float64 `json:"logloss_gain,omitempty"`
}

// ParamsEval is the set in force for one skill.
type ParamsEval struct {
	Params state.Params `json:"params"`
	// Version is the version the parameters belong to; Fitted is false
	// when they are the set's default.
	Version int64           `json:"version"`
	Fitted  bool            `json:"fitted"`
	Heldout *HeldoutMetrics `json:"heldout,omitempty"`
}

// CandidateEval is a skill's refitted set.
type CandidateEval struct {
	Params     state.Params `json:"params"`
	LogLik     float64      `json:"loglik"`
	Iterations int          `json:"iterations"`
	Converged  bool         `json:"converged"`
	// Screened is true when the random starts ran on a subsample of the
	// skill's learners (GatedRefitOptions.ScreenAnswers).
	Screened bool            `json:"screened"`
	Heldout  *HeldoutMetrics `json:"heldout,omitempty"`
	Warnings []string        `json:"warnings,omitempty"`
}

// HeldoutMetrics are next-answer scores on held-out learners. AUC is nil
// when the held-out answers are all of one outcome (JSON has no NaN).
type HeldoutMetrics struct {
	Answers int      `json:"answers"`
	AUC     *float64 `json:"auc"`
	RMSE    float64  `json:"rmse"`
	LogLoss float64  `json:"logloss"`
}

// Skill returns the verdict of the named skill.
func (r *GateReport) Skill(name string) (SkillVerdict, bool) {
	for _, s := range r.Skills {
		if s.Skill == name {
			return s, true
		}
	}
	return SkillVerdict{}, false
}

// MarshalIndent is the report's JSON form, indented, with a final newline.
func (r *GateReport) MarshalIndent() ([]byte, error) {
	b, err := json.MarshalIndent(r, "", "  ")
	if err != nil {
		return nil, fmt.Errorf("attain: encoding the refit report: %w", err)
	}
	return append(b, '\n'), nil
}

// WriteFile writes the report to path atomically (state.WriteFileAtomic):
// a reader never sees half a report.
func (r *GateReport) WriteFile(path string) error {
	b, err := r.MarshalIndent()
	if err != nil {
		return err
	}
	return state.WriteFileAtomic(path, b)
}
