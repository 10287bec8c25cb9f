package state

import (
	"bytes"
	"encoding/binary"
	"errors"
	"fmt"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/cockroachdb/pebble/v2"
	"github.com/rs/zerolog"
)

// Errors of the store, checked with errors.Is.
var (
	// ErrStoreClosed is returned by every operation after Close.
	ErrStoreClosed = errors.New("attain: store closed")
	// ErrPartitionReleased is returned by a partition handle after Release,
	// or after a newer handle of the same partition was taken (fencing: a
	// handle of an ended generation can no longer change anything).
	ErrPartitionReleased = errors.New("attain: partition handle released")
	// ErrStoreSchema rejects a data directory written by a newer attain or
	// not by attain at all.
	ErrStoreSchema = errors.New("attain: store schema not supported")
	// ErrInvalidStoreOptions rejects bad StoreOptions.
	ErrInvalidStoreOptions = errors.New("attain: invalid store options")
)

// storeSchema is the layout of keys.go and encoding.go. Bump it with a
// migration when either changes incompatibly.
//
// Schema 2 keeps the latest answers of a learner-skill in its record value
// (version 2) and the older ones in history chunks (history version 2);
// schema 1 wrote one history key per answer and version 1 records. This
// build reads both, so a schema 1 store is taken over as it is: its schema
// key is set to 2 at open, since values a schema 1 build cannot read may be
// written from then on.
const storeSchema = 3

// Defaults of StoreOptions (our choices, sized so that a million
// learner-skill records fit well inside 512 MiB; see bench_test.go). The
// block cache is Pebble's whole cache: Pebble reserves its memtables inside
// it (pebble/v2 db.go, newMemTable: Cache.Reserve), and the default
// memtable is a third of it (defaultMemTableBytes).
const (
	DefaultCacheRecords    = 200_000
	DefaultBlockCacheBytes = 144 << 20
	DefaultDedupeWindow    = 32
)

// StoreOptions configure OpenStore. The zero value of each field means its
// default.
type StoreOptions struct {
	CacheRecords    int    // write-through cache bound, in learner-skill records (default 200_000)
	BlockCacheBytes int64  // Pebble's cache, memtables included (default 144 MiB)
	DedupeWindow    int    // applied answer ids remembered per learner (default 32)
	Policy          Policy // thresholds (zero value: DefaultPolicy())
	Logger          zerolog.Logger
	// CacheLearners bounds the number of learners in the cache, whose
	// entries hold a learner's records and applied-id window (default
	// CacheRecords/4, at least 1024: a learner usually practises several
	// skills; our choice).
	CacheLearners int
	// MemTableBytes is Pebble's memtable size (default: a third of
	// BlockCacheBytes, between 1 and 64 MiB; see defaultMemTableBytes).
	MemTableBytes int
}

func (o *StoreOptions) setDefaults() error {
	var errs []error
	if o.CacheRecords == 0 {
		o.CacheRecords = DefaultCacheRecords
	}
	if o.CacheRecords < 0 {
		errs = append(errs, fmt.Errorf("%w: cache records = %d: must be positive (or 0 for the default %d)", ErrInvalidStoreOptions, o.CacheRecords, DefaultCacheRecords))
	}
	if o.BlockCacheBytes == 0 {
		o.BlockCacheBytes = DefaultBlockCacheBytes
	}
	if o.BlockCacheBytes < 0 {
		errs = append(errs, fmt.Errorf("%w: block cache bytes = %d: must be positive (or 0 for the default %d)", ErrInvalidStoreOptions, o.BlockCacheBytes, DefaultBlockCacheBytes))
	}
	if o.DedupeWindow == 0 {
		o.DedupeWindow = DefaultDedupeWindow
	}
	if o.DedupeWindow < 0 {
		errs = append(errs, fmt.Errorf("%w: dedupe window = %d: must be positive (or 0 for the default %d)", ErrInvalidStoreOptions, o.DedupeWindow, DefaultDedupeWindow))
	}
	if o.Policy == (Policy{}) {
		o.Policy = DefaultPolicy()
	}
	if !(o.Policy.Threshold > 0 && o.Policy.Threshold <= 1) {
		errs = append(errs, fmt.Errorf("%w: policy threshold = %v: must be in (0, 1]", ErrInvalidStoreOptions, o.Policy.Threshold))
	}
	if o.CacheLearners == 0 {
		o.CacheLearners = max(o.CacheRecords/4, 1024)
	}
	if o.CacheLearners < 0 {
		errs = append(errs, fmt.Errorf("%w: cache learners = %d: must be positive (or 0 for the default)", ErrInvalidStoreOptions, o.CacheLearners))
	}
	if o.MemTableBytes == 0 {
		o.MemTableBytes = defaultMemTableBytes(o.BlockCacheBytes)
	}
	if o.MemTableBytes < 0 {
		errs = append(errs, fmt.Errorf("%w: memtable bytes = %d: must be positive (or 0 for the default)", ErrInvalidStoreOptions, o.MemTableBytes))
	}
	return errors.Join(errs...)
}

// Store is the Pebble database of one attain instance: every partition's
// learner-skill records, answer histories, applied-id windows, consumed
// offset and outbox. Partition handles change it (one goroutine per
// partition); the read methods (Learner, History, ScanHistory, Outbox,
// Stats) see committed state only and are safe from any goroutine.
type Store struct {
	db  *pebble.DB
	opt StoreOptions
	log zerolog.Logger

	// closeMu is held shared by every operation that touches db and
	// exclusively by Close, so nothing uses a closed Pebble.
	closeMu sync.RWMutex
	closed  bool

	mu    sync.Mutex
	slots map[int32]*partSlot // per-partition commit lock and the live handle
	parts map[int32]struct{}  // partitions that have (or are committing) data

	cache *shardedLRU[*learnerVal] // learner record prefix → the learner's committed state

	outboxMu sync.Mutex // serialises DeleteOutbox so the depth stays exact
	depth    atomic.Int64
	records  atomic.Int64

	applied, duplicates, late, rederived, deadLetters, skipped, replayed atomic.Int64
	commits, commitFailures, checkpoints, pinnedHits                     atomic.Int64

	ckptInterval time.Duration // checkpointMinInterval; tests set 0
}

type partSlot struct {
	mu     sync.Mutex
	handle *Partition
	// The record log's checkpoints (store_log.go), under mu: gen counts
	// the checkpoints committed; bgRunning is set while a background one
	// runs; bgOwner and bgDone tell the handle that started one that its
	// logs up to bgDone are checkpointed.
	gen       uint64
	bgRunning bool
	bgOwner   *Partition
	bgDone    uint64
}

// OpenStore opens (or creates) the store in dir.
func OpenStore(dir string, opt StoreOptions) (*Store, error) {
	if err := opt.setDefaults(); err != nil {
		return nil, err
	}
	log := opt.Logger.With().Str("component", "store").Logger()
	cache := pebble.NewCache(opt.BlockCacheBytes)
	// Open takes its own reference; ours is dropped when OpenStore returns
	// so that closing the DB frees the cache.
	defer cache.Unref()
	po := &pebble.Options{
		Cache:              cache,
		Logger:             pebbleLogger{log: log},
		FormatMajorVersion: pebble.FormatNewest,
		MemTableSize:       uint64(opt.MemTableBytes),
		EventListener: &pebble.EventListener{
			BackgroundError: func(err error) { log.Error().Err(err).Msg("pebble background error") },
			WriteStallBegin: func(i pebble.WriteStallBeginInfo) { log.Warn().Str("reason", i.Reason).Msg("pebble write stall") },
			WriteStallEnd:   func() { log.Info().Msg("pebble write stall ended") },
		},
	}
	// No filter blocks: Pebble's bloom filters serve Get, and the hot path
	// reads learners with prefix iterators (the few Gets are of one key per
	// partition at start-up), so they were work at every flush and
	// compaction for nothing (BenchmarkApplyStreamLike: 170k → 190k
	// answers/s, one run side by side).
	db, err := pebble.Open(dir, po)
	if err != nil {
		return nil, fmt.Errorf("attain: opening store in %s: %w", dir, err)
	}
	s := &Store{
		db:    db,
		opt:   opt,
		log:   log,
		slots: make(map[int32]*partSlot),
		parts: make(map[int32]struct{}),
		cache: newShardedLRU[*learnerVal](opt.CacheRecords, opt.CacheLearners),

		ckptInterval: checkpointMinInterval,
	}
	if err := s.checkSchema(dir); err != nil {
		db.Close()
		return nil, err
	}
	if err := s.load(); err != nil {
		db.Close()
		return nil, fmt.Errorf("attain: opening store in %s: %w", dir, err)
	}
	log.Info().Str("dir", dir).Int("partitions", len(s.parts)).Int64("records", s.records.Load()).
		Int64("outbox_depth", s.depth.Load()).Msg("store opened")
	return s, nil
}

func (s *Store) checkSchema(dir string) error {
	k := metaKey("schema")
	v, closer, err := s.db.Get(k)
	if errors.Is(err, pebble.ErrNotFound) {
		it, err := s.db.NewIter(nil)
		if err != nil {
			return fmt.Errorf("attain: opening store in %s: %w", dir, err)
		}
		nonEmpty := it.First()
		if err := errors.Join(it.Error(), it.Close()); err != nil {
			return fmt.Errorf("attain: opening store in %s: %w", dir, err)
		}
		if nonEmpty {
			return fmt.Errorf("%w: %s holds a Pebble database without an attain schema key; use an empty data directory", ErrStoreSchema, dir)
		}
		val := binary.AppendUvarint([]byte{metaV1}, storeSchema)
		if err := s.db.Set(k, val, pebble.Sync); err != nil {
			return fmt.Errorf("attain: initialising store in %s: %w", dir, err)
		}
		return nil
	}
	if err != nil {
		return fmt.Errorf("attain: reading store schema in %s: %w", dir, err)
	}
	defer closer.Close()
	if len(v) < 2 || v[0] != metaV1 {
		return fmt.Errorf("%w: %s: schema value %x is not readable by this build (upgrade attain)", ErrStoreSchema, dir, v)
	}
	got, n := binary.Uvarint(v[1:])
	if n <= 0 {
		return fmt.Errorf("%w: %s: schema value %x is malformed", ErrStoreSchema, dir, v)
	}
	if got == 1 || got == 2 {
		// Schema 3 reads both as they are: 2 added history tails in record
		// values (schema 1 has none), 3 the record log (neither has logs).
		val := binary.AppendUvarint([]byte{metaV1}, storeSchema)
		if err := s.db.Set(k, val, pebble.Sync); err != nil {
			return fmt.Errorf("attain: upgrading the store schema in %s: %w", dir, err)
		}
		s.log.Info().Str("dir", dir).Uint64("from", got).Int("to", storeSchema).Msg("store schema taken over (history tails in record values since 2, the record log since 3)")
		return nil
	}
	if got != storeSchema {
		return fmt.Errorf("%w: %s has store schema %d, this build reads schema %d (upgrade attain, or use another data directory)", ErrStoreSchema, dir, got, storeSchema)
	}
	return nil
}

// load finds the partitions that have data, their record counts and the
// outbox depth.
func (s *Store) load() error {
	it, err := s.db.NewIter(&pebble.IterOptions{UpperBound: familyPrefix(metaPartition, 0)})
	if err != nil {
		return err
	}
	defer it.Close()
	for valid := it.First(); valid; {
		p, _, ok := keyPartition(it.Key())
		if !ok {
			return fmt.Errorf("%w: key %q is too short", ErrCorruptStore, it.Key())
		}
		s.parts[int32(p)] = struct{}{}
		if it.SeekGE(familyPrefix(p, famState)) && bytes.Equal(it.Key(), familyPrefix(p, famState)) {
			v, err := it.ValueAndErr()
			if err != nil {
				return err
			}
			st, err := decodePartState(v)
			if err != nil {
				return fmt.Errorf("partition %d: %w", p, err)
			}
			s.records.Add(int64(st.records))
		}
		end := familyEnd(p, famOutbox)
		for ok := it.SeekGE(familyPrefix(p, famOutbox)); ok && bytes.Compare(it.Key(), end) < 0; ok = it.Next() {
			s.depth.Add(1)
		}
		if p+1 == metaPartition {
			break
		}
		valid = it.SeekGE(familyPrefix(p+1, 0))
	}
	return it.Error()
}

// Close drops every partition's uncommitted staging, flushes, syncs and
// closes the database. Handles still held return ErrStoreClosed afterwards.
func (s *Store) Close() error {
	s.closeMu.Lock()
	defer s.closeMu.Unlock()
	if s.closed {
		return nil
	}
	s.closed = true
	s.mu.Lock()
	for _, sl := range s.slots {
		sl.mu.Lock()
		if sl.handle != nil {
			sl.handle.fenced.Store(true)
			sl.handle = nil
		}
		sl.mu.Unlock()
	}
	s.mu.Unlock()
	ferr := s.db.Flush()
	if ferr != nil {
		ferr = fmt.Errorf("attain: flushing store: %w", ferr)
	}
	cerr := s.db.Close()
	if cerr != nil {
		cerr = fmt.Errorf("attain: closing store: %w", cerr)
	}
	s.log.Info().Msg("store closed")
	return errors.Join(ferr, cerr)
}

// Partitions returns the partitions that have any data, in order.
func (s *Store) Partitions() ([]int32, error) {
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if s.closed {
		return nil, ErrStoreClosed
	}
	return s.partList(), nil
}

func (s *Store) partList() []int32 {
	s.mu.Lock()
	ps := make([]int32, 0, len(s.parts))
	for p := range s.parts {
		ps = append(ps, p)
	}
	s.mu.Unlock()
	slices.Sort(ps)
	return ps
}

// Learner returns every skill record of learner from committed state,
// across all partitions; ok is false when the learner has none. Should a
// learner-skill appear in two partitions (the topic was repartitioned), the
// record with the later update wins.
func (s *Store) Learner(learner string) (map[string]Record, bool, error) {
	if learner == "" || strings.IndexByte(learner, 0) >= 0 {
		return nil, false, nil
	}
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if s.closed {
		return nil, false, ErrStoreClosed
	}
	parts := s.partList()
	if err := s.settle(parts); err != nil {
		return nil, false, fmt.Errorf("attain: reading learner %q: %w", learner, err)
	}
	it, err := s.db.NewIter(nil)
	if err != nil {
		return nil, false, fmt.Errorf("attain: reading learner %q: %w", learner, err)
	}
	defer it.Close()
	var out map[string]Record
	var prefix []byte
	for _, p := range parts {
		prefix = learnerRecordPrefix(prefix[:0], p, learner)
		for ok := it.SeekGE(prefix); ok && bytes.HasPrefix(it.Key(), prefix); ok = it.Next() {
			v, err := it.ValueAndErr()
			if err != nil {
				return nil, false, fmt.Errorf("attain: reading learner %q: %w", learner, err)
			}
			r, err := decodeRecord(v)
			if err != nil {
				return nil, false, fmt.Errorf("attain: reading learner %q, key %q: %w", learner, it.Key(), err)
			}
			skill := string(it.Key()[len(prefix):])
			if out == nil {
				out = make(map[string]Record)
			}
			if old, dup := out[skill]; !dup || r.Updated > old.Updated {
				out[skill] = r
			}
		}
		if err := it.Error(); err != nil {
			return nil, false, fmt.Errorf("attain: reading learner %q: %w", learner, err)
		}
	}
	return out, out != nil, nil
}

// StoreStats are counters for metrics. Counters count since OpenStore;
// Records and OutboxDepth are gauges of committed state.
type StoreStats struct {
	// CacheHits and CacheMisses count the answers whose learner was found
	// in, or missing from, the cache (answers of a learner already staged
	// in the batch in hand are neither; a learner pinned in memory since
	// the last checkpoint, see store_log.go, is a hit).
	CacheHits, CacheMisses, Records int64
	CachedRecords                   int64 // records held by the cache (≤ CacheRecords)
	CachedLearners                  int64 // learners held by the cache (≤ CacheLearners)
	// The counts from Applied to Replayed include a partition handle's
	// calls once it commits or is released.
	Applied                 int64 // answers staged (not duplicates, not replays)
	Duplicates              int64
	Late                    int64
	Rederived               int64 // records re-derived under a newer parameter set
	DeadLetters             int64 // dead letters staged
	Skipped                 int64 // offsets staged by Skip
	Replayed                int64 // Apply/DeadLetter/Skip calls at or below the stored offset (no-ops)
	Commits, CommitFailures int64
	Checkpoints             int64 // record-log checkpoints (store_log.go)
	OutboxDepth             int64
	Partitions              int
	BlockCacheBytes         int64 // Pebble block cache in use
	BlockCacheHits          int64
	BlockCacheMisses        int64
	MemTableBytes           uint64
	DiskBytes               uint64 // Pebble's files on disk
	// Bytes Pebble wrote since the store opened: to its write-ahead log,
	// by flushes of memtables and by compactions (their sum over the
	// bytes applied is Pebble's write amplification).
	WALBytes, FlushedBytes, CompactedBytes uint64
}

// Stats returns the current counters (Pebble's figures are zero after Close).
func (s *Store) Stats() StoreStats {
	learners, records := s.cache.size()
	hits, misses := s.cache.counts()
	st := StoreStats{
		CacheHits:      hits + s.pinnedHits.Load(),
		CacheMisses:    misses,
		Records:        s.records.Load(),
		CachedRecords:  int64(records),
		CachedLearners: int64(learners),
		Applied:        s.applied.Load(),
		Duplicates:     s.duplicates.Load(),
		Late:           s.late.Load(),
		Rederived:      s.rederived.Load(),
		DeadLetters:    s.deadLetters.Load(),
		Skipped:        s.skipped.Load(),
		Replayed:       s.replayed.Load(),
		Commits:        s.commits.Load(),
		CommitFailures: s.commitFailures.Load(),
		Checkpoints:    s.checkpoints.Load(),
		OutboxDepth:    s.depth.Load(),
	}
	s.mu.Lock()
	st.Partitions = len(s.parts)
	s.mu.Unlock()
	s.closeMu.RLock()
	defer s.closeMu.RUnlock()
	if !s.closed {
		m := s.db.Metrics()
		st.BlockCacheBytes = m.BlockCache.Size
		st.BlockCacheHits = m.BlockCache.Hits
		st.BlockCacheMisses = m.BlockCache.Misses
		st.MemTableBytes = m.MemTable.Size
		st.DiskBytes = m.DiskSpaceUsage()
		st.WALBytes = m.WAL.BytesWritten
		for _, l := range m.Levels {
			st.FlushedBytes += l.TableBytesFlushed
			st.CompactedBytes += l.TableBytesCompacted
		}
	}
	return st
}

// pebbleLogger sends Pebble's messages to zerolog instead of stderr.
type pebbleLogger struct{ log zerolog.Logger }

func (l pebbleLogger) Infof(format string, args ...any) {
	l.log.Debug().Msgf("pebble: "+format, args...)
}
func (l pebbleLogger) Errorf(format string, args ...any) {
	l.log.Error().Msgf("pebble: "+format, args...)
}

// Fatalf is Pebble's report of a broken invariant; Pebble expects it not to
// return. It logs at fatal level and panics (instead of exiting the process
// as Pebble's default logger does) so that deferred clean-up still runs.
func (l pebbleLogger) Fatalf(format string, args ...any) {
	msg := fmt.Sprintf("pebble: "+format, args...)
	l.log.WithLevel(zerolog.FatalLevel).Msg(msg)
	panic("attain: " + msg)
}

// defaultMemTableBytes is the memtable size for a block cache of
// cacheBytes: a third of it, at most 64 MiB and at least 1 MiB. A third:
// Pebble stalls writes once its queued memtables reach twice the memtable
// size (MemTableStopWritesThreshold's default, pebble/v2 options.go) and
// keeps one freed memtable for reuse, each reserved in the cache, so the
// memtables stay within the cache. Larger memtables let most record logs be written and
// deleted inside one memtable, never flushed (store_log.go).
// BenchmarkThroughput (stream), five runs each side by side: 16 MiB
// memtables in a 64 MiB cache (the earlier default) gave 428k-478k
// answers/s at 3.8-4.4 us CPU per answer; 64 MiB in 192 MiB 523k-567k at
// 3.3-3.6 us; 48 MiB in 144 MiB was between them in a noisier set of
// runs. BenchmarkMemory1MRecords: peak RSS 328 MiB at 64 MiB of cache,
// 438 MiB at 144, 498 MiB at 192 (too close to the 512 MiB target).
func defaultMemTableBytes(cacheBytes int64) int {
	return int(min(max(cacheBytes/3, 1<<20), 64<<20))
}
