package state

import (
	"bytes"
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
	for _, p := range s.partList() {
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

// historyOf calls fn for each committed history entry of the learner-skill
// whose record key is rk, in order.
func (s *Store) historyOf(r pebble.Reader, rk []byte, fn func(HistoryEntry)) error {
	lo := append(make([]byte, 0, len(rk)+1), rk...)
	lo[4] = famHistory
	lo = append(lo, 0)
	it, err := r.NewIter(&pebble.IterOptions{LowerBound: lo, UpperBound: prefixEnd(lo)})
	if err != nil {
		return err
	}
	for ok := it.First(); ok; ok = it.Next() {
		v, err := it.ValueAndErr()
		if err != nil {
			it.Close()
			return err
		}
		h, err := decodeHistory(v)
		if err != nil {
			it.Close()
			return fmt.Errorf("key %q: %w", it.Key(), err)
		}
		fn(h)
	}
	if err := it.Error(); err != nil {
		it.Close()
		return err
	}
	return it.Close()
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
	// One iterator is one consistent view of the whole database, so every
	// partition is read as of the same moment.
	it, err := s.db.NewIter(&pebble.IterOptions{UpperBound: familyPrefix(metaPartition, 0)})
	if err != nil {
		return fmt.Errorf("attain: scanning history: %w", err)
	}
	defer it.Close()

	var (
		group   []byte
		gPart   uint32
		learner string
		skill   string
		h       []HistoryEntry
	)
	flush := func() error {
		if len(h) == 0 {
			return nil
		}
		out := h
		h = nil
		return fn(learner, skill, out)
	}
	valid := it.SeekGE(familyPrefix(0, famHistory))
	for valid {
		k := it.Key()
		kp, fam, ok := keyPartition(k)
		if !ok {
			return fmt.Errorf("attain: scanning history: %w: key %q is too short", ErrCorruptStore, k)
		}
		if fam != famHistory {
			if err := flush(); err != nil {
				return err
			}
			switch {
			case fam < famHistory:
				valid = it.SeekGE(familyPrefix(kp, famHistory))
			case kp+1 == metaPartition:
				valid = false
			default:
				valid = it.SeekGE(familyPrefix(kp+1, famHistory))
			}
			continue
		}
		g, _, err := splitHistoryKey(k)
		if err != nil {
			return fmt.Errorf("attain: scanning history: %w", err)
		}
		if kp != gPart || !bytes.Equal(g, group) {
			if err := flush(); err != nil {
				return err
			}
			group, gPart = append(group[:0], g...), kp
			if learner, skill, err = splitGroup(g); err != nil {
				return fmt.Errorf("attain: scanning history: %w", err)
			}
		}
		v, err := it.ValueAndErr()
		if err != nil {
			return fmt.Errorf("attain: scanning history: %w", err)
		}
		e, err := decodeHistory(v)
		if err != nil {
			return fmt.Errorf("attain: scanning history, key %q: %w", k, err)
		}
		h = append(h, e)
		valid = it.Next()
	}
	if err := it.Error(); err != nil {
		return fmt.Errorf("attain: scanning history: %w", err)
	}
	return flush()
}
