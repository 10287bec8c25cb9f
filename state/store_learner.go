package state

import (
	"bytes"
	"errors"
	"fmt"
	"slices"

	"github.com/cockroachdb/pebble/v2"
)

// learnerVal is a learner's state in one partition: the applied-id window
// and every record of the learner, by skill. It is complete (a skill it
// lacks has no record). The cache holds it, and Apply changes it in place:
// a partition's entries are used by that partition's one live handle only
// (a new handle drops them), and every way staged changes are abandoned —
// Release, a failed Commit — drops the partition's entries too, so what the
// cache serves is committed state or the live handle's own staging.
type learnerVal struct {
	key       string      // the learner's record prefix (P 0x01 learner 0x00): staging and cache key
	win       window      // the applied-id window
	skills    []string    // sorted
	recs      []*recState // recs[i] is skills[i]'s
	legacyWin bool        // the window came from a schema 1 window key, which still exists

	// Staging, emptied by Commit.
	dirty   []*recState // records changed since the last commit, in the order first changed
	carrier *recState   // the record that carries the window in the next commit: the latest answer's
}

// recState is one learner-skill record with the history chunks staged for
// it since the last commit.
type recState struct {
	skill  string
	rv     recVal
	chunks []histChunk // full tails moved out of the value since the last Commit, in order
	dirty  bool
}

func (lv *learnerVal) find(skill string) (*recState, bool) {
	i, ok := slices.BinarySearch(lv.skills, skill)
	if !ok {
		return nil, false
	}
	return lv.recs[i], true
}

func (lv *learnerVal) insert(rs *recState) {
	i, _ := slices.BinarySearch(lv.skills, rs.skill)
	lv.skills = slices.Insert(lv.skills, i, rs.skill)
	lv.recs = slices.Insert(lv.recs, i, rs)
}

// stage marks rs as changed; the latest answer's first skill carries the
// window.
func (lv *learnerVal) stage(rs *recState, carrier bool) {
	if !rs.dirty {
		rs.dirty = true
		lv.dirty = append(lv.dirty, rs)
	}
	if carrier {
		lv.carrier = rs
	}
}

// histChunk is a history chunk staged for its key: n answers from
// opportunity first on, in the compact encoding.
type histChunk struct {
	first, n uint32
	entries  []byte
}

// Tails are moved to a history chunk key once they hold tailMaxAnswers
// answers or tailMaxBytes bytes (our choice: small enough that the value
// every answer rewrites, and the cache entry, stay small; large enough that
// a chunk key is written for one answer in 16 or fewer).
const (
	tailMaxAnswers = 16
	tailMaxBytes   = 96
)

// loadLearner returns the learner whose record prefix is lk: staged
// (staged = true), cached, read from Pebble (and cached), or new.
func (pt *Partition) loadLearner(lk []byte) (lv *learnerVal, staged bool, err error) {
	if lv := pt.learners[string(lk)]; lv != nil {
		return lv, true, nil
	}
	if lv, ok := pt.s.cache.get(pt.p, lk); ok {
		return lv, false, nil
	}
	if lv, err = pt.readLearner(lk); err != nil {
		return nil, false, err
	}
	if len(lv.recs) > 0 {
		pt.s.cache.put(pt.p, lv.key, lv, len(lv.recs))
	}
	return lv, false, nil
}

// readLearner reads the committed state of the learner whose record prefix
// is lk from Pebble: its records, and the window carried by the one with
// the highest window sequence (or, for a learner last written by schema 1,
// its window key).
func (pt *Partition) readLearner(lk []byte) (*learnerVal, error) {
	it, err := pt.s.db.NewIter(&pebble.IterOptions{LowerBound: lk, UpperBound: prefixEnd(lk)})
	if err != nil {
		return nil, fmt.Errorf("attain: partition %d: reading learner %q: %w", pt.p, lk, err)
	}
	lv := &learnerVal{key: string(lk)}
	var win *window
	for ok := it.First(); ok; ok = it.Next() {
		v, err := it.ValueAndErr()
		if err != nil {
			it.Close()
			return nil, fmt.Errorf("attain: partition %d: reading learner %q: %w", pt.p, lk, err)
		}
		rv, w, err := decodeRecordVal(v)
		if err != nil {
			it.Close()
			return nil, fmt.Errorf("attain: partition %d: record %q: %w", pt.p, it.Key(), err)
		}
		rv.tail = bytes.Clone(rv.tail) // v is Pebble's, valid until Next
		skill := pt.intern(it.Key()[len(lk):])
		lv.skills = append(lv.skills, skill)
		lv.recs = append(lv.recs, &recState{skill: skill, rv: rv})
		if w != nil && (win == nil || w.seq >= win.seq) {
			win = w
		}
	}
	if err := errors.Join(it.Error(), it.Close()); err != nil {
		return nil, fmt.Errorf("attain: partition %d: reading learner %q: %w", pt.p, lk, err)
	}
	if win == nil {
		// No record carries a window: a new learner, or one last written
		// by schema 1, whose window has a key of its own.
		wk := appendPartFamily(pt.kbuf[:0], uint32(pt.p), famWindow)
		wk = append(wk, lk[partPrefixLen:len(lk)-1]...)
		pt.kbuf = wk
		v, closer, err := pt.s.db.Get(wk)
		switch {
		case errors.Is(err, pebble.ErrNotFound):
		case err != nil:
			return nil, fmt.Errorf("attain: partition %d: reading id window %q: %w", pt.p, wk, err)
		default:
			dw, err := decodeWindow(v)
			closer.Close()
			if err != nil {
				return nil, fmt.Errorf("attain: partition %d: id window %q: %w", pt.p, wk, err)
			}
			win, lv.legacyWin = &dw, true
		}
	}
	if win != nil {
		lv.win = *win
	}
	return lv, nil
}

// maxInterned bounds a partition handle's table of skill names (our choice:
// far more skills than any item bank tags, small next to the cache).
const maxInterned = 10_000

// intern returns the partition's one copy of skill name b, so that the
// learners in the cache share their skill names (fewer allocations, and
// names that are compared often stay in the processor's caches).
func (pt *Partition) intern(b []byte) string {
	if s, ok := pt.skillNames[string(b)]; ok {
		return s
	}
	s := string(b)
	if len(pt.skillNames) < maxInterned {
		pt.skillNames[s] = s
	}
	return s
}

// internString is intern for a string.
func (pt *Partition) internString(skill string) string {
	if s, ok := pt.skillNames[skill]; ok {
		return s
	}
	if len(pt.skillNames) < maxInterned {
		pt.skillNames[skill] = skill
	}
	return skill
}
