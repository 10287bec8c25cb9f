package state

import (
	"bytes"
	"errors"
	"fmt"
	"slices"

	"github.com/cockroachdb/pebble/v2"
)

// learnerVal is a learner's committed state in one partition as the cache
// holds it: the applied-id window and every record of the learner, by
// skill. It is complete (a skill it lacks has no record) and, once made,
// never changed: a commit caches a new one.
type learnerVal struct {
	win       window
	skills    []string // sorted
	recs      []recVal // recs[i] is skills[i]'s; every tail capped (len == cap)
	legacyWin bool     // the window came from a schema 1 window key, which still exists
}

// noLearner is the state of a learner the partition has never seen.
var noLearner = &learnerVal{}

func (lv *learnerVal) find(skill string) (int, bool) {
	return slices.BinarySearch(lv.skills, skill)
}

// stagedLearner is a learner's state as it will be committed: the
// committed state it started from and what changed since.
type stagedLearner struct {
	key     string      // the learner's record prefix (P 0x01 learner 0x00): staging and cache key
	base    *learnerVal // the committed state
	win     window      // the window as it will be committed (a copy of base's, then changed)
	recs    []stagedRec // the records changed, in the order first changed
	carrier int         // index in recs of the record that carries the window: the latest answer's
}

// stagedRec is a changed record of a stagedLearner.
type stagedRec struct {
	skill  string
	rv     recVal
	chunks []histChunk // full tails moved out of the value since the last Commit, in order
	isNew  bool
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

// staged returns the index in sl.recs of skill's record, -1 if unchanged.
func (sl *stagedLearner) staged(skill string) int {
	for i := range sl.recs {
		if sl.recs[i].skill == skill {
			return i
		}
	}
	return -1
}

// committed is the learnerVal the cache holds once sl is committed.
func (sl *stagedLearner) committed() *learnerVal {
	base := sl.base
	lv := &learnerVal{
		win:    sl.win.clone(),
		skills: slices.Clone(base.skills),
		recs:   slices.Clone(base.recs),
	}
	for i := range sl.recs {
		sr := &sl.recs[i]
		rv := sr.rv
		rv.tail = rv.tail[:len(rv.tail):len(rv.tail)] // a later push copies
		j, ok := slices.BinarySearch(lv.skills, sr.skill)
		if ok {
			lv.recs[j] = rv
			continue
		}
		lv.skills = slices.Insert(lv.skills, j, sr.skill)
		lv.recs = slices.Insert(lv.recs, j, rv)
	}
	return lv
}

// loadLearner returns the learner whose record prefix is lk: staged
// (staged = true), else a new staging over the cached or stored state.
func (pt *Partition) loadLearner(lk []byte) (sl *stagedLearner, staged bool, err error) {
	if sl := pt.learners[string(lk)]; sl != nil {
		return sl, true, nil
	}
	lv, ok := pt.s.cache.get(pt.p, lk)
	if !ok {
		if lv, err = pt.readLearner(lk); err != nil {
			return nil, false, err
		}
		if len(lv.recs) > 0 {
			pt.s.cache.put(pt.p, string(lk), lv, len(lv.recs))
		}
	}
	if n := len(pt.spare); n > 0 {
		sl, pt.spare = pt.spare[n-1], pt.spare[:n-1]
	} else {
		sl = &stagedLearner{}
	}
	sl.key, sl.base, sl.carrier = string(lk), lv, -1
	sl.win = lv.win.clone()
	return sl, false, nil
}

// recycle keeps sl for a later loadLearner.
func (pt *Partition) recycle(sl *stagedLearner) {
	clear(sl.recs)
	*sl = stagedLearner{recs: sl.recs[:0]}
	pt.spare = append(pt.spare, sl)
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
	var lv *learnerVal
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
		rv.tail = bytes.Clone(rv.tail)[:len(rv.tail):len(rv.tail)] // v is Pebble's, valid until Next
		if lv == nil {
			lv = &learnerVal{}
		}
		lv.skills = append(lv.skills, string(it.Key()[len(lk):]))
		lv.recs = append(lv.recs, rv)
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
			if lv == nil {
				lv = &learnerVal{}
			}
			win, lv.legacyWin = &dw, true
		}
	}
	if lv == nil {
		return noLearner, nil
	}
	if win != nil {
		lv.win = *win
	}
	return lv, nil
}
