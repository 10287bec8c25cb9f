package stream

import (
	"bufio"
	"fmt"
	"io"
	"math"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"

	"github.com/attain-dev/attain/state"
)

// Metrics counts what the processor does. The exported counters are plain
// atomics that the processor adds to directly; the rest is set through
// methods. Every method is safe for concurrent use, and the zero value is
// not ready to use: call NewMetrics.
type Metrics struct {
	// Consumed counts input messages read from the answers topic.
	Consumed atomic.Int64
	// Applied counts answers applied to state (duplicates excluded).
	Applied atomic.Int64
	// Duplicates counts answers skipped because their id was already
	// applied for the learner.
	Duplicates atomic.Int64
	// Late counts answers whose `at` is earlier than the learner's
	// previous answer (applied in arrival order all the same).
	Late atomic.Int64
	// DeadLettered counts input messages staged for the dead-letter topic.
	DeadLettered atomic.Int64
	// Rederived counts learner-skill records re-derived from their history
	// under a newer parameter set.
	Rederived atomic.Int64

	// PublishedReached, PublishedStuck and PublishedDeadLetters count
	// outbox entries the broker acknowledged, by kind.
	PublishedReached, PublishedStuck, PublishedDeadLetters atomic.Int64

	// Commits counts state batches committed to the store.
	Commits atomic.Int64
	// MaxBatchAge is the longest time, in nanoseconds, from a batch's
	// first message to the end of its commit (what batch.interval bounds,
	// plus the commit itself).
	MaxBatchAge atomic.Int64
	// Committed counts input messages whose batch has been committed to
	// the store (applied, duplicate, dead-lettered or already applied
	// before: every message that will not be read again after a crash).
	Committed atomic.Int64
	// SkippedOffsets counts offsets never read because the log no longer
	// held them (below the log start at resumption: retention deleted
	// them first).
	SkippedOffsets atomic.Int64

	// ParamsVersion is the version of the parameter set in force (a gauge);
	// ParamsSwaps counts the sets swapped in since start.
	ParamsVersion, ParamsSwaps atomic.Int64

	commit histogram

	mu struct {
		sync.Mutex
		joined   bool            // at least one generation assigned
		assigned []int32         // the current generation's partitions, sorted
		resumed  map[int32]bool  // assigned partitions that are consuming
		lag      map[int32]int64 // per assigned partition
	}
}

// commitBuckets are the upper bounds, in seconds, of the commit-latency
// histogram: the 1-2.5-5 progression of the Prometheus client's default
// buckets (common practice), moved down to start at 0.5 ms because a
// Pebble batch commit without sync usually takes well under a millisecond.
var commitBuckets = []float64{0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5}

// histogram is a fixed-bucket histogram. A mutex (not per-bucket atomics)
// keeps count, sum and buckets consistent with each other in one scrape;
// it is taken once per commit, which is rare next to the per-answer work.
type histogram struct {
	mu     sync.Mutex
	counts []uint64 // len(bounds)+1; the last is the +Inf overflow
	sum    float64
}

// NewMetrics returns zeroed metrics, not ready until a generation is
// assigned and all its partitions have resumed.
func NewMetrics() *Metrics {
	m := &Metrics{}
	m.commit.counts = make([]uint64, len(commitBuckets)+1)
	m.mu.resumed = map[int32]bool{}
	m.mu.lag = map[int32]int64{}
	return m
}

// ObserveCommit records how long one state batch commit took.
func (m *Metrics) ObserveCommit(d time.Duration) {
	s := d.Seconds()
	if s < 0 || math.IsNaN(s) {
		s = 0
	}
	i, _ := slices.BinarySearch(commitBuckets, s) // first bound ≥ s; len = +Inf
	m.commit.mu.Lock()
	m.commit.counts[i]++
	m.commit.sum += s
	m.commit.mu.Unlock()
}

// ObserveBatchAge records the age of a batch when its commit ended.
func (m *Metrics) ObserveBatchAge(d time.Duration) {
	for {
		cur := m.MaxBatchAge.Load()
		if int64(d) <= cur || m.MaxBatchAge.CompareAndSwap(cur, int64(d)) {
			return
		}
	}
}

// SetLag records how many messages partition p is behind the end of its
// log. It is ignored for a partition not in the current assignment, so a
// goroutine of an ended generation cannot leave a stale gauge behind.
func (m *Metrics) SetLag(p int32, lag int64) {
	m.mu.Lock()
	defer m.mu.Unlock()
	if _, ok := slices.BinarySearch(m.mu.assigned, p); ok {
		m.mu.lag[p] = lag
	}
}

// SetAssigned records a new generation's partitions. No partition counts
// as resumed until SetResumed says so, and the lag of partitions no longer
// assigned is dropped.
func (m *Metrics) SetAssigned(ps []int32) {
	a := slices.Clone(ps)
	slices.Sort(a)
	a = slices.Compact(a)
	m.mu.Lock()
	defer m.mu.Unlock()
	m.mu.joined = true
	m.mu.assigned = a
	clear(m.mu.resumed)
	for p := range m.mu.lag {
		if _, ok := slices.BinarySearch(a, p); !ok {
			delete(m.mu.lag, p)
		}
	}
}

// SetResumed records that partition p has seeked to its stored offset and
// is consuming. It is ignored for a partition not in the current
// assignment.
func (m *Metrics) SetResumed(p int32) {
	m.mu.Lock()
	defer m.mu.Unlock()
	if _, ok := slices.BinarySearch(m.mu.assigned, p); ok {
		m.mu.resumed[p] = true
	}
}

// Ready reports whether at least one generation has been joined and every
// partition assigned in the current one has resumed. A member assigned no
// partitions (more members than partitions) is ready: it is healthy and
// idle.
func (m *Metrics) Ready() bool {
	ok, _ := m.readiness()
	return ok
}

// readiness is Ready with the reason when not ready, for /readyz.
func (m *Metrics) readiness() (bool, string) {
	m.mu.Lock()
	defer m.mu.Unlock()
	if !m.mu.joined {
		return false, "not yet assigned partitions by the consumer group"
	}
	var waiting []string
	for _, p := range m.mu.assigned {
		if !m.mu.resumed[p] {
			waiting = append(waiting, strconv.Itoa(int(p)))
		}
	}
	if len(waiting) > 0 {
		return false, fmt.Sprintf("%d of %d assigned partitions have not resumed from their stored offsets yet: %s",
			len(waiting), len(m.mu.assigned), strings.Join(waiting, ", "))
	}
	return true, ""
}

// WritePrometheus writes every metric in the Prometheus text exposition
// format, version 0.0.4, with names prefixed attain_. outboxDepth is the
// store's count of committed, unpublished outbox entries, sampled by the
// caller at scrape time. Write errors are the caller's connection failing
// and are not reported.
func (m *Metrics) WritePrometheus(w io.Writer, outboxDepth int64) {
	bw := bufio.NewWriter(w)
	defer bw.Flush()
	e := expo{w: bw}

	e.counter("attain_messages_consumed_total", "Input messages read from the answers topic.", m.Consumed.Load())
	e.counter("attain_answers_applied_total", "Answers applied to learner-skill state.", m.Applied.Load())
	e.counter("attain_answers_duplicate_total", "Answers skipped because their id was already applied for the learner.", m.Duplicates.Load())
	e.counter("attain_answers_late_total", "Answers timed earlier than the learner's previous answer (applied in arrival order).", m.Late.Load())
	e.counter("attain_messages_deadlettered_total", "Input messages rejected to the dead-letter topic.", m.DeadLettered.Load())
	e.counter("attain_records_rederived_total", "Learner-skill records re-derived from history under a newer parameter set.", m.Rederived.Load())

	e.header("attain_mastery_events_published_total", "counter", "Mastery events acknowledged by the broker, by kind.")
	e.sample("attain_mastery_events_published_total", `kind="reached"`, float64(m.PublishedReached.Load()))
	e.sample("attain_mastery_events_published_total", `kind="stuck"`, float64(m.PublishedStuck.Load()))
	e.counter("attain_deadletters_published_total", "Dead letters acknowledged by the broker.", m.PublishedDeadLetters.Load())

	e.counter("attain_commits_total", "State batches committed to the store.", m.Commits.Load())
	e.gauge("attain_batch_age_max_seconds", "Longest time from a batch's first message to the end of its commit, since start.", float64(m.MaxBatchAge.Load())/1e9)
	e.counter("attain_messages_committed_total", "Input messages whose batch has been committed to the store.", m.Committed.Load())
	e.counter("attain_offsets_skipped_total", "Input offsets never read because the log no longer held them (retention deleted them first).", m.SkippedOffsets.Load())
	m.writeCommitHistogram(&e)
	e.gauge("attain_outbox_depth", "Committed outbox entries not yet acknowledged by the broker.", float64(outboxDepth))

	e.gauge("attain_params_version", "Version of the parameter set in force.", float64(m.ParamsVersion.Load()))
	e.counter("attain_params_swaps_total", "Parameter sets swapped in since start.", m.ParamsSwaps.Load())

	m.mu.Lock()
	assigned := len(m.mu.assigned)
	resumed := 0
	for _, p := range m.mu.assigned {
		if m.mu.resumed[p] {
			resumed++
		}
	}
	ready := 0.0
	if m.mu.joined && resumed == assigned {
		ready = 1
	}
	lagParts := make([]int32, 0, len(m.mu.lag))
	for p := range m.mu.lag {
		lagParts = append(lagParts, p)
	}
	slices.Sort(lagParts)
	lags := make([]int64, len(lagParts))
	for i, p := range lagParts {
		lags[i] = m.mu.lag[p]
	}
	m.mu.Unlock()

	e.gauge("attain_partitions_assigned", "Partitions assigned to this instance in the current generation.", float64(assigned))
	e.gauge("attain_partitions_resumed", "Assigned partitions consuming from their stored offsets.", float64(resumed))
	e.gauge("attain_ready", "1 when every assigned partition has resumed, else 0.", ready)
	e.header("attain_consumer_lag", "gauge", "Messages between a partition's consumed offset and the end of its log.")
	for i, p := range lagParts {
		e.sample("attain_consumer_lag", `partition="`+strconv.Itoa(int(p))+`"`, float64(lags[i]))
	}
}

// WriteStoreMetrics writes the store's figures (cache, records, Pebble's
// block cache, memtables and disk use) in the same format, names prefixed
// attain_store_. Write errors are not reported (see WritePrometheus).
func WriteStoreMetrics(w io.Writer, st state.StoreStats) {
	bw := bufio.NewWriter(w)
	defer bw.Flush()
	e := expo{w: bw}
	e.counter("attain_store_cache_hits_total", "Answers whose learner was found in the store's cache.", st.CacheHits)
	e.counter("attain_store_cache_misses_total", "Answers whose learner was read from Pebble (not in the store's cache).", st.CacheMisses)
	e.gauge("attain_store_cached_records", "Learner-skill records held by the store's cache.", float64(st.CachedRecords))
	e.gauge("attain_store_cached_learners", "Learners held by the store's cache.", float64(st.CachedLearners))
	e.gauge("attain_store_records", "Learner-skill records in the store.", float64(st.Records))
	e.gauge("attain_store_partitions", "Partitions with data in the store.", float64(st.Partitions))
	e.counter("attain_store_commit_failures_total", "Store batches that failed to commit.", st.CommitFailures)
	e.gauge("attain_store_block_cache_bytes", "Bytes in Pebble's block cache.", float64(st.BlockCacheBytes))
	e.counter("attain_store_block_cache_hits_total", "Pebble block cache hits.", st.BlockCacheHits)
	e.counter("attain_store_block_cache_misses_total", "Pebble block cache misses.", st.BlockCacheMisses)
	e.gauge("attain_store_memtable_bytes", "Bytes in Pebble's memtables.", float64(st.MemTableBytes))
	e.gauge("attain_store_disk_bytes", "Bytes of Pebble's files on disk.", float64(st.DiskBytes))
}

func (m *Metrics) writeCommitHistogram(e *expo) {
	m.commit.mu.Lock()
	counts := slices.Clone(m.commit.counts)
	sum := m.commit.sum
	m.commit.mu.Unlock()

	const name = "attain_commit_duration_seconds"
	e.header(name, "histogram", "Time to commit one state batch to the store.")
	var cum uint64
	for i, b := range commitBuckets {
		cum += counts[i]
		e.sample(name+"_bucket", `le="`+formatFloat(b)+`"`, float64(cum))
	}
	cum += counts[len(commitBuckets)]
	e.sample(name+"_bucket", `le="+Inf"`, float64(cum))
	e.sample(name+"_sum", "", sum)
	e.sample(name+"_count", "", float64(cum))
}

// expo writes text-format lines.
type expo struct{ w *bufio.Writer }

func (e expo) header(name, typ, help string) {
	e.w.WriteString("# HELP " + name + " " + escapeHelp(help) + "\n")
	e.w.WriteString("# TYPE " + name + " " + typ + "\n")
}

func (e expo) sample(name, labels string, v float64) {
	e.w.WriteString(name)
	if labels != "" {
		e.w.WriteString("{" + labels + "}")
	}
	e.w.WriteString(" " + formatFloat(v) + "\n")
}

func (e expo) counter(name, help string, v int64) {
	e.header(name, "counter", help)
	e.sample(name, "", float64(v))
}

func (e expo) gauge(name, help string, v float64) {
	e.header(name, "gauge", help)
	e.sample(name, "", v)
}

// formatFloat spells a value as the text format expects: Go float syntax,
// with +Inf, -Inf and NaN spelt so.
func formatFloat(v float64) string {
	switch {
	case math.IsInf(v, 1):
		return "+Inf"
	case math.IsInf(v, -1):
		return "-Inf"
	case math.IsNaN(v):
		return "NaN"
	}
	return strconv.FormatFloat(v, 'g', -1, 64)
}

// escapeHelp escapes a HELP docstring: backslash and line feed, per the
// text format.
func escapeHelp(s string) string {
	return strings.NewReplacer(`\`, `\\`, "\n", `\n`).Replace(s)
}
