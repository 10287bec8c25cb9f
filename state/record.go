package state

import (
	"crypto/sha256"
	"encoding/hex"
	"strconv"
)

// Policy holds the thresholds that turn estimates into events.
type Policy struct {
	// Threshold is the mastery level at or above which a learner counts as
	// having mastered a skill. Default 0.95, the usual mastery-learning
	// threshold (Corbett & Anderson, 1995).
	Threshold float64
	// StuckAfter is the number of opportunities without ever reaching
	// mastery after which one stuck event is raised. Default 10, the
	// wheel-spinning criterion of Beck & Gong (2013).
	StuckAfter uint32
}

// DefaultPolicy returns the default thresholds (sources on Policy's fields).
func DefaultPolicy() Policy { return Policy{Threshold: 0.95, StuckAfter: 10} }

// Record is one learner's state for one skill.
type Record struct {
	// Mastery is P(L) at the learner's next opportunity: the prior before any
	// answer, P(L next) after the latest one.
	Mastery float64
	// NotMastered is 1 − Mastery, carried separately so that an estimate
	// close to 1 keeps its distance to 1 (see Params.StepPair).
	NotMastered   float64
	Opportunities uint32
	Correct       uint32
	// Mastered is Mastery ≥ threshold after the latest answer.
	Mastered bool
	// EverMastered is true once the learner has reached mastery at least once.
	EverMastered bool
	// ParamsVersion is the version of the parameter set Mastery was computed
	// under.
	ParamsVersion int64
	// Updated is the time (`at`, Unix nanoseconds) of the latest answer.
	Updated int64
}

// NewRecord is the state of a learner who has not yet answered.
func NewRecord(p Params, version int64) Record {
	return Record{Mastery: p.Prior, NotMastered: 1 - p.Prior, ParamsVersion: version}
}

// Kind names an output event.
type Kind uint8

const (
	KindReached Kind = 1 // attain.mastery.reached.v1
	KindStuck   Kind = 2 // attain.mastery.stuck.v1
)

// EventType is the CloudEvents type of the kind.
func (k Kind) EventType() string {
	switch k {
	case KindReached:
		return "attain.mastery.reached.v1"
	case KindStuck:
		return "attain.mastery.stuck.v1"
	}
	return "attain.unknown"
}

// Outcome says what one answer did to one record.
type Outcome struct {
	// PCorrect is the prediction made before the answer was seen.
	PCorrect float64
	// Reached is true on an upward crossing of the threshold.
	Reached bool
	// Stuck is true at the StuckAfter-th opportunity without ever having
	// reached mastery.
	Stuck bool
}

// Apply updates r with one answer under p and returns what happened. It is
// the single place where an answer changes a record; the stream processor,
// replay and re-derivation all call it.
func (r *Record) Apply(p Params, correct bool, at int64, pol Policy) Outcome {
	if r.NotMastered == 0 && r.Mastery < 1 {
		r.NotMastered = 1 - r.Mastery // a record made by hand with Mastery only
	}
	out := Outcome{PCorrect: p.PredictPair(r.Mastery, r.NotMastered)}
	r.Mastery, r.NotMastered = p.StepPair(r.Mastery, r.NotMastered, correct)
	r.Opportunities++
	if correct {
		r.Correct++
	}
	was := r.Mastered
	r.Mastered = r.Mastery >= pol.Threshold
	if r.Mastered {
		out.Reached = !was
		r.EverMastered = true
	}
	if pol.StuckAfter > 0 && r.Opportunities == pol.StuckAfter && !r.EverMastered {
		out.Stuck = true
	}
	if at > r.Updated {
		r.Updated = at
	}
	return out
}

// EventID is the deterministic id of an output: the same (learner, skill,
// kind, opportunity) always gives the same id, so consumers can drop
// duplicates. It is the first 16 bytes of SHA-256 over the fields, in hex.
func EventID(learner, skill string, kind Kind, opportunity uint32) string {
	h := sha256.New()
	h.Write([]byte(learner))
	h.Write([]byte{0})
	h.Write([]byte(skill))
	h.Write([]byte{0, byte(kind), 0})
	h.Write(strconv.AppendUint(nil, uint64(opportunity), 10))
	var sum [sha256.Size]byte
	return hex.EncodeToString(h.Sum(sum[:0])[:16])
}
