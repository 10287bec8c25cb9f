package state

import (
	"fmt"
	"sync/atomic"
)

// Registry holds the parameter set in force. Readers never block: Current
// is one atomic load, and Swap replaces the whole set at once, so every
// answer is computed under exactly one set.
type Registry struct {
	cur   atomic.Pointer[ParamFile]
	swaps atomic.Int64
}

// NewRegistry returns a registry serving f (NewParamFile() when nil).
func NewRegistry(f *ParamFile) *Registry {
	if f == nil {
		f = NewParamFile()
	}
	r := &Registry{}
	r.cur.Store(f)
	return r
}

// Current returns the set in force. Callers must not modify it.
func (r *Registry) Current() *ParamFile { return r.cur.Load() }

// Swap makes f the set in force if it validates and its version is newer
// than the current one. It never pauses readers.
func (r *Registry) Swap(f *ParamFile) error {
	if err := f.Validate(); err != nil {
		return fmt.Errorf("attain: refusing parameter set %d: %s: %w", f.Version, joinErrs(err), ErrInvalidParams)
	}
	for {
		old := r.cur.Load()
		if f.Version <= old.Version {
			return fmt.Errorf("attain: refusing parameter set %d: not newer than %d in force: %w", f.Version, old.Version, ErrStaleParams)
		}
		if r.cur.CompareAndSwap(old, f) {
			r.swaps.Add(1)
			return nil
		}
	}
}

// Swaps counts the sets swapped in since start.
func (r *Registry) Swaps() int64 { return r.swaps.Load() }
