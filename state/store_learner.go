package state

import (
	"bytes"
	"errors"
	"fmt"
	"slices"
	"strings"

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
	// baseRec carries the last whole window written, of sequence baseSeq
	// (nil when none is stored); later windows are written as deltas from
	// it (see appendRecordVal).
	baseRec *recState
	baseSeq uint64
	newBase bool // the commit being written writes a whole window

	lastLog uint64 // the handle's log that last wrote the learner (store_log.go)

	// Staging, emptied by Commit.
	dirty   []*recState // records changed since the last commit, in the order first changed
	carrier *recState   // the record that carries the window in the next commit: the latest answer's
}

// recState is one learner-skill record with the history chunks staged for
// it since the last commit.
type recState struct {
	skill  string
	rv     recVal
	chunks []histChunk   // full tails moved out of the value since the last Commit, in order
	logged []loggedChunk // chunks committed in logs not known to be checkpointed, in order
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

// maxWindowDelta is the most ids a delta window holds; past it the whole
// window is written again (our choice: a delta of 8 ids is a quarter of
// the default window, and most learners answer less often than that
// between two answers on the skill that carries their whole window).
const maxWindowDelta = 8

// windowToWrite returns the window the carrier writes in the next commit:
// a delta from the stored whole window (in buf) when there is one, it is
// not rewritten in this commit, and few ids were added since; else the
// whole window (whole = true).
func (lv *learnerVal) windowToWrite(buf *window) (w *window, whole bool) {
	d := lv.win.seq - lv.baseSeq
	if lv.baseRec == nil || lv.baseRec.dirty || d > maxWindowDelta || d >= uint64(len(lv.win.ids)) {
		return &lv.win, true
	}
	*buf = window{seq: lv.win.seq, base: lv.baseSeq, hasAt: lv.win.hasAt, lastAt: lv.win.lastAt, ids: lv.win.ids[len(lv.win.ids)-int(d):]}
	return buf, false
}

// loggedChunk is a history chunk committed in the handle's log seq.
type loggedChunk struct {
	seq uint64
	histChunk
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
	if lv := pt.unckpt[string(lk)]; lv != nil {
		pt.cnt.pinned++ // counted as a cache hit
		return lv, false, nil
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
	type carried struct {
		w  *window
		rs *recState
	}
	var latest carried   // the window of the highest sequence
	var wholes []carried // whole windows
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
		rs := &recState{skill: skill, rv: rv}
		lv.skills = append(lv.skills, skill)
		lv.recs = append(lv.recs, rs)
		if w == nil {
			continue
		}
		if w.base == 0 {
			wholes = append(wholes, carried{w, rs})
		}
		if latest.w == nil || w.seq > latest.w.seq || (w.seq == latest.w.seq && w.base == 0) {
			latest = carried{w, rs}
		}
	}
	if err := errors.Join(it.Error(), it.Close()); err != nil {
		return nil, fmt.Errorf("attain: partition %d: reading learner %q: %w", pt.p, lk, err)
	}
	var win *window
	switch {
	case latest.w == nil:
	case latest.w.base == 0:
		win, lv.baseRec, lv.baseSeq = latest.w, latest.rs, latest.w.seq
	default:
		// A delta: the whole window it adds to, then its ids, the last
		// DedupeWindow of them.
		var base *carried
		for i := range wholes {
			if wholes[i].w.seq == latest.w.base {
				base = &wholes[i]
			}
		}
		if base == nil {
			return nil, fmt.Errorf("attain: partition %d: learner %q: %w: its id window is a delta from window %d, which no record holds",
				pt.p, lk[partPrefixLen:len(lk)-1], ErrCorruptStore, latest.w.base)
		}
		ids := append(append(make([]uint64, 0, len(base.w.ids)+len(latest.w.ids)+1), base.w.ids...), latest.w.ids...)
		if n := pt.s.opt.DedupeWindow; len(ids) > n {
			ids = append(ids[:0], ids[len(ids)-n:]...)
		}
		win = &window{seq: latest.w.seq, hasAt: latest.w.hasAt, lastAt: latest.w.lastAt, ids: ids}
		lv.baseRec, lv.baseSeq = base.rs, base.w.seq
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
	// A copy: the answer's strings may share the memory of the whole
	// message (DecodeShared), which a record must not keep alive.
	skill = strings.Clone(skill)
	if len(pt.skillNames) < maxInterned {
		pt.skillNames[skill] = skill
	}
	return skill
}
