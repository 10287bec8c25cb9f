package state

import (
	"errors"
	"fmt"
	"slices"

	"github.com/cockroachdb/pebble/v2"
)

// OutboxEntry is one committed output waiting for the broker's
// acknowledgement. Exactly one of Output and DeadLetter is set. Seq
// increases by one per entry in each partition, in commit order, and is
// never reused (the next number is stored with the partition's offset).
type OutboxEntry struct {
	Partition  int32
	Seq        uint64
	Output     *Output
	DeadLetter *DeadLetter
}

// Outbox returns up to max committed entries of partition p with Seq >
// afterSeq (afterSeq = 0: from the start), in order. max ≤ 0 means no limit.
func (s *Store) Outbox(p int32, afterSeq uint64, max int) ([]OutboxEntry, error) {
	if p < 0 {
		return nil, fmt.Errorf("attain: outbox of partition %d: must be 0 or more", p)
	}
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if s.closed {
		return nil, ErrStoreClosed
	}
	if afterSeq == ^uint64(0) {
		return nil, nil
	}
	it, err := s.db.NewIter(&pebble.IterOptions{
		LowerBound: outboxKey(nil, p, afterSeq+1),
		UpperBound: familyEnd(uint32(p), famOutbox),
	})
	if err != nil {
		return nil, fmt.Errorf("attain: reading outbox of partition %d: %w", p, err)
	}
	defer it.Close()
	var out []OutboxEntry
	for ok := it.First(); ok && (max <= 0 || len(out) < max); ok = it.Next() {
		k := it.Key()
		if len(k) != partPrefixLen+8 {
			return nil, fmt.Errorf("attain: reading outbox of partition %d: %w: key %q", p, ErrCorruptStore, k)
		}
		v, err := it.ValueAndErr()
		if err != nil {
			return nil, fmt.Errorf("attain: reading outbox of partition %d: %w", p, err)
		}
		e, err := decodeOutbox(v)
		if err != nil {
			return nil, fmt.Errorf("attain: reading outbox of partition %d, key %q: %w", p, k, err)
		}
		e.Partition = p
		e.Seq = beUint64(k[partPrefixLen:])
		out = append(out, e)
	}
	if err := it.Error(); err != nil {
		return nil, fmt.Errorf("attain: reading outbox of partition %d: %w", p, err)
	}
	return out, nil
}

// DeleteOutbox deletes the entries of partition p with the given sequence
// numbers, once the broker has acknowledged them. Numbers that are not (or
// no longer) in the outbox are ignored, so a repeated delete is harmless.
// The delete is not synced: should a crash lose it, the entries are sent
// again (outputs are at least once, with stable ids).
func (s *Store) DeleteOutbox(p int32, seqs []uint64) error {
	if p < 0 {
		return fmt.Errorf("attain: deleting from the outbox of partition %d: must be 0 or more", p)
	}
	if len(seqs) == 0 {
		return nil
	}
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if s.closed {
		return ErrStoreClosed
	}
	s.outboxMu.Lock()
	defer s.outboxMu.Unlock()
	want := slices.Clone(seqs)
	slices.Sort(want)
	want = slices.Compact(want)
	// One pass of an iterator over the range the numbers span finds the
	// entries that exist (the numbers are usually one consecutive run).
	it, err := s.db.NewIter(&pebble.IterOptions{
		LowerBound: outboxKey(nil, p, want[0]),
		UpperBound: outboxKeyEnd(p, want[len(want)-1]),
	})
	if err != nil {
		return fmt.Errorf("attain: deleting from the outbox of partition %d: %w", p, err)
	}
	b := s.db.NewBatch()
	defer b.Close()
	var n int64
	i := 0
	for ok := it.First(); ok && i < len(want); ok = it.Next() {
		k := it.Key()
		if len(k) != partPrefixLen+8 {
			it.Close()
			return fmt.Errorf("attain: deleting from the outbox of partition %d: %w: key %q", p, ErrCorruptStore, k)
		}
		seq := beUint64(k[partPrefixLen:])
		for i < len(want) && want[i] < seq {
			i++ // not (or no longer) in the outbox
		}
		if i < len(want) && want[i] == seq {
			if err := b.Delete(k, nil); err != nil {
				it.Close()
				return fmt.Errorf("attain: deleting outbox entry %d of partition %d: %w", seq, p, err)
			}
			n++
			i++
		}
	}
	if err := errors.Join(it.Error(), it.Close()); err != nil {
		return fmt.Errorf("attain: deleting from the outbox of partition %d: %w", p, err)
	}
	if n == 0 {
		return nil
	}
	if err := b.Commit(pebble.NoSync); err != nil {
		return fmt.Errorf("attain: deleting %d outbox entries of partition %d: %w", n, p, err)
	}
	s.depth.Add(-n)
	return nil
}

// outboxKeyEnd is the first key after partition p's outbox entry seq.
func outboxKeyEnd(p int32, seq uint64) []byte {
	if seq == ^uint64(0) {
		return familyEnd(uint32(p), famOutbox)
	}
	return outboxKey(nil, p, seq+1)
}

// OutboxDepth is the number of committed, undeleted outbox entries over all
// partitions.
func (s *Store) OutboxDepth() int64 { return s.depth.Load() }

func beUint64(b []byte) uint64 {
	_ = b[7]
	return uint64(b[0])<<56 | uint64(b[1])<<48 | uint64(b[2])<<40 | uint64(b[3])<<32 |
		uint64(b[4])<<24 | uint64(b[5])<<16 | uint64(b[6])<<8 | uint64(b[7])
}
