package state

import (
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

func TestParamFileRoundTrip(t *testing.T) {
	f := NewParamFile()
	f.Version = 3
	f.Skills["trial-balance"] = SkillParams{Params: Params{Prior: 0.2, Learn: 0.15, Guess: 0.25, Slip: 0.08},
		Fit: &FitInfo{Learners: 120, Answers: 2400, LogLik: -1234.5, Iterations: 17, Converged: true, Heldout: &Metrics{AUC: 0.71, RMSE: 0.41, LogLoss: 0.52}}}
	path := filepath.Join(t.TempDir(), "params.json")
	if err := f.WriteFile(path); err != nil {
		t.Fatal(err)
	}
	g, err := LoadParamFile(path)
	if err != nil {
		t.Fatal(err)
	}
	p, v := g.For("trial-balance")
	if v != 3 || p.Learn != 0.15 || g.Skills["trial-balance"].Fit.Heldout.AUC != 0.71 {
		t.Fatalf("round trip lost data: %+v", g)
	}
	if p, v := g.For("payroll-deductions"); v != 3 || p != DefaultParams() {
		t.Fatalf("unfitted skill served %v v%d, want the default", p, v)
	}
	// The file has exactly the documented top-level shape.
	b, _ := os.ReadFile(path)
	for _, key := range []string{`"version": 3`, `"created"`, `"default"`, `"skills"`, `"prior"`, `"fit"`, `"heldout"`, `"loglik"`, `"converged": true`} {
		if !strings.Contains(string(b), key) {
			t.Errorf("parameter file lacks %s:\n%s", key, b)
		}
	}
	// No temporary file is left beside it.
	entries, _ := os.ReadDir(filepath.Dir(path))
	if len(entries) != 1 {
		t.Errorf("folder holds %d entries, want only the parameter file", len(entries))
	}
}

func TestParamFileRejectsEveryProblem(t *testing.T) {
	in := `{"version": 0, "default": {"prior": 0.3, "learn": 0.1, "guess": 0.2, "slip": 0.1},
	 "skills": {"a": {"prior": 1.3, "learn": 0.1, "guess": 0.2, "slip": 0.1}, "b": {"prior": 0.3, "learn": 0.1, "guess": 0.7, "slip": 0.4}}}`
	_, err := DecodeParamFile(strings.NewReader(in))
	if !errors.Is(err, ErrInvalidParams) {
		t.Fatalf("got %v, want ErrInvalidParams", err)
	}
	for _, want := range []string{"version = 0", "skill a: prior", "skill b: guess+slip"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("error %q does not mention %q", err, want)
		}
	}
}

func TestRegistrySwap(t *testing.T) {
	r := NewRegistry(nil)
	if r.Current().Version != 1 {
		t.Fatalf("initial version %d", r.Current().Version)
	}
	next := NewParamFile()
	next.Version = 2
	if err := r.Swap(next); err != nil || r.Current() != next || r.Swaps() != 1 {
		t.Fatalf("swap: %v", err)
	}
	if err := r.Swap(NewParamFile()); !errors.Is(err, ErrStaleParams) {
		t.Fatalf("older set accepted: %v", err)
	}
	bad := NewParamFile()
	bad.Version = 3
	bad.Default.Slip = 0.95
	if err := r.Swap(bad); !errors.Is(err, ErrInvalidParams) || r.Current() != next {
		t.Fatalf("invalid set accepted: %v", err)
	}
}
