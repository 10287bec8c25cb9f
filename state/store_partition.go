package state

import (
	"errors"
	"fmt"
	"math"
	"strings"
	"sync/atomic"
	"time"

	"github.com/cockroachdb/pebble/v2"
)

// ApplyResult says what one Apply did.
type ApplyResult struct {
	Duplicate bool // id already applied for this learner: nothing changed except the offset
	Late      bool // `at` earlier than the latest `at` of the learner so far (still applied, in arrival order)
	Rederived int  // skills whose record was re-derived from history under a newer params version first
	// PCorrect holds, per skill in a.Skills order, the prediction made
	// before the answer (a skill named twice gets the same value twice; it
	// is applied once). It is the partition's buffer, valid until the
	// partition's next Apply: copy it to keep it.
	PCorrect []float64
	Outputs  []Output // reached/stuck events staged in the outbox by this answer
	// Replayed is true when offset was at or below the stored or staged
	// offset: the call did nothing (the answer was already applied).
	Replayed bool
}

// Output is a reached or stuck event, as staged in the outbox.
type Output struct {
	Kind          Kind
	Learner       string
	Skill         string
	Mastery       float64
	Opportunities uint32
	ParamsVersion int64
	AnswerID      string
	At            time.Time
	ID            string // EventID(Learner, Skill, Kind, Opportunities)
}

// DeadLetter is a rejected input event, as staged in the outbox.
type DeadLetter struct {
	Raw       []byte
	Key       []byte
	Topic     string
	Partition int32
	Offset    int64
	Reason    string
	Field     string
	At        time.Time // message time
}

// Partition is the handle through which one goroutine changes one
// partition's state. Changes are staged in memory and in a pending Pebble
// batch; reads through the handle see them; Commit writes them together with
// the consumed offset in one atomic batch. A handle is not safe for
// concurrent use. Taking a new handle of the same partition (Store.Partition)
// fences the old one: it returns ErrPartitionReleased from then on and can
// commit nothing.
type Partition struct {
	s      *Store
	p      int32
	slot   *partSlot
	fenced atomic.Bool // set by a newer handle or Close, under slot.mu

	released bool

	committed partState // as stored
	staged    partState // as it will be stored by the next Commit
	pending   int       // offsets staged since the last Commit
	outboxN   int64     // outbox entries staged

	batch    *pebble.Batch
	learners map[string]*learnerVal // learners changed since the last Commit, by key

	// The record log (store_log.go). unckpt pins the learners committed
	// since the handle's last checkpoint: their latest state is in logs,
	// not in their keys, so they are never read back from Pebble (nor lost
	// to a cache eviction). unsettled is set when the pinned state was
	// dropped (a failed commit): the logs are materialized before the next
	// read.
	unckpt    map[string]*learnerVal
	logSeq    uint64    // the next log key's sequence
	sinceCkpt int       // logs written since the last checkpoint
	lastCkpt  time.Time // when the handle last started a checkpoint
	logBytes  int       // their size
	unsettled bool
	logbuf    []byte

	skillNames map[string]string // see intern

	kbuf, vbuf, lkbuf, rkbuf []byte
	pcbuf                    []float64 // ApplyResult.PCorrect
	dwin                     window    // a delta window being written
	work                     []skillWork

	// cnt counts what the handle did since its counts were last added to
	// the store's (at every Commit and at Release): one shared atomic add
	// per batch instead of several per answer, which the partitions'
	// goroutines on other processors would contend for.
	cnt struct{ applied, duplicates, late, rederived, deadLetters, skipped, replayed, pinned int64 }
}

// skillWork is one skill of the answer being applied, between the reads
// (phase 1) and the staging (phase 2) of Apply.
type skillWork struct {
	skill     string
	rs        *recState // nil when the learner has no record of the skill yet
	rv        recVal
	isNew     bool
	params    Params
	first     int // index in a.Skills of the first occurrence
	rederived bool
}

// Partition returns the handle of partition p (p ≥ 0). Any older handle of
// p is fenced, and p's cache entries are dropped. It reads one key.
func (s *Store) Partition(p int32) (*Partition, error) {
	if p < 0 {
		return nil, fmt.Errorf("attain: partition %d: must be 0 or more", p)
	}
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if s.closed {
		return nil, ErrStoreClosed
	}
	s.mu.Lock()
	sl := s.slots[p]
	if sl == nil {
		sl = &partSlot{}
		s.slots[p] = sl
	}
	s.mu.Unlock()

	sl.mu.Lock()
	defer sl.mu.Unlock()
	if old := sl.handle; old != nil {
		old.fenced.Store(true)
		s.log.Warn().Int32("partition", p).Msg("partition taken while an older handle was not released; the older one is fenced")
	}
	s.cache.dropPartition(p)
	// What an earlier handle (or a run that crashed) left in logs is
	// checkpointed first: from here on the keys hold committed state and
	// every log is this handle's.
	if _, err := s.materialize(sl, p, true); err != nil {
		return nil, err
	}
	st := partState{nextSeq: 1}
	v, closer, err := s.db.Get(stateKey(p))
	switch {
	case err == nil:
		st, err = decodePartState(v)
		closer.Close()
		if err != nil {
			return nil, fmt.Errorf("attain: partition %d: %w", p, err)
		}
	case errors.Is(err, pebble.ErrNotFound):
	default:
		return nil, fmt.Errorf("attain: partition %d: reading its state: %w", p, err)
	}
	// The next outbox number is stored with the offset; the largest stored
	// entry is checked too, so a number is never reused even if the two
	// disagreed.
	it, err := s.db.NewIter(&pebble.IterOptions{LowerBound: familyPrefix(uint32(p), famOutbox), UpperBound: familyEnd(uint32(p), famOutbox)})
	if err != nil {
		return nil, fmt.Errorf("attain: partition %d: reading its outbox: %w", p, err)
	}
	if it.Last() && len(it.Key()) == partPrefixLen+8 {
		if last := beUint64(it.Key()[partPrefixLen:]); last >= st.nextSeq {
			st.nextSeq = last + 1
		}
	}
	if err := errors.Join(it.Error(), it.Close()); err != nil {
		return nil, fmt.Errorf("attain: partition %d: reading its outbox: %w", p, err)
	}
	if st.nextSeq == 0 {
		st.nextSeq = 1
	}
	pt := &Partition{
		s:          s,
		p:          p,
		slot:       sl,
		committed:  st,
		staged:     st,
		batch:      s.db.NewBatch(),
		learners:   make(map[string]*learnerVal),
		skillNames: make(map[string]string),
		unckpt:     make(map[string]*learnerVal),
		logSeq:     1,
	}
	sl.handle = pt
	return pt, nil
}

// ID is the partition number.
func (pt *Partition) ID() int32 { return pt.p }

// NextOffset returns the committed consumed offset + 1: where consumption
// resumes. ok is false when the partition has no stored offset.
func (pt *Partition) NextOffset() (next int64, ok bool) {
	if !pt.committed.hasOffset {
		return 0, false
	}
	return pt.committed.offset + 1, true
}

// Pending is the number of offsets staged since the last Commit.
func (pt *Partition) Pending() int { return pt.pending }

// usable reports why the handle may not be used; the caller holds
// s.closeMu shared.
func (pt *Partition) usable() error {
	if pt.s.closed {
		return ErrStoreClosed
	}
	if pt.released || pt.fenced.Load() {
		return fmt.Errorf("%w: partition %d", ErrPartitionReleased, pt.p)
	}
	return nil
}

// replay reports whether offset was already consumed (stored or staged).
func (pt *Partition) replay(offset int64) bool {
	if pt.staged.hasOffset && offset <= pt.staged.offset {
		pt.cnt.replayed++
		return true
	}
	return false
}

func (pt *Partition) advance(offset int64) {
	pt.staged.offset, pt.staged.hasOffset = offset, true
	pt.pending++
}

// The times whose Unix nanoseconds fit an int64 (Record.Updated and
// HistoryEntry.At hold them).
var (
	minAt = time.Unix(0, math.MinInt64)
	maxAt = time.Unix(0, math.MaxInt64)
)

// checkAnswer rejects what the key layout cannot hold.
func checkAnswer(a *Answer) error {
	switch {
	case a.ID == "":
		return &AnswerError{Field: "id", Reason: "empty"}
	case a.Learner == "":
		return &AnswerError{Field: "learner", Reason: "empty"}
	case strings.IndexByte(a.Learner, 0) >= 0:
		return &AnswerError{Field: "learner", Reason: "contains a NUL byte"}
	case len(a.Skills) == 0:
		return &AnswerError{Field: "skills", Reason: "empty list: an answer must be tagged with at least one skill"}
	}
	if a.At.Before(minAt) || a.At.After(maxAt) {
		return &AnswerError{Field: "at", Reason: fmt.Sprintf("%s is outside the storable range %s to %s (Unix nanoseconds in 64 bits)", a.At.Format(time.RFC3339), minAt.Format(time.RFC3339), maxAt.Format(time.RFC3339))}
	}
	for _, s := range a.Skills {
		if s == "" {
			return &AnswerError{Field: "skills", Reason: "contains an empty skill name"}
		}
		if strings.IndexByte(s, 0) >= 0 {
			return &AnswerError{Field: "skills", Reason: "a skill name contains a NUL byte"}
		}
	}
	return nil
}

// Apply stages answer a, consumed at offset, under params (see the
// package contract: duplicate ids are skipped, a record computed under
// another parameter version is first re-derived from its history, outputs
// go to the outbox). An offset at or below the stored or staged offset is a
// no-op (Replayed). An error leaves the staging as it was; an *AnswerError
// (errors.Is ErrBadAnswer) means the answer cannot be stored and should be
// dead-lettered.
func (pt *Partition) Apply(a Answer, offset int64, params *ParamFile) (ApplyResult, error) {
	s := pt.s
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if err := pt.usable(); err != nil {
		return ApplyResult{}, err
	}
	if pt.replay(offset) {
		return ApplyResult{Replayed: true}, nil
	}
	if params == nil {
		return ApplyResult{}, fmt.Errorf("attain: partition %d: Apply needs a parameter set (nil given)", pt.p)
	}
	if err := pt.resettle(); err != nil {
		return ApplyResult{}, err
	}
	if err := checkAnswer(&a); err != nil {
		return ApplyResult{}, err
	}

	// Phase 1: every read that can fail, before anything is staged.
	pt.lkbuf = learnerRecordPrefix(pt.lkbuf[:0], pt.p, a.Learner)
	lv, staged, err := pt.loadLearner(pt.lkbuf)
	if err != nil {
		return ApplyResult{}, err
	}
	h := idHash(a.ID)
	if lv.win.contains(h) {
		pt.advance(offset)
		pt.cnt.duplicates++
		return ApplyResult{Duplicate: true}, nil
	}
	at := a.At.UnixNano()
	res := ApplyResult{Late: lv.win.hasAt && at < lv.win.lastAt, PCorrect: pt.pcorrect(len(a.Skills))}

	pt.work = pt.work[:0]
	for i, skill := range a.Skills {
		if dupSkill(a.Skills[:i], skill) {
			continue
		}
		p, v := params.For(skill)
		sw := skillWork{skill: skill, params: p, first: i}
		if rs, ok := lv.find(skill); ok {
			sw.rs, sw.rv = rs, rs.rv
		} else {
			sw.rv, sw.isNew = recVal{rec: NewRecord(p, v)}, true
		}
		if sw.rv.rec.ParamsVersion != v {
			if sw.rv.rec.Opportunities > 0 {
				rec, err := pt.rederive(lv, &sw, p, v)
				if err != nil {
					return ApplyResult{}, err
				}
				sw.rv.rec, sw.rederived = rec, true
			} else {
				sw.rv.rec = NewRecord(p, v)
			}
		}
		pt.work = append(pt.work, sw)
	}

	// Phase 2: stage. Nothing below can fail.
	pol := s.opt.Policy
	for k := range pt.work {
		sw := &pt.work[k]
		rs := sw.rs
		if rs == nil {
			rs = &recState{skill: pt.internString(sw.skill)}
			lv.insert(rs)
			pt.staged.records++
		}
		rs.rv = sw.rv
		rv := &rs.rv
		out := rv.rec.Apply(sw.params, a.Correct, at, pol)
		res.PCorrect[sw.first] = out.PCorrect
		if sw.rederived {
			res.Rederived++
		}
		rv.push(HistoryEntry{At: at, Correct: a.Correct})
		if rv.tailN >= tailMaxAnswers || len(rv.tail) >= tailMaxBytes {
			rs.chunks = append(rs.chunks, histChunk{first: rv.rec.Opportunities - rv.tailN + 1, n: rv.tailN, entries: rv.tail})
			rv.tail, rv.tailN, rv.prevAt = nil, 0, 0
		}
		lv.stage(rs, k == 0)
		for _, kind := range [2]Kind{KindReached, KindStuck} {
			if (kind == KindReached && !out.Reached) || (kind == KindStuck && !out.Stuck) {
				continue
			}
			o := Output{
				Kind: kind, Learner: a.Learner, Skill: sw.skill, Mastery: rv.rec.Mastery,
				Opportunities: rv.rec.Opportunities, ParamsVersion: rv.rec.ParamsVersion,
				AnswerID: a.ID, At: a.At, ID: EventID(a.Learner, sw.skill, kind, rv.rec.Opportunities),
			}
			pt.stageOutbox(&OutboxEntry{Output: &o})
			res.Outputs = append(res.Outputs, o)
		}
	}
	for i, skill := range a.Skills {
		for k := range pt.work {
			if pt.work[k].skill == skill {
				res.PCorrect[i] = res.PCorrect[pt.work[k].first]
				break
			}
		}
	}
	lv.win.add(h, at, s.opt.DedupeWindow)
	if !staged {
		pt.learners[lv.key] = lv
	}
	pt.advance(offset)
	pt.cnt.applied++
	if res.Late {
		pt.cnt.late++
	}
	pt.cnt.rederived += int64(res.Rederived)
	return res, nil
}

func (pt *Partition) pcorrect(n int) []float64 {
	if cap(pt.pcbuf) < n {
		pt.pcbuf = make([]float64, n)
	}
	pt.pcbuf = pt.pcbuf[:n]
	clear(pt.pcbuf)
	return pt.pcbuf
}

func dupSkill(prev []string, skill string) bool {
	for _, s := range prev {
		if s == skill {
			return true
		}
	}
	return false
}

func (pt *Partition) set(k, v []byte) {
	// Batch.Set copies k and v; it fails only on a closed batch, which a
	// live handle never has.
	if err := pt.batch.Set(k, v, nil); err != nil {
		panic(fmt.Sprintf("attain: staging into partition %d's batch: %v", pt.p, err))
	}
}

func (pt *Partition) stageOutbox(e *OutboxEntry) {
	seq := pt.staged.nextSeq
	pt.staged.nextSeq++
	e.Partition, e.Seq = pt.p, seq
	pt.kbuf = outboxKey(pt.kbuf[:0], pt.p, seq)
	pt.vbuf = appendOutbox(pt.vbuf[:0], e)
	pt.set(pt.kbuf, pt.vbuf)
	pt.outboxN++
}

// rederive replays the learner-skill's whole history under p from
// NewRecord(p, v), emitting nothing: the committed history keys, the
// chunks staged since the last commit, then the tail of the record as
// loaded (staged, cached or stored: the history keys committed with it
// precede it).
func (pt *Partition) rederive(lv *learnerVal, sw *skillWork, p Params, v int64) (Record, error) {
	pt.rkbuf = append(append(pt.rkbuf[:0], lv.key...), sw.skill...)
	rk, want := pt.rkbuf, sw.rv.rec.Opportunities
	rec := NewRecord(p, v)
	pol := pt.s.opt.Policy
	var n uint32
	apply := func(h HistoryEntry) {
		rec.Apply(p, h.Correct, h.At, pol)
		n++
	}
	err := pt.s.historyKeys(pt.s.db, rk, apply)
	if err == nil && sw.rs != nil {
		// The chunks committed in logs since the last checkpoint, unless a
		// reader's settle has written them to their keys already (the keys
		// hold opportunities 1 to n, in order), then the chunks staged.
		stored := n
		for _, c := range sw.rs.logged {
			if c.first <= stored {
				continue
			}
			if _, err = forHistEntries(c.entries, uint64(c.n), apply); err != nil {
				break
			}
		}
		for _, c := range sw.rs.chunks {
			if err != nil {
				break
			}
			if _, err = forHistEntries(c.entries, uint64(c.n), apply); err != nil {
				break
			}
		}
	}
	if err == nil {
		_, err = forHistEntries(sw.rv.tail, uint64(sw.rv.tailN), apply)
	}
	if err != nil {
		return Record{}, fmt.Errorf("attain: partition %d: re-deriving %q: %w", pt.p, rk, err)
	}
	if n != want {
		pt.s.log.Error().Int32("partition", pt.p).Bytes("record", rk).Uint32("history", n).Uint32("opportunities", want).
			Msg("history length differs from the record's opportunities; re-derived from the history found")
	}
	return rec, nil
}

// DeadLetter stages a dead-letter outbox entry for the event at offset, and
// the offset. An offset at or below the stored or staged one is a no-op.
func (pt *Partition) DeadLetter(dl DeadLetter, offset int64) error {
	s := pt.s
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if err := pt.usable(); err != nil {
		return err
	}
	if pt.replay(offset) {
		return nil
	}
	pt.stageOutbox(&OutboxEntry{DeadLetter: &dl})
	pt.advance(offset)
	pt.cnt.deadLetters++
	return nil
}

// Skip stages only the offset advance (a tombstone, an empty message). An
// offset at or below the stored or staged one is a no-op.
func (pt *Partition) Skip(offset int64) error {
	s := pt.s
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if err := pt.usable(); err != nil {
		return err
	}
	if pt.replay(offset) {
		return nil
	}
	pt.advance(offset)
	pt.cnt.skipped++
	return nil
}

// Commit writes everything staged — records (with their history tails and
// the learners' id windows), history chunks, outbox entries and the
// consumed offset — in one atomic Pebble batch; with sync it waits for the
// WAL to reach the disk (pebble.Sync), otherwise it does not (pebble.NoSync:
// a crash may lose the tail of commits, which replay from the stored offset
// restores, since the offset is in the same batch). Nothing staged: no
// write. On error the staging is dropped (the handle stays usable; resume
// from NextOffset).
func (pt *Partition) Commit(sync bool) error {
	s := pt.s
	defer pt.flushCounts()
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if err := pt.usable(); err != nil {
		return err
	}
	if pt.pending == 0 {
		return nil
	}
	pt.slot.mu.Lock()
	defer pt.slot.mu.Unlock()
	if pt.slot.handle != pt || pt.fenced.Load() {
		pt.dropStaging()
		return fmt.Errorf("%w: partition %d (a newer handle took it)", ErrPartitionReleased, pt.p)
	}
	if sl := pt.slot; sl.bgOwner == pt {
		pt.unpin(sl.bgDone)
		sl.bgOwner = nil
	}
	s.mu.Lock()
	s.parts[pt.p] = struct{}{} // before the commit, so readers that list partitions after opening an iterator see it
	s.mu.Unlock()

	// The batch's records, chunks and window deletions go into one log
	// value (store_log.go).
	lb := append(pt.logbuf[:0], logV1)
	for _, lv := range pt.learners {
		for _, rs := range lv.dirty {
			pt.rkbuf = append(append(pt.rkbuf[:0], lv.key...), rs.skill...)
			for _, c := range rs.chunks {
				pt.kbuf = historyKeyFromRecordKey(pt.kbuf[:0], pt.rkbuf, c.first)
				pt.vbuf = appendHistoryChunk(pt.vbuf[:0], c.n, c.entries)
				lb = appendLogSet(lb, pt.kbuf, pt.vbuf)
			}
			var w *window
			if rs == lv.carrier {
				w, lv.newBase = lv.windowToWrite(&pt.dwin)
			}
			pt.vbuf = appendRecordVal(pt.vbuf[:0], &rs.rv, w)
			lb = appendLogSet(lb, pt.rkbuf, pt.vbuf)
		}
		if lv.legacyWin {
			// The window now lives in a record: the schema 1 window key goes.
			pt.kbuf = appendPartFamily(pt.kbuf[:0], uint32(pt.p), famWindow)
			pt.kbuf = append(pt.kbuf, lv.key[partPrefixLen:len(lv.key)-1]...)
			lb = appendLogDelete(lb, pt.kbuf)
		}
	}
	pt.logbuf = lb
	logged := len(lb) > 1
	if logged {
		pt.kbuf = logKey(pt.kbuf[:0], pt.p, pt.logSeq)
		pt.set(pt.kbuf, lb)
	}
	pt.vbuf = appendPartState(pt.vbuf[:0], pt.staged)
	pt.set(stateKey(pt.p), pt.vbuf)
	wo := pebble.NoSync
	if sync {
		wo = pebble.Sync
	}
	// The depth counts the new entries before they are visible, so that a
	// publisher deleting them as soon as they are (from another goroutine)
	// never takes it below the true number: OutboxDepth() == 0 means the
	// outbox is empty.
	s.depth.Add(pt.outboxN)
	if err := pt.batch.Commit(wo); err != nil {
		s.depth.Add(-pt.outboxN)
		s.commitFailures.Add(1)
		pt.dropStaging()
		return fmt.Errorf("attain: committing partition %d (%d offsets up to %d): %w", pt.p, pt.pending, pt.staged.offset, err)
	}
	for _, lv := range pt.learners {
		if lv.newBase {
			lv.baseRec, lv.baseSeq, lv.newBase = lv.carrier, lv.win.seq, false
		}
		for _, rs := range lv.dirty {
			for _, c := range rs.chunks {
				rs.logged = append(rs.logged, loggedChunk{seq: pt.logSeq, histChunk: c})
			}
			rs.dirty, rs.chunks = false, nil
		}
		clear(lv.dirty)
		lv.dirty, lv.carrier, lv.legacyWin = lv.dirty[:0], nil, false
		lv.lastLog = pt.logSeq
		pt.unckpt[lv.key] = lv
		s.cache.put(pt.p, lv.key, lv, len(lv.recs))
	}
	s.records.Add(int64(pt.staged.records) - int64(pt.committed.records))
	s.commits.Add(1)
	pt.committed = pt.staged
	pt.batch.Reset()
	pt.clearStaging()
	if logged {
		pt.logSeq++
		pt.sinceCkpt++
		pt.logBytes += len(pt.logbuf)
	}
	if len(pt.logbuf) > checkpointBytes {
		pt.logbuf = nil // not kept at the size of an unusually large batch
	}
	// The commit stands whatever happens below: a failed checkpoint
	// leaves the logs, which the next one (or the next handle)
	// materializes.
	sl := pt.slot
	switch {
	case pt.sinceCkpt == 0:
	case sync || pt.logBytes >= 4*checkpointBytes:
		if err := pt.checkpoint(sync); err != nil {
			s.log.Error().Err(err).Int32("partition", pt.p).Msg("checkpointing the record log failed; the logs are kept and checkpointed later")
		}
	case !sl.bgRunning && (pt.sinceCkpt >= checkpointCommits && time.Since(pt.lastCkpt) >= s.ckptInterval || pt.logBytes >= checkpointBytes):
		sl.bgRunning = true
		pt.sinceCkpt, pt.logBytes = 0, 0
		pt.lastCkpt = time.Now()
		go s.backgroundCheckpoint(sl, pt.p, pt, pt.logSeq-1)
	}
	return nil
}

// checkpoint materializes all the partition's logs and unpins every
// learner. The caller holds slot.mu.
func (pt *Partition) checkpoint(sync bool) error {
	if _, err := pt.s.materialize(pt.slot, pt.p, sync); err != nil {
		return err
	}
	pt.unpin(^uint64(0))
	pt.sinceCkpt, pt.logBytes = 0, 0
	pt.lastCkpt = time.Now()
	return nil
}

// unpin forgets what the checkpoint of the handle's logs up to upTo put
// in the keys: the learners last written by those logs are unpinned, and
// the logged chunks of the others lose those logs' chunks.
func (pt *Partition) unpin(upTo uint64) {
	for k, lv := range pt.unckpt {
		done := lv.lastLog <= upTo
		for _, rs := range lv.recs {
			i := 0
			for i < len(rs.logged) && (done || rs.logged[i].seq <= upTo) {
				i++
			}
			if i == len(rs.logged) {
				rs.logged = nil
			} else if i > 0 {
				rs.logged = append(rs.logged[:0], rs.logged[i:]...)
			}
		}
		if done {
			delete(pt.unckpt, k)
		}
	}
}

// resettle materializes the logs when the pinned learners were dropped
// (after a failed commit), so that reads of Pebble see committed state.
// The caller holds s.closeMu shared.
func (pt *Partition) resettle() error {
	if !pt.unsettled {
		return nil
	}
	pt.slot.mu.Lock()
	defer pt.slot.mu.Unlock()
	if pt.slot.handle != pt || pt.fenced.Load() {
		return fmt.Errorf("%w: partition %d (a newer handle took it)", ErrPartitionReleased, pt.p)
	}
	if err := pt.checkpoint(false); err != nil {
		return err
	}
	pt.unsettled = false
	return nil
}

// dropStaging forgets everything staged and the partition's cache entries.
func (pt *Partition) dropStaging() {
	pt.batch.Close()
	pt.batch = nil
	if !pt.s.closed {
		pt.batch = pt.s.db.NewBatch()
	}
	pt.staged = pt.committed
	pt.clearStaging()
	pt.s.cache.dropPartition(pt.p)
	// The pinned learners hold the abandoned staging too (Apply changes
	// them in place): dropped, and the logs materialized before the next
	// read.
	clear(pt.unckpt)
	pt.unsettled = true
}

func (pt *Partition) clearStaging() {
	clear(pt.learners)
	pt.pending = 0
	pt.outboxN = 0
}

// Release drops the uncommitted staging and the partition's cache entries,
// and ends the handle (revocation). It is cheap and never fails; the
// partition can be taken again with Store.Partition.
func (pt *Partition) Release() {
	pt.flushCounts()
	if pt.released {
		return
	}
	pt.released = true
	if pt.batch != nil {
		pt.batch.Close()
		pt.batch = nil
	}
	pt.staged = pt.committed
	pt.clearStaging()
	pt.s.cache.dropPartition(pt.p)
	pt.slot.mu.Lock()
	if pt.slot.handle == pt {
		pt.slot.handle = nil
	}
	pt.slot.mu.Unlock()
}

// flushCounts adds the handle's counts to the store's.
func (pt *Partition) flushCounts() {
	s, c := pt.s, &pt.cnt
	for _, x := range [...]struct {
		n   int64
		dst *atomic.Int64
	}{{c.applied, &s.applied}, {c.duplicates, &s.duplicates}, {c.late, &s.late}, {c.rederived, &s.rederived},
		{c.deadLetters, &s.deadLetters}, {c.skipped, &s.skipped}, {c.replayed, &s.replayed}, {c.pinned, &s.pinnedHits}} {
		if x.n != 0 {
			x.dst.Add(x.n)
		}
	}
	*c = struct{ applied, duplicates, late, rederived, deadLetters, skipped, replayed, pinned int64 }{}
}
