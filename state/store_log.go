package state

import (
	"encoding/binary"
	"errors"
	"fmt"
	"time"

	"github.com/cockroachdb/pebble/v2"
)

// The record log (schema 3).
//
// A commit writes the records, history chunks and window deletions of its
// batch as one value, under a log key of its partition, instead of as one
// key each: Pebble's cost per commit is then one key (plus the partition
// state and the outbox entries) however many learner-skills the batch
// touched. Every few commits the partition's logs are checkpointed
// ("materialized"): each key they hold is written once, with its latest
// logged value, and the logs are deleted, in one atomic batch. A record
// rewritten by ten commits in a row is thus written to the memtable,
// flushed and compacted once instead of ten times.
//
// Committed state is the materialized keys with the logs applied over
// them in order. Materializing is therefore invisible: it turns one form
// of the same state into the other, and it is idempotent, so a crash
// before, during or after it leaves the same committed state. A log is in
// the same Pebble batch as the consumed offset it brings the partition to,
// so the offset and the state it stands for are committed together, as
// before.
//
// Who materializes: a background checkpoint the partition's handle starts
// every checkpointCommits commits (at most once per
// checkpointMinInterval) or checkpointBytes of logs (one at a time); the handle itself on a synced commit, or when the logs reach
// 4 × checkpointBytes while a background one is still running; Store.Partition
// before the handle reads anything (what a crashed or released handle
// left); the readers of committed state (Learner, History, ScanHistory) for
// the partitions they read, under the partition's commit lock, so that
// they read keys only. The write path reads keys only too: a learner
// changed since the handle's last checkpoint is pinned in memory (see
// Partition.unckpt) and never read back from Pebble.
//
// Log value: logV1, then operations: opSet klen(uvarint) key vlen(uvarint)
// value, or opDelete klen key. A log holds each key at most once. Keys are
// record, history and window keys of the log's own partition.
const (
	logV1     byte = 1
	logSet    byte = 1
	logDelete byte = 2
)

// Checkpoint thresholds (our choice: about a second of batches at the
// default batch.interval of 100 ms, and a bound on the logs a reader or a
// restart materializes). A partition that has caught up with its input
// commits more often than the interval (stream: each fetch that reaches
// the log's end), so the count alone would checkpoint it more and more
// often as its commits shrink: ten commits start a checkpoint only once
// checkpointMinInterval has passed since the last one. The byte bound
// applies at any time.
const (
	checkpointCommits     = 10
	checkpointBytes       = 8 << 20
	checkpointMinInterval = time.Second
)

// logKey is the key of partition p's seq-th log.
func logKey(dst []byte, p int32, seq uint64) []byte {
	dst = appendPartFamily(dst, uint32(p), famLog)
	return binary.BigEndian.AppendUint64(dst, seq)
}

func appendLogSet(dst, k, v []byte) []byte {
	dst = append(dst, logSet)
	dst = binary.AppendUvarint(dst, uint64(len(k)))
	dst = append(dst, k...)
	dst = binary.AppendUvarint(dst, uint64(len(v)))
	return append(dst, v...)
}

func appendLogDelete(dst, k []byte) []byte {
	dst = append(dst, logDelete)
	dst = binary.AppendUvarint(dst, uint64(len(k)))
	return append(dst, k...)
}

// forLogOps calls fn for each operation of log value v, in order (val is
// nil for a delete). The slices point into v.
func forLogOps(v []byte, fn func(del bool, k, val []byte) error) error {
	if len(v) == 0 || v[0] != logV1 {
		if len(v) == 0 {
			return fmt.Errorf("%w: empty log value", ErrCorruptStore)
		}
		return fmt.Errorf("%w: log value version %d is not readable by this build (upgrade attain)", ErrCorruptStore, v[0])
	}
	field := func(i int) ([]byte, int, error) {
		n, w := binary.Uvarint(v[i:])
		if w <= 0 || n > uint64(len(v)-i-w) {
			return nil, 0, fmt.Errorf("%w: log value truncated at byte %d", ErrCorruptStore, i)
		}
		return v[i+w : i+w+int(n)], i + w + int(n), nil
	}
	for i := 1; i < len(v); {
		op := v[i]
		k, next, err := field(i + 1)
		if err != nil {
			return err
		}
		var val []byte
		switch op {
		case logSet:
			if val, next, err = field(next); err != nil {
				return err
			}
		case logDelete:
		default:
			return fmt.Errorf("%w: log operation %d at byte %d", ErrCorruptStore, op, i)
		}
		if err := fn(op == logDelete, k, val); err != nil {
			return err
		}
		i = next
	}
	return nil
}

// buildCheckpoint stages in b the checkpoint of partition p's logs of
// sequence upTo or less: every key they hold with its latest logged value
// (or its deletion), and the deletion of the logs. It returns the number
// of logs.
func (s *Store) buildCheckpoint(p int32, upTo uint64, b *pebble.Batch) (int, error) {
	lo, hi := familyPrefix(uint32(p), famLog), familyEnd(uint32(p), famLog)
	if upTo < ^uint64(0) {
		hi = logKey(nil, p, upTo+1)
	}
	it, err := s.db.NewIter(&pebble.IterOptions{LowerBound: lo, UpperBound: hi})
	if err != nil {
		return 0, fmt.Errorf("attain: partition %d: reading its record log: %w", p, err)
	}
	defer it.Close()
	// Newest log first: the first value met for a key is its latest.
	var seen map[string]struct{}
	logs := 0
	for ok := it.Last(); ok; ok = it.Prev() {
		if seen == nil {
			seen = make(map[string]struct{})
		}
		v, err := it.ValueAndErr()
		if err != nil {
			return 0, fmt.Errorf("attain: partition %d: reading its record log: %w", p, err)
		}
		err = forLogOps(v, func(del bool, k, val []byte) error {
			if kp, fam, ok := keyPartition(k); !ok || int32(kp) != p || (fam != famRecord && fam != famHistory && fam != famWindow) {
				return fmt.Errorf("%w: it holds key %q, which is not a record, history or window key of partition %d", ErrCorruptStore, k, p)
			}
			if _, dup := seen[string(k)]; dup {
				return nil
			}
			seen[string(k)] = struct{}{}
			if del {
				return b.Delete(k, nil)
			}
			return b.Set(k, val, nil)
		})
		if err != nil {
			return 0, fmt.Errorf("attain: partition %d: log key %x: %w", p, it.Key(), err)
		}
		if err := b.Delete(it.Key(), nil); err != nil {
			return 0, err
		}
		logs++
	}
	if err := it.Error(); err != nil {
		return 0, fmt.Errorf("attain: partition %d: reading its record log: %w", p, err)
	}
	return logs, nil
}

// materialize checkpoints all of partition p's logs in one batch (synced
// with sync) and returns their number. The caller holds sl.mu (sl is p's
// slot), so no commit of p runs meanwhile.
func (s *Store) materialize(sl *partSlot, p int32, sync bool) (int, error) {
	b := s.db.NewBatch()
	defer b.Close()
	n, err := s.buildCheckpoint(p, ^uint64(0), b)
	if err != nil || n == 0 {
		return 0, err
	}
	wo := pebble.NoSync
	if sync {
		wo = pebble.Sync
	}
	if err := b.Commit(wo); err != nil {
		return 0, fmt.Errorf("attain: partition %d: checkpointing its record log: %w", p, err)
	}
	sl.gen++
	s.checkpoints.Add(1)
	return n, nil
}

// backgroundCheckpoint checkpoints partition p's logs of sequence upTo or
// less, off the partition's goroutine: the reading and staging run without
// the commit lock (the partition goes on committing logs above upTo, which
// it does not read), the commit under it, and only if no other checkpoint
// of p committed meanwhile (its generation is unchanged: a reader's settle
// or a new handle may have materialized these logs and later ones, which
// this batch's older values must not overwrite). The owning handle learns
// of it at its next Commit and unpins what the checkpoint covered.
func (s *Store) backgroundCheckpoint(sl *partSlot, p int32, owner *Partition, upTo uint64) {
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	sl.mu.Lock()
	gen := sl.gen
	sl.mu.Unlock()
	var b *pebble.Batch
	n, err := 0, error(nil)
	if !s.closed {
		b = s.db.NewBatch()
		defer b.Close()
		n, err = s.buildCheckpoint(p, upTo, b)
	}
	if testCheckpointHook != nil {
		testCheckpointHook()
	}
	sl.mu.Lock()
	defer sl.mu.Unlock()
	sl.bgRunning = false
	switch {
	case s.closed || n == 0:
		return
	case err != nil:
		s.log.Error().Err(err).Int32("partition", p).Msg("checkpointing the record log failed; the logs are kept and checkpointed later")
		return
	case sl.gen != gen:
		return
	}
	if err := b.Commit(pebble.NoSync); err != nil {
		s.log.Error().Err(err).Int32("partition", p).Msg("checkpointing the record log failed; the logs are kept and checkpointed later")
		return
	}
	sl.gen++
	s.checkpoints.Add(1)
	if sl.handle == owner {
		sl.bgOwner, sl.bgDone = owner, upTo
	}
}

// testCheckpointHook, when set (by tests only), runs in a background
// checkpoint between its reading and its commit.
var testCheckpointHook func()

// settle materializes the logs of every partition in ps under each one's
// commit lock, so that a reader then finds committed state in the keys.
// The caller holds closeMu shared.
func (s *Store) settle(ps []int32) error {
	var errs []error
	for _, p := range ps {
		sl := s.slot(p)
		sl.mu.Lock()
		_, err := s.materialize(sl, p, false)
		sl.mu.Unlock()
		errs = append(errs, err)
	}
	return errors.Join(errs...)
}

// slot returns partition p's slot, made on first use.
func (s *Store) slot(p int32) *partSlot {
	s.mu.Lock()
	defer s.mu.Unlock()
	sl := s.slots[p]
	if sl == nil {
		sl = &partSlot{}
		s.slots[p] = sl
	}
	return sl
}
