package fitjob

import (
	"bytes"
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"os"
	"slices"
	"strings"
	"time"

	"github.com/cockroachdb/pebble/v2"
	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/state"
)

// ErrSorter is wrapped by every error of the on-disk grouping: an answer it
// cannot hold, a scratch database it cannot write, a sorter used out of
// turn.
var ErrSorter = errors.New("attain: grouping answers on disk")

// A Sorter groups answers per skill and learner in a scratch Pebble
// database on disk, so that a refit's input can be larger than memory. It
// works in three passes:
//
//  1. Add writes every answer under (learner, arrival number);
//  2. Finish walks the answers learner by learner, drops repeated ids (the
//     first one counts), puts each learner's answers in order and writes one
//     packed sequence per (skill, learner);
//  3. Skills walks those sequences skill by skill and hands each skill's
//     Data to the caller.
//
// Memory is bounded by the largest learner (pass 2: one learner's answers,
// about 40 bytes each) and the largest skill (pass 3: one byte per answer
// and 8 per learner), plus Pebble's memtables and block cache
// (SorterOptions.MemTableBytes × 2 + 8 MiB); never by the whole history.
// Skill names are held in memory (there are few). A Sorter is used by one
// goroutine.
type Sorter struct {
	db  *pebble.DB
	dir string // the scratch directory, removed by Close
	opt SorterOptions
	log zerolog.Logger

	batch    *pebble.Batch
	seq      uint64
	skillIdx map[string]uint32
	skills   []string
	key      []byte
	val      []byte
	finished bool

	stats SortStats
	// mode is what was added: 0 nothing yet, modeAnswers (Add) or
	// modeSequences (AddSequence); the two do not mix.
	mode           int
	lastSeqLearner string
	first, last    int64 // `at` range of AddSequence's answers
	single         [][]uint32
	counted        bool // Skills has counted repeated sequences once
}

// SorterOptions configure NewSorter. The zero value is usable.
type SorterOptions struct {
	// Dir is where the scratch directory is made ("" → os.TempDir()). It
	// needs room for about 25 bytes per answer (measured: 24.7 for 10
	// million answers from a topic, BenchmarkGatedRefitTopic; 21–28 in
	// BenchmarkSorterAnswers). Close removes the directory; a process
	// killed outright leaves its attain-refit-* directory behind.
	Dir string
	// ArrivalOrder keeps each learner's answers in the order they were
	// added; otherwise they are ordered by `at`, ties in the order added
	// (as History does).
	ArrivalOrder bool
	// MemTableBytes is the scratch database's memtable size (0 → 32 MiB;
	// our choice: large enough that a few million answers never leave
	// memory, small enough for a 512 MiB pod).
	MemTableBytes int
	Logger        zerolog.Logger
}

// SortStats count what a Sorter holds.
type SortStats struct {
	Added      int64 // answers added (Add) plus answers in added sequences
	Answers    int64 // kept: Added minus Duplicates
	Duplicates int64 // answers whose id had already been added for the same learner
	Learners   int64
	Skills     int
	// MultiSkill counts kept answers tagged with more than one skill.
	MultiSkill int64
	// First and Last are the earliest and latest `at` of the kept answers
	// (zero when there are none).
	First, Last time.Time
	// DiskBytes is the scratch database's size on disk after Finish.
	DiskBytes uint64
}

// Keys of the scratch database. Learner and skill names never hold NUL
// (Add refuses them), so NUL separates them unambiguously.
//
//	answer   'a' learner 0x00 seq(BE8)              → id, at, correct, skills (pass 1)
//	sequence 's' skill 0x00 learner 0x00 seq(BE8)   → n, first at, last at, packed outcomes (pass 2)
//	learner  'l' learner                            → (empty) one per learner of AddSequence
const (
	sortAnswer   byte = 'a'
	sortSequence byte = 's'
	sortLearner  byte = 'l'
)

// sortBatchBytes is the size at which pending writes are committed (our
// choice: big batches amortise Pebble's per-commit cost).
const sortBatchBytes = 4 << 20

// NewSorter makes a scratch database in a new directory under opt.Dir.
// Close removes it.
func NewSorter(opt SorterOptions) (*Sorter, error) {
	if opt.MemTableBytes == 0 {
		opt.MemTableBytes = 32 << 20
	}
	if opt.MemTableBytes < 1<<20 {
		return nil, fmt.Errorf("%w: memtable bytes = %d: must be at least 1 MiB (or 0 for the default)", ErrSorter, opt.MemTableBytes)
	}
	dir, err := os.MkdirTemp(opt.Dir, "attain-refit-*")
	if err != nil {
		return nil, fmt.Errorf("%w: making a scratch directory: %v; fix: point the scratch directory at a writable disk", ErrSorter, err)
	}
	cache := pebble.NewCache(8 << 20)
	defer cache.Unref()
	po := &pebble.Options{
		Cache:              cache,
		FormatMajorVersion: pebble.FormatNewest,
		MemTableSize:       uint64(opt.MemTableBytes),
		// A scratch database is thrown away on any failure, so it needs no
		// write-ahead log; it is written once and read once in key order, so
		// compactions would only rewrite it: flushed memtables stay in L0
		// and iterators merge them.
		DisableWAL:                  true,
		DisableAutomaticCompactions: true,
		L0CompactionThreshold:       1 << 20,
		L0StopWritesThreshold:       1 << 20,
		Logger:                      scratchLog{opt.Logger},
	}
	db, err := pebble.Open(dir, po)
	if err != nil {
		os.RemoveAll(dir)
		return nil, fmt.Errorf("%w: opening a scratch database in %s: %v", ErrSorter, dir, err)
	}
	s := &Sorter{db: db, dir: dir, opt: opt, log: opt.Logger, skillIdx: map[string]uint32{}}
	s.batch = db.NewBatch()
	return s, nil
}

// Dir is the scratch directory (removed by Close).
func (s *Sorter) Dir() string { return s.dir }

// Stats returns the counts so far (complete after Finish).
func (s *Sorter) Stats() SortStats { return s.stats }

// Close drops the scratch database and its directory. It is safe to call
// more than once.
func (s *Sorter) Close() error {
	if s.db == nil {
		return nil
	}
	s.batch.Close()
	err := s.db.Close()
	s.db = nil
	if rerr := os.RemoveAll(s.dir); err == nil && rerr != nil {
		err = rerr
	}
	if err != nil {
		return fmt.Errorf("%w: removing %s: %v", ErrSorter, s.dir, err)
	}
	return nil
}

func checkName(what, v string) error {
	if v == "" {
		return fmt.Errorf("%w: empty %s name", ErrSorter, what)
	}
	if strings.IndexByte(v, 0) >= 0 {
		return fmt.Errorf("%w: %s %q contains a NUL byte", ErrSorter, what, v)
	}
	return nil
}

// Add records one answer (pass 1). The same id twice for one learner is
// kept once, in Finish.
func (s *Sorter) Add(a state.Answer) error {
	if s.finished || s.db == nil {
		return fmt.Errorf("%w: Add after Finish or Close", ErrSorter)
	}
	if s.mode == modeSequences {
		return fmt.Errorf("%w: Add after AddSequence: give a sorter answers or sequences, not both", ErrSorter)
	}
	s.mode = modeAnswers
	if err := checkName("learner", a.Learner); err != nil {
		return err
	}
	if len(a.Skills) == 0 {
		return fmt.Errorf("%w: answer %q of learner %q has no skill", ErrSorter, a.ID, a.Learner)
	}
	s.key = append(s.key[:0], sortAnswer)
	s.key = append(s.key, a.Learner...)
	s.key = append(s.key, 0)
	s.key = binary.BigEndian.AppendUint64(s.key, s.seq)
	s.seq++
	v := binary.AppendUvarint(s.val[:0], uint64(len(a.ID)))
	v = append(v, a.ID...)
	v = binary.AppendVarint(v, a.At.UnixNano())
	v = append(v, b2byte(a.Correct))
	v = binary.AppendUvarint(v, uint64(len(a.Skills)))
	for _, sk := range a.Skills {
		i, ok := s.skillIdx[sk]
		if !ok {
			if err := checkName("skill", sk); err != nil {
				return err
			}
			i = s.addSkill(sk)
		}
		v = binary.AppendUvarint(v, uint64(i))
	}
	s.val = v
	s.stats.Added++
	return s.set(s.key, v)
}

// AddSequence records one learner's whole, already de-duplicated sequence
// at one skill, in order (a store's history). A (learner, skill) given
// twice keeps the first sequence; the answers of the others count as
// duplicates (counted by the first Skills pass, which finds them).
func (s *Sorter) AddSequence(learner, skill string, h []state.HistoryEntry) error {
	if s.finished || s.db == nil {
		return fmt.Errorf("%w: AddSequence after Finish or Close", ErrSorter)
	}
	if s.mode == modeAnswers {
		return fmt.Errorf("%w: AddSequence after Add: give a sorter answers or sequences, not both", ErrSorter)
	}
	if s.mode == 0 {
		s.mode = modeSequences
		s.first, s.last = math.MaxInt64, math.MinInt64
	}
	if len(h) == 0 {
		return nil
	}
	if err := checkName("learner", learner); err != nil {
		return err
	}
	if _, ok := s.skillIdx[skill]; !ok {
		if err := checkName("skill", skill); err != nil {
			return err
		}
		s.addSkill(skill)
	}
	if learner != s.lastSeqLearner {
		s.key = append(append(s.key[:0], sortLearner), learner...)
		if err := s.set(s.key, nil); err != nil {
			return err
		}
		s.lastSeqLearner = learner
	}
	s.stats.Added += int64(len(h))
	s.stats.Answers += int64(len(h))
	first, last := h[0].At, h[0].At
	for _, e := range h {
		first, last = min(first, e.At), max(last, e.At)
	}
	s.first, s.last = min(s.first, first), max(s.last, last)
	return s.putSequence(skill, learner, len(h), first, last, func(i int) bool { return h[i].Correct })
}

const (
	modeAnswers   = 1
	modeSequences = 2
)

func (s *Sorter) addSkill(sk string) uint32 {
	i := uint32(len(s.skills))
	s.skillIdx[sk] = i
	s.skills = append(s.skills, sk)
	s.single = append(s.single, []uint32{i})
	return i
}

// putSequence writes one packed (skill, learner) sequence.
func (s *Sorter) putSequence(skill, learner string, n int, first, last int64, correct func(int) bool) error {
	s.key = append(s.key[:0], sortSequence)
	s.key = append(s.key, skill...)
	s.key = append(s.key, 0)
	s.key = append(s.key, learner...)
	s.key = append(s.key, 0)
	s.key = binary.BigEndian.AppendUint64(s.key, s.seq)
	s.seq++
	v := binary.AppendUvarint(s.val[:0], uint64(n))
	v = binary.AppendVarint(v, first)
	v = binary.AppendVarint(v, last)
	for i := 0; i < n; i += 8 {
		var b byte
		for j := 0; j < 8 && i+j < n; j++ {
			if correct(i + j) {
				b |= 1 << j
			}
		}
		v = append(v, b)
	}
	s.val = v
	return s.set(s.key, v)
}

func (s *Sorter) set(k, v []byte) error {
	if err := s.batch.Set(k, v, nil); err != nil {
		return fmt.Errorf("%w: %v", ErrSorter, err)
	}
	if s.batch.Len() >= min(sortBatchBytes, s.opt.MemTableBytes/4) {
		return s.commit()
	}
	return nil
}

func (s *Sorter) commit() error {
	if s.batch.Empty() {
		return nil
	}
	if err := s.batch.Commit(pebble.NoSync); err != nil {
		return fmt.Errorf("%w: writing to the scratch database in %s: %v; fix: free disk space there or choose another scratch directory", ErrSorter, s.dir, err)
	}
	s.batch.Reset()
	return nil
}

// sortedAnswer is one decoded pass-1 answer.
type sortedAnswer struct {
	at      int64
	correct bool
	skills  []uint32 // indexes into s.skills, no repeats
}

// Finish ends adding (pass 2): duplicates are dropped and each learner's
// answers are ordered and regrouped per skill. It checks ctx between
// learners.
func (s *Sorter) Finish(ctx context.Context) error {
	if s.finished || s.db == nil {
		return fmt.Errorf("%w: Finish called twice or after Close", ErrSorter)
	}
	s.finished = true
	if err := s.commit(); err != nil {
		return err
	}
	t0 := time.Now()
	var err error
	switch s.mode {
	case modeAnswers:
		err = s.regroup(ctx)
	case modeSequences:
		err = s.countSequenceLearners()
		if s.stats.Answers > 0 {
			s.stats.First, s.stats.Last = time.Unix(0, s.first).UTC(), time.Unix(0, s.last).UTC()
		}
	}
	if err != nil {
		return err
	}
	s.stats.Skills = len(s.skills)
	s.stats.DiskBytes = s.db.Metrics().DiskSpaceUsage()
	s.log.Debug().Int64("answers", s.stats.Answers).Int64("duplicates", s.stats.Duplicates).Int64("learners", s.stats.Learners).
		Uint64("disk_bytes", s.stats.DiskBytes).Dur("took", time.Since(t0)).Msg("answers grouped by learner and skill")
	return nil
}

// regroup is pass 2 for answers given by Add.
func (s *Sorter) regroup(ctx context.Context) error {
	it, err := s.db.NewIter(&pebble.IterOptions{LowerBound: []byte{sortAnswer}, UpperBound: []byte{sortAnswer + 1}})
	if err != nil {
		return fmt.Errorf("%w: %v", ErrSorter, err)
	}
	defer it.Close()
	var (
		learner  []byte
		ans      []sortedAnswer
		ids      = map[string]struct{}{}
		bits     []bool
		bySkill  = map[uint32][]int{} // skill → indexes into ans, for one learner
		first    = int64(math.MaxInt64)
		last     = int64(math.MinInt64)
		learners int
	)
	flush := func() error {
		if len(ans) == 0 {
			return nil
		}
		s.stats.Learners++
		if !s.opt.ArrivalOrder {
			// Stable: ties in `at` keep arrival order (ans is in seq order).
			slices.SortStableFunc(ans, func(x, y sortedAnswer) int {
				switch {
				case x.at < y.at:
					return -1
				case x.at > y.at:
					return 1
				}
				return 0
			})
		}
		for sk := range bySkill {
			bySkill[sk] = bySkill[sk][:0]
		}
		for i, a := range ans {
			for _, sk := range a.skills {
				bySkill[sk] = append(bySkill[sk], i)
			}
		}
		name := string(learner)
		for sk, idx := range bySkill {
			if len(idx) == 0 {
				continue
			}
			bits = bits[:0]
			lo, hi := int64(math.MaxInt64), int64(math.MinInt64)
			for _, i := range idx {
				bits = append(bits, ans[i].correct)
				lo, hi = min(lo, ans[i].at), max(hi, ans[i].at)
			}
			if err := s.putSequence(s.skills[sk], name, len(bits), lo, hi, func(i int) bool { return bits[i] }); err != nil {
				return err
			}
		}
		ans = ans[:0]
		clear(ids)
		return nil
	}
	for ok := it.First(); ok; ok = it.Next() {
		k := it.Key()
		if len(k) < 1+1+8 {
			return fmt.Errorf("%w: malformed key %q", ErrSorter, k)
		}
		l := k[1 : len(k)-9] // 'a' learner 0x00 seq(8)
		if !bytes.Equal(l, learner) {
			if err := flush(); err != nil {
				return err
			}
			learner = append(learner[:0], l...)
			if learners++; learners%1024 == 0 {
				if err := ctx.Err(); err != nil {
					return err
				}
			}
		}
		v, err := it.ValueAndErr()
		if err != nil {
			return fmt.Errorf("%w: %v", ErrSorter, err)
		}
		a, id, err := s.decodeAnswer(v)
		if err != nil {
			return fmt.Errorf("%w: key %q: %v", ErrSorter, k, err)
		}
		if _, dup := ids[string(id)]; dup {
			s.stats.Duplicates++
			continue
		}
		ids[string(id)] = struct{}{}
		ans = append(ans, a)
		s.stats.Answers++
		if len(a.skills) > 1 {
			s.stats.MultiSkill++
		}
		first, last = min(first, a.at), max(last, a.at)
	}
	if err := it.Error(); err != nil {
		return fmt.Errorf("%w: %v", ErrSorter, err)
	}
	if err := flush(); err != nil {
		return err
	}
	// The pass-1 answers are no longer needed.
	if err := s.batch.DeleteRange([]byte{sortAnswer}, []byte{sortAnswer + 1}, nil); err != nil {
		return fmt.Errorf("%w: %v", ErrSorter, err)
	}
	if err := s.commit(); err != nil {
		return err
	}
	if s.stats.Answers > 0 {
		s.stats.First, s.stats.Last = time.Unix(0, first).UTC(), time.Unix(0, last).UTC()
	}
	return nil
}

// countSequenceLearners counts the learner marker keys of AddSequence.
func (s *Sorter) countSequenceLearners() error {
	it, err := s.db.NewIter(&pebble.IterOptions{LowerBound: []byte{sortLearner}, UpperBound: []byte{sortLearner + 1}})
	if err != nil {
		return fmt.Errorf("%w: %v", ErrSorter, err)
	}
	for ok := it.First(); ok; ok = it.Next() {
		s.stats.Learners++
	}
	if err := errors.Join(it.Error(), it.Close()); err != nil {
		return fmt.Errorf("%w: %v", ErrSorter, err)
	}
	return nil
}

// decodeAnswer decodes a pass-1 value; id is a view into v.
func (s *Sorter) decodeAnswer(v []byte) (a sortedAnswer, id []byte, err error) {
	n, k := binary.Uvarint(v)
	if k <= 0 || uint64(len(v)-k) < n {
		return a, nil, errors.New("malformed id")
	}
	v = v[k:]
	id, v = v[:n], v[n:]
	at, k := binary.Varint(v)
	if k <= 0 || len(v) < k+1 {
		return a, nil, errors.New("malformed time")
	}
	a.at, a.correct = at, v[k] == 1
	v = v[k+1:]
	ns, k := binary.Uvarint(v)
	if k <= 0 || ns == 0 {
		return a, nil, errors.New("malformed skill count")
	}
	v = v[k:]
	for range ns {
		i, k := binary.Uvarint(v)
		if k <= 0 || i >= uint64(len(s.skills)) {
			return a, nil, errors.New("malformed skill")
		}
		v = v[k:]
		switch {
		case ns == 1:
			a.skills = s.single[i] // shared, read-only
		case !slices.Contains(a.skills, uint32(i)):
			a.skills = append(a.skills, uint32(i))
		}
	}
	return a, id, nil
}

// SkillInput is one skill's answers as Skills hands them out: every learner
// who answered it, in byte order of the learner ids.
type SkillInput struct {
	Skill string
	// Data holds one sequence per learner, in Learners' order.
	Data *Data
	// Learners are the learner ids of Data's sequences; valid only during
	// the callback (the slice is reused).
	Learners []string
	Correct  int
	// First and Last are the earliest and latest `at` of the skill's
	// answers.
	First, Last time.Time
}

// Skills calls fn once per skill, in byte order of the skill names, with
// that skill's data (pass 3). fn must not keep in or its Data after it
// returns: both are reused. Only one skill is in memory at a time.
func (s *Sorter) Skills(ctx context.Context, fn func(in *SkillInput) error) error {
	if !s.finished || s.db == nil {
		return fmt.Errorf("%w: Skills before Finish or after Close", ErrSorter)
	}
	it, err := s.db.NewIter(&pebble.IterOptions{LowerBound: []byte{sortSequence}, UpperBound: []byte{sortSequence + 1}})
	if err != nil {
		return fmt.Errorf("%w: %v", ErrSorter, err)
	}
	defer it.Close()
	// Repeated (learner, skill) sequences of AddSequence are found here;
	// they are taken off the counts on the first pass only.
	count := !s.counted
	s.counted = true
	var (
		in          = &SkillInput{Data: &Data{}}
		skill       []byte
		prevLearner []byte
		lo, hi      = int64(math.MaxInt64), int64(math.MinInt64)
	)
	emit := func() error {
		if len(in.Data.Ends) == 0 {
			return nil
		}
		in.Skill = string(skill)
		in.First, in.Last = time.Unix(0, lo).UTC(), time.Unix(0, hi).UTC()
		err := fn(in)
		in.Data.Obs, in.Data.Ends = in.Data.Obs[:0], in.Data.Ends[:0]
		in.Learners = in.Learners[:0]
		in.Correct = 0
		lo, hi = int64(math.MaxInt64), int64(math.MinInt64)
		return err
	}
	for ok := it.First(); ok; ok = it.Next() {
		k := it.Key()
		if len(k) < 1+1+1+8 {
			return fmt.Errorf("%w: malformed key %q", ErrSorter, k)
		}
		rest := k[1 : len(k)-9] // skill 0x00 learner
		i := bytes.IndexByte(rest, 0)
		if i < 0 {
			return fmt.Errorf("%w: malformed key %q", ErrSorter, k)
		}
		sk, l := rest[:i], rest[i+1:]
		if !bytes.Equal(sk, skill) || len(skill) == 0 {
			if err := emit(); err != nil {
				return err
			}
			if err := ctx.Err(); err != nil {
				return err
			}
			skill = append(skill[:0], sk...)
			prevLearner = prevLearner[:0]
		}
		v, err := it.ValueAndErr()
		if err != nil {
			return fmt.Errorf("%w: %v", ErrSorter, err)
		}
		n, first, last, packed, err := decodeSequence(v)
		if err != nil {
			return fmt.Errorf("%w: key %q: %v", ErrSorter, k, err)
		}
		if len(in.Learners) > 0 && bytes.Equal(l, prevLearner) {
			// The same learner-skill given again (a store whose topic was
			// repartitioned): the first sequence counts.
			if count {
				s.stats.Duplicates += int64(n)
				s.stats.Answers -= int64(n)
			}
			continue
		}
		prevLearner = append(prevLearner[:0], l...)
		for j := range n {
			c := packed[j/8]&(1<<(j%8)) != 0
			in.Data.Obs = append(in.Data.Obs, c)
			if c {
				in.Correct++
			}
		}
		in.Data.Ends = append(in.Data.Ends, len(in.Data.Obs))
		in.Learners = append(in.Learners, string(l))
		lo, hi = min(lo, first), max(hi, last)
	}
	if err := it.Error(); err != nil {
		return fmt.Errorf("%w: %v", ErrSorter, err)
	}
	return emit()
}

func decodeSequence(v []byte) (n int, first, last int64, packed []byte, err error) {
	un, k := binary.Uvarint(v)
	if k <= 0 {
		return 0, 0, 0, nil, errors.New("malformed length")
	}
	v = v[k:]
	first, k = binary.Varint(v)
	if k <= 0 {
		return 0, 0, 0, nil, errors.New("malformed first time")
	}
	v = v[k:]
	last, k = binary.Varint(v)
	if k <= 0 {
		return 0, 0, 0, nil, errors.New("malformed last time")
	}
	v = v[k:]
	if uint64(len(v)) != (un+7)/8 {
		return 0, 0, 0, nil, fmt.Errorf("%d packed bytes for %d outcomes", len(v), un)
	}
	return int(un), first, last, v, nil
}

func b2byte(b bool) byte {
	if b {
		return 1
	}
	return 0
}

// scratchLog sends the scratch database's errors to the sorter's logger
// and drops its informational messages.
type scratchLog struct{ log zerolog.Logger }

func (scratchLog) Infof(string, ...any) {}
func (l scratchLog) Errorf(format string, args ...any) {
	l.log.Error().Msgf("scratch database: "+format, args...)
}

// Fatalf is Pebble's report of a broken invariant; it must not return.
func (l scratchLog) Fatalf(format string, args ...any) {
	panic(fmt.Sprintf("attain: scratch database: "+format, args...))
}
