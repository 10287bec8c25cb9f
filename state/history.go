package state

import (
	"bytes"
	"errors"
	"fmt"
	"strings"

	"github.com/cockroachdb/pebble/v2"
)

// HistoryEntry is one stored answer of a learner-skill.
type HistoryEntry struct {
	At      int64 // unix nanos
	Correct bool
}

// History returns the committed answers of (learner, skill) in applied
// order (nil when there are none). A learner-skill lives in one partition;
// should it appear in several (the topic was repartitioned), the first
// partition that has it answers.
func (s *Store) History(learner, skill string) ([]HistoryEntry, error) {
	if learner == "" || skill == "" || strings.IndexByte(learner, 0) >= 0 || strings.IndexByte(skill, 0) >= 0 {
		return nil, nil
	}
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if s.closed {
		return nil, ErrStoreClosed
	}
	var out []HistoryEntry
	var rk []byte
	parts := s.partList()
	if err := s.settle(parts); err != nil {
		return nil, fmt.Errorf("attain: reading history of learner %q skill %q: %w", learner, skill, err)
	}
	for _, p := range parts {
		rk = recordKey(rk[:0], p, learner, skill)
		err := s.historyOf(s.db, rk, func(h HistoryEntry) { out = append(out, h) })
		if err != nil {
			return nil, fmt.Errorf("attain: reading history of learner %q skill %q: %w", learner, skill, err)
		}
		if out != nil {
			break
		}
	}
	return out, nil
}

// historyOf calls fn for each committed answer of the learner-skill whose
// record key is rk, in order: its history keys, then its record's tail,
// read through one iterator so that both come from the same moment.
func (s *Store) historyOf(r pebble.Reader, rk []byte, fn func(HistoryEntry)) error {
	lo := historyPrefixFromRecordKey(rk)
	it, err := r.NewIter(&pebble.IterOptions{LowerBound: rk, UpperBound: prefixEnd(lo)})
	if err != nil {
		return err
	}
	err = forHistoryKeys(it, lo, fn)
	if err == nil && it.SeekGE(rk) && bytes.Equal(it.Key(), rk) {
		err = forRecordTail(it, fn)
	}
	return errors.Join(err, it.Error(), it.Close())
}

// historyKeys calls fn for each answer in the committed history keys of
// the learner-skill whose record key is rk (not its record's tail).
func (s *Store) historyKeys(r pebble.Reader, rk []byte, fn func(HistoryEntry)) error {
	lo := historyPrefixFromRecordKey(rk)
	it, err := r.NewIter(&pebble.IterOptions{LowerBound: lo, UpperBound: prefixEnd(lo)})
	if err != nil {
		return err
	}
	err = forHistoryKeys(it, lo, fn)
	return errors.Join(err, it.Error(), it.Close())
}

// forHistoryKeys calls fn for the answers of every key with prefix (a
// learner-skill's history prefix), in key order.
func forHistoryKeys(it *pebble.Iterator, prefix []byte, fn func(HistoryEntry)) error {
	for ok := it.SeekGE(prefix); ok && bytes.HasPrefix(it.Key(), prefix); ok = it.Next() {
		v, err := it.ValueAndErr()
		if err != nil {
			return err
		}
		if _, err := forHistoryValue(v, fn); err != nil {
			return fmt.Errorf("key %q: %w", it.Key(), err)
		}
	}
	return nil
}

// forRecordTail calls fn for the answers in the tail of the record value
// under the iterator.
func forRecordTail(it *pebble.Iterator, fn func(HistoryEntry)) error {
	v, err := it.ValueAndErr()
	if err != nil {
		return err
	}
	rv, _, err := decodeRecordVal(v)
	if err != nil {
		return fmt.Errorf("key %q: %w", it.Key(), err)
	}
	_, err = forHistEntries(rv.tail, uint64(rv.tailN), fn)
	return err
}

// ScanHistory calls fn once per learner-skill with its answers in applied
// order, over every partition, from one consistent point-in-time view of
// committed state. It streams: only one learner-skill's history is in
// memory at a time, so it works for histories larger than RAM. h is fresh
// for each call and the callee may keep it. An error from fn stops the scan
// and is returned as is.
//
// Order: by partition, then by learner, then by skill (byte order).
func (s *Store) ScanHistory(fn func(learner, skill string, h []HistoryEntry) error) error {
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if s.closed {
		return ErrStoreClosed
	}
	// The logs are materialized first (the scan reads keys only). One
	// snapshot is then one consistent view of the whole database: every
	// partition is read as of the same moment, its keys holding every
	// commit up to its last checkpoint (commits after the settle stay in
	// logs the snapshot does not read). Partitions are listed after it is
	// taken: a partition is listed before its first commit.
	if err := s.settle(s.partList()); err != nil {
		return fmt.Errorf("attain: scanning history: %w", err)
	}
	snap := s.db.NewSnapshot()
	defer snap.Close()
	for _, p := range s.partList() {
		if err := scanPartitionHistory(snap, uint32(p), fn); err != nil {
			return err
		}
	}
	return nil
}

// scanPartitionHistory is ScanHistory over partition p: it walks p's
// records and history keys side by side (both are ordered by
// learner\x00skill, and every learner-skill with answers has a record).
func scanPartitionHistory(snap *pebble.Snapshot, p uint32, fn func(learner, skill string, h []HistoryEntry) error) (err error) {
	recs, err := snap.NewIter(&pebble.IterOptions{LowerBound: familyPrefix(p, famRecord), UpperBound: familyEnd(p, famRecord)})
	if err != nil {
		return fmt.Errorf("attain: scanning history: %w", err)
	}
	defer func() { err = errors.Join(err, recs.Close()) }()
	hist, err := snap.NewIter(&pebble.IterOptions{LowerBound: familyPrefix(p, famHistory), UpperBound: familyEnd(p, famHistory)})
	if err != nil {
		return fmt.Errorf("attain: scanning history: %w", err)
	}
	defer func() { err = errors.Join(err, hist.Close()) }()

	var h []HistoryEntry
	add := func(e HistoryEntry) { h = append(h, e) }
	var group []byte // learner\x00skill of the history key under hist
	hOK, rOK := hist.First(), recs.First()
	nextGroup := func() error {
		if !hOK {
			return nil
		}
		g, _, err := splitHistoryKey(hist.Key())
		if err != nil {
			return err
		}
		group = append(group[:0], g[:len(g)-1]...)
		return nil
	}
	if err := nextGroup(); err != nil {
		return fmt.Errorf("attain: scanning history: %w", err)
	}
	for hOK || rOK {
		// The next learner-skill: the smaller of the two iterators' groups.
		var cur []byte
		switch {
		case !rOK:
			cur = group
		case !hOK:
			cur = recs.Key()[partPrefixLen:]
		default:
			cur = recs.Key()[partPrefixLen:]
			if bytes.Compare(group, cur) < 0 {
				cur = group // history without a record: reported all the same
			}
		}
		cur = append([]byte(nil), cur...)
		h = nil
		for hOK && bytes.Equal(group, cur) {
			v, err := hist.ValueAndErr()
			if err != nil {
				return fmt.Errorf("attain: scanning history: %w", err)
			}
			if _, err := forHistoryValue(v, add); err != nil {
				return fmt.Errorf("attain: scanning history, key %q: %w", hist.Key(), err)
			}
			hOK = hist.Next()
			if err := nextGroup(); err != nil {
				return fmt.Errorf("attain: scanning history: %w", err)
			}
		}
		if rOK && bytes.Equal(recs.Key()[partPrefixLen:], cur) {
			if err := forRecordTail(recs, add); err != nil {
				return fmt.Errorf("attain: scanning history: %w", err)
			}
			rOK = recs.Next()
		}
		if len(h) == 0 {
			continue
		}
		i := bytes.IndexByte(cur, 0)
		if i < 0 {
			return fmt.Errorf("attain: scanning history: %w: learner-skill %q has no separator", ErrCorruptStore, cur)
		}
		if err := fn(string(cur[:i]), string(cur[i+1:]), h); err != nil {
			return err
		}
	}
	if err := errors.Join(recs.Error(), hist.Error()); err != nil {
		return fmt.Errorf("attain: scanning history: %w", err)
	}
	return nil
}
