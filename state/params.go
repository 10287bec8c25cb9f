package state

import (
	"errors"
	"fmt"
	"math"
	"sort"
	"strings"
)

// ErrStaleParams rejects a parameter set that is not newer than the one in force.
var ErrStaleParams = errors.New("attain: stale parameters")

// ErrInvalidParams is wrapped by every error that rejects a parameter set.
var ErrInvalidParams = errors.New("attain: invalid parameters")

// Params are the five BKT parameters of one skill (Corbett & Anderson, 1995):
// Prior = P(L0), Learn = P(T), Guess = P(G), Slip = P(S), Forget = P(F).
// Forget is 0 in classic BKT.
type Params struct {
	Prior  float64 `json:"prior"`
	Learn  float64 `json:"learn"`
	Guess  float64 `json:"guess"`
	Slip   float64 `json:"slip"`
	Forget float64 `json:"forget"`
}

// ParamError names the skill and field of a rejected parameter.
type ParamError struct {
	Skill  string // "" for the default set
	Field  string
	Value  float64
	Reason string
}

func (e *ParamError) Error() string {
	where := "default"
	if e.Skill != "" {
		where = "skill " + e.Skill
	}
	return fmt.Sprintf("attain: invalid parameters for %s: %s = %v: %s", where, e.Field, e.Value, e.Reason)
}

func (e *ParamError) Unwrap() error { return ErrInvalidParams }

// Validate reports every problem of p at once (joined), each naming skill and
// field. A set is rejected when a value is outside [0,1] or not a number, or
// when guess + slip ≥ 1: then a learner who has mastered the skill is no more
// likely to answer correctly than one who has not (P(correct | mastered) =
// 1−S ≤ G = P(correct | not mastered)), and the two states cannot be told
// apart.
func (p Params) Validate(skill string) error {
	var errs []error
	for _, f := range []struct {
		name string
		v    float64
	}{{"prior", p.Prior}, {"learn", p.Learn}, {"guess", p.Guess}, {"slip", p.Slip}, {"forget", p.Forget}} {
		if math.IsNaN(f.v) || f.v < 0 || f.v > 1 {
			errs = append(errs, &ParamError{Skill: skill, Field: f.name, Value: f.v, Reason: "must be a probability in [0, 1]"})
		}
	}
	if len(errs) == 0 && p.Guess+p.Slip >= 1 {
		errs = append(errs, &ParamError{Skill: skill, Field: "guess+slip", Value: p.Guess + p.Slip,
			Reason: "must be below 1, otherwise a learner who has mastered the skill is no more likely to answer correctly than one who has not"})
	}
	return errors.Join(errs...)
}

// String formats p compactly for logs and reports.
func (p Params) String() string {
	return fmt.Sprintf("prior=%.4f learn=%.4f guess=%.4f slip=%.4f forget=%.4f", p.Prior, p.Learn, p.Guess, p.Slip, p.Forget)
}

// sortedKeys returns the keys of m in order, for deterministic output.
func sortedKeys[V any](m map[string]V) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	return keys
}

// joinErrs formats a joined error as one line per problem.
func joinErrs(err error) string {
	return strings.ReplaceAll(err.Error(), "\n", "; ")
}
