package state

import (
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"time"
)

// ParamFile is the parameter file of ARCHITECTURE.md: a versioned set of
// per-skill parameters with a default for skills that have no entry.
type ParamFile struct {
	Version int64                  `json:"version"`
	Created time.Time              `json:"created"`
	Default Params                 `json:"default"`
	Skills  map[string]SkillParams `json:"skills"`
}

// SkillParams are one skill's parameters with the fit that produced them.
type SkillParams struct {
	Params
	// Version is the version of the set in which these parameters were last
	// changed; 0 means the file's version. It rides on the params topic.
	Version int64    `json:"version,omitempty"`
	Fit     *FitInfo `json:"fit,omitempty"`
}

// FitInfo describes how a skill's parameters were estimated.
type FitInfo struct {
	Learners   int      `json:"learners"`
	Answers    int      `json:"answers"`
	LogLik     float64  `json:"loglik"`
	Iterations int      `json:"iterations"`
	Converged  bool     `json:"converged"`
	Heldout    *Metrics `json:"heldout,omitempty"`
	Warnings   []string `json:"warnings,omitempty"`

	// Provenance, written by gated refits (zero when unknown).
	Fitted          time.Time `json:"fitted,omitzero"`            // when the fit ran
	From            time.Time `json:"from,omitzero"`              // earliest answer fitted
	To              time.Time `json:"to,omitzero"`                // latest answer fitted
	Folds           int       `json:"folds,omitempty"`            // cross-validation folds behind Heldout
	PreviousVersion int64     `json:"previous_version,omitempty"` // the version this one replaced
	PreviousHeldout *Metrics  `json:"previous_heldout,omitempty"` // the replaced set on the same held-out learners
}

// Metrics are next-answer prediction scores.
type Metrics struct {
	AUC     float64 `json:"auc"`
	RMSE    float64 `json:"rmse"`
	LogLoss float64 `json:"logloss"`
}

// DefaultParams is the default set used when no parameter file is given:
// the example values of ARCHITECTURE.md's parameter file (common practice,
// no published source).
func DefaultParams() Params {
	return Params{Prior: 0.3, Learn: 0.1, Guess: 0.2, Slip: 0.1, Forget: 0}
}

// NewParamFile returns version 1 with only the default set.
func NewParamFile() *ParamFile {
	return &ParamFile{Version: 1, Default: DefaultParams(), Skills: map[string]SkillParams{}}
}

// For returns the parameters serving skill and the version they belong to.
func (f *ParamFile) For(skill string) (Params, int64) {
	if sp, ok := f.Skills[skill]; ok {
		v := sp.Version
		if v == 0 {
			v = f.Version
		}
		return sp.Params, v
	}
	return f.Default, f.Version
}

// Validate reports every problem in the file at once.
func (f *ParamFile) Validate() error {
	var errs []error
	if f.Version < 1 {
		errs = append(errs, fmt.Errorf("%w: version = %d: must be 1 or more", ErrInvalidParams, f.Version))
	}
	if err := f.Default.Validate(""); err != nil {
		errs = append(errs, err)
	}
	for _, skill := range sortedKeys(f.Skills) {
		if err := f.Skills[skill].Validate(skill); err != nil {
			errs = append(errs, err)
		}
	}
	return errors.Join(errs...)
}

// DecodeParamFile reads and validates a parameter file. Unknown fields are
// ignored so that newer files stay readable.
func DecodeParamFile(r io.Reader) (*ParamFile, error) {
	var f ParamFile
	if err := json.NewDecoder(r).Decode(&f); err != nil {
		return nil, fmt.Errorf("attain: reading parameter file: %w", err)
	}
	if f.Skills == nil {
		f.Skills = map[string]SkillParams{}
	}
	if err := f.Validate(); err != nil {
		return nil, fmt.Errorf("attain: parameter file: %s: %w", joinErrs(err), ErrInvalidParams)
	}
	return &f, nil
}

// LoadParamFile reads and validates the parameter file at path.
func LoadParamFile(path string) (*ParamFile, error) {
	fh, err := os.Open(path)
	if err != nil {
		return nil, fmt.Errorf("attain: opening parameter file: %w", err)
	}
	defer fh.Close()
	f, err := DecodeParamFile(fh)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return f, nil
}

// WriteFile writes f to path atomically (a temporary file in the same
// folder, synced, then renamed), so that a reader never sees half a file and
// a failed write leaves nothing behind.
func (f *ParamFile) WriteFile(path string) error {
	b, err := json.MarshalIndent(f, "", "  ")
	if err != nil {
		return fmt.Errorf("attain: encoding parameter file: %w", err)
	}
	return WriteFileAtomic(path, append(b, '\n'))
}

// WriteFileAtomic writes b to path by way of a synced temporary file and a
// rename.
func WriteFileAtomic(path string, b []byte) error {
	tmp, err := os.CreateTemp(filepath.Dir(path), "."+filepath.Base(path)+".tmp*")
	if err != nil {
		return fmt.Errorf("attain: writing %s: %w", path, err)
	}
	name := tmp.Name()
	_, err = tmp.Write(b)
	if err == nil {
		err = tmp.Sync()
	}
	if cerr := tmp.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Rename(name, path)
	}
	if err != nil {
		os.Remove(name)
		return fmt.Errorf("attain: writing %s: %w", path, err)
	}
	return nil
}
