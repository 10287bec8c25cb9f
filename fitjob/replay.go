package fitjob

import (
	"bytes"
	"container/heap"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"runtime"
	"slices"
	"strconv"
	"sync"
	"sync/atomic"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/state"
)

// Replay runs answer history through the model the way the stream
// processor does — per learner in order, duplicate ids skipped within the
// same bounded window, every answer through state.Record.Apply — without
// touching any store, consumer group or offset. It scores every prediction
// made before an answer was seen, counts who reached mastery and who was
// flagged stuck under one or more policies (what-if), and can replay
// several parameter sets side by side on the same history.
//
// State is kept in memory, not in a scratch Pebble store, so there is
// nothing to remove afterwards and nothing but the output folder is
// written. Memory, measured on 10 million answers in the README's figures:
//   - per learner the applied-id window (DedupeWindow hashes of 8 bytes)
//     and its id; per learner-skill one record per parameter set and
//     policy (about 64 bytes each);
//   - the scores keep every prediction (9 bytes per answer and skill, plus
//     9 per answer overall, per parameter set), because AUC needs them all;
//   - answers held for sorting — a file out of `at` order, standard input
//     in `at` order, and every Source, which is merged deterministically
//     across learners — about 80 bytes each.
//
// A file already in `at` order per learner (what the simulator and an
// export sorted by time give) streams: one reader, Workers decoding
// goroutines and the applier, with a few MiB of buffers.

// Errors of replay, checked with errors.Is.
var (
	// ErrReplayOptions rejects bad ReplayOptions.
	ErrReplayOptions = errors.New("attain: invalid replay options")
	// errRestart ends a pass over a file in `at` order that found a
	// learner's answers out of order; the file is then read again and
	// sorted in memory.
	errRestart = errors.New("attain: replay must restart sorted")
)

// Order is the order in which a learner's answers are applied.
type Order string

const (
	// OrderAt applies each learner's answers in `at` order, ties in source
	// order: the order of a file (ARCHITECTURE.md, Ordering). A file that is
	// already in that order per learner is streamed; one that is not is
	// read again and sorted in memory (about 80 bytes per answer).
	OrderAt Order = "at"
	// OrderArrival applies answers in source order, as the stream processor
	// does with a topic; an answer earlier than the learner's previous one
	// is applied where it arrives and counted as late.
	OrderArrival Order = "arrival"
)

// Defaults of ReplayOptions.
const (
	// DefaultRejectsListed is how many rejected records a result lists
	// (all are counted; our choice).
	DefaultRejectsListed = 100
	// DefaultCurveOpportunities is how many opportunities a learning curve
	// follows (our choice; later answers are scored but not on the curve).
	DefaultCurveOpportunities = 100
)

// NamedParams is a parameter set and the name it is reported under (its
// file's path, or the topic it came from).
type NamedParams struct {
	Name string
	File *state.ParamFile
}

// ReplayOptions configure a Replay. Zero fields take the defaults shown.
type ReplayOptions struct {
	// Params are the parameter sets to replay (at least one). The first is
	// the one predictions.csv and events.csv are written under; the others
	// are compared with it.
	Params []NamedParams
	// Policies are the thresholds to count outcomes under (what-if); the
	// first is the one events.csv follows. Default: state.DefaultPolicy().
	Policies []state.Policy
	// DedupeWindow is how many applied answer ids are remembered per
	// learner (default state.DefaultDedupeWindow, as the store).
	DedupeWindow int
	// Order of a file's answers (default OrderAt). Sources are always read
	// in arrival order.
	Order Order
	// OutDir, when set, receives predictions.csv and events.csv, each
	// written to a temporary file and renamed into place at the end.
	OutDir string
	// Decoder decodes the lines of a file.
	Decoder state.NativeDecoder
	// RejectsListed bounds the rejected records listed (default
	// DefaultRejectsListed; all are counted).
	RejectsListed int
	// CurveOpportunities bounds the learning curves (default
	// DefaultCurveOpportunities).
	CurveOpportunities int
	// Workers decode a file's lines in parallel (default GOMAXPROCS).
	Workers int
	Logger  zerolog.Logger
}

func (o *ReplayOptions) setDefaults() error {
	var errs []error
	if len(o.Params) == 0 {
		errs = append(errs, fmt.Errorf("%w: no parameter set given", ErrReplayOptions))
	}
	for i, np := range o.Params {
		if np.File == nil {
			errs = append(errs, fmt.Errorf("%w: parameter set %d (%s) is nil", ErrReplayOptions, i+1, np.Name))
		} else if err := np.File.Validate(); err != nil {
			errs = append(errs, fmt.Errorf("%w: parameter set %s: %v", ErrReplayOptions, np.Name, err))
		}
	}
	if len(o.Policies) == 0 {
		o.Policies = []state.Policy{state.DefaultPolicy()}
	}
	for _, p := range o.Policies {
		if !(p.Threshold > 0 && p.Threshold <= 1) {
			errs = append(errs, fmt.Errorf("%w: threshold %v: must be in (0, 1]", ErrReplayOptions, p.Threshold))
		}
	}
	if o.DedupeWindow == 0 {
		o.DedupeWindow = state.DefaultDedupeWindow
	}
	if o.DedupeWindow < 0 {
		errs = append(errs, fmt.Errorf("%w: dedupe window %d: must be positive", ErrReplayOptions, o.DedupeWindow))
	}
	switch o.Order {
	case "":
		o.Order = OrderAt
	case OrderAt, OrderArrival:
	default:
		errs = append(errs, fmt.Errorf("%w: order %q: must be %q or %q", ErrReplayOptions, o.Order, OrderAt, OrderArrival))
	}
	if o.RejectsListed == 0 {
		o.RejectsListed = DefaultRejectsListed
	}
	if o.CurveOpportunities <= 0 {
		o.CurveOpportunities = DefaultCurveOpportunities
	}
	if o.Workers <= 0 {
		o.Workers = runtime.GOMAXPROCS(0)
	}
	return errors.Join(errs...)
}

// RejectedRecord is one input record replay could not use, and where it
// was: a file's line, or a topic record's partition and offset, or (an
// answer that decoded but cannot be stored, from a source that does not say
// where) its id.
type RejectedRecord struct {
	Line      int    `json:"line,omitempty"` // 1-based line of a file
	Partition int32  `json:"partition"`      // of a topic record
	Offset    int64  `json:"offset"`         // of a topic record; -1 when not a topic record
	AnswerID  string `json:"answer_id,omitempty"`
	Field     string `json:"field,omitempty"` // "" = the record as a whole
	Reason    string `json:"reason"`
}

// MarshalJSON writes only the fields that say where the record was.
func (r RejectedRecord) MarshalJSON() ([]byte, error) {
	type where struct {
		Line      int    `json:"line,omitempty"`
		Partition *int32 `json:"partition,omitempty"`
		Offset    *int64 `json:"offset,omitempty"`
		AnswerID  string `json:"answer_id,omitempty"`
		Field     string `json:"field,omitempty"`
		Reason    string `json:"reason"`
	}
	w := where{Line: r.Line, AnswerID: r.AnswerID, Field: r.Field, Reason: r.Reason}
	if r.Line == 0 && r.Offset >= 0 {
		w.Partition, w.Offset = &r.Partition, &r.Offset
	}
	return json.Marshal(w)
}

// ReplayProgress is a snapshot of a running replay, for progress displays.
type ReplayProgress struct {
	Bytes      int64 // input bytes consumed (files)
	TotalBytes int64 // size of the input (0 when unknown)
	Records    int64 // input records consumed (lines or messages)
	Answers    int64 // answers applied
	Sorting    bool  // the file was out of order and is being replayed sorted
}

// Replay is one configured replay; run it once with RunFile or RunSource.
// Progress may be called from any goroutine meanwhile.
type Replay struct {
	opt ReplayOptions
	log zerolog.Logger

	bytes, records, answers, total atomic.Int64
	sorting                        atomic.Bool

	cur *replayer // the pass in progress (RunSource's Reject writes to it)
}

// NewReplay checks opt and returns a replay.
func NewReplay(opt ReplayOptions) (*Replay, error) {
	if err := opt.setDefaults(); err != nil {
		return nil, err
	}
	return &Replay{opt: opt, log: opt.Logger.With().Str("component", "replay").Logger()}, nil
}

// Progress returns how far the replay has got.
func (r *Replay) Progress() ReplayProgress {
	return ReplayProgress{
		Bytes: r.bytes.Load(), TotalBytes: r.total.Load(),
		Records: r.records.Load(), Answers: r.answers.Load(), Sorting: r.sorting.Load(),
	}
}

// RunFile replays a JSON-lines file of native v1 answer events ("-" is
// standard input). Lines that do not decode are counted, listed (the first
// RejectsListed) and skipped. In OrderAt, a file found out of order for some
// learner is read a second time and sorted in memory; standard input, which
// cannot be read twice, is always sorted in memory.
func (r *Replay) RunFile(ctx context.Context, path string) (*ReplayResult, error) {
	out, err := r.openOutputs()
	if err != nil {
		return nil, err
	}
	defer out.abort()
	sorted := r.opt.Order == OrderAt && path == "-"
	for {
		rp := newReplayer(r, out, path, sorted)
		r.cur = rp
		err := r.filePass(ctx, path, rp)
		if errors.Is(err, errRestart) && !sorted {
			r.log.Info().Str("file", path).Msg("answers are not in `at` order for every learner; reading the file again to sort it in memory")
			if err := out.reset(); err != nil {
				return nil, err
			}
			r.bytes.Store(0)
			r.records.Store(0)
			r.answers.Store(0)
			r.sorting.Store(true)
			sorted = true
			continue
		}
		if err != nil {
			return nil, err
		}
		if sorted {
			if err := rp.drainStash(ctx); err != nil {
				return nil, err
			}
		}
		res, err := rp.finish()
		if err != nil {
			return nil, err
		}
		if err := out.commit(); err != nil {
			return nil, err
		}
		return res, nil
	}
}

// RunSource replays every answer src yields, each learner's in the order
// the source yields them (arrival order: a topic from its start). The
// answers are held in memory (about 80 bytes each) and merged across
// learners deterministically, so that the outputs do not depend on how the
// source interleaved its partitions. Records the source rejects are passed
// to Reject by the source's own reject hook.
func (r *Replay) RunSource(ctx context.Context, src Source) (*ReplayResult, error) {
	out, err := r.openOutputs()
	if err != nil {
		return nil, err
	}
	defer out.abort()
	// Stashed, then merged (mergeOrder): the outputs must not depend on how
	// the source interleaved its partitions.
	rp := newReplayer(r, out, src.Name(), true)
	rp.order = OrderArrival
	r.cur = rp
	var d replayAnswer
	err = src.Answers(ctx, func(a state.Answer) error {
		r.records.Add(1)
		rp.records++
		d.a = a
		if !rp.prepare(&d) {
			return nil
		}
		if rp.records%4096 == 0 {
			r.answers.Store(rp.answers)
		}
		return rp.apply(&d, rp.prefix[:0])
	})
	if err != nil {
		return nil, fmt.Errorf("attain: replaying %s: %w", src.Name(), err)
	}
	if err := rp.drainStash(ctx); err != nil {
		return nil, err
	}
	res, err := rp.finish()
	if err != nil {
		return nil, err
	}
	if err := out.commit(); err != nil {
		return nil, err
	}
	return res, nil
}

// Reject records an input record the source could not decode; call it from
// a Source's reject hook during RunSource.
func (r *Replay) Reject(rec RejectedRecord) {
	if r.cur != nil {
		r.cur.records++
		r.records.Add(1)
		r.cur.reject(rec)
	}
}

// Learner returns a learner's final records after a run, one per skill,
// under the first parameter set and the first policy (the state a
// processor would hold); ok is false for a learner with no applied answer.
func (r *Replay) Learner(name string) (recs map[string]state.Record, ok bool) {
	rp := r.cur
	if rp == nil {
		return nil, false
	}
	li, ok := rp.learnerIdx[name]
	if !ok || len(rp.learners[li].skills) == 0 {
		return nil, false
	}
	recs = map[string]state.Record{}
	for _, ref := range rp.learners[li].skills {
		recs[rp.skills[ref.skill].name] = rp.tracks[int(ref.ls)*rp.nModels*rp.nPol].rec
	}
	return recs, true
}

// ---- outputs ----

// replayOutputs are predictions.csv and events.csv in OutDir, written through
// temporary files.
type replayOutputs struct {
	dir          string
	pred, events *os.File
	pw, ew       *rowWriter
}

func (r *Replay) openOutputs() (*replayOutputs, error) {
	o := &replayOutputs{dir: r.opt.OutDir}
	if o.dir == "" {
		return o, nil
	}
	if err := os.MkdirAll(o.dir, 0o755); err != nil {
		return nil, fmt.Errorf("attain: replay output folder: %w", err)
	}
	var err error
	if o.pred, err = os.CreateTemp(o.dir, ".predictions.csv.tmp*"); err != nil {
		return nil, fmt.Errorf("attain: replay output: %w", err)
	}
	if o.events, err = os.CreateTemp(o.dir, ".events.csv.tmp*"); err != nil {
		o.abort()
		return nil, fmt.Errorf("attain: replay output: %w", err)
	}
	o.pw, o.ew = newRowWriter(o.pred), newRowWriter(o.events)
	return o, o.writeHeaders()
}

// PredictionsHeader and EventsHeader are the first lines of predictions.csv
// and events.csv.
const (
	PredictionsHeader = "answer_id,learner,skills,at,p_correct,correct,mastery,params_version"
	EventsHeader      = "event_id,type,learner,skill,opportunities,mastery,params_version,answer_id,at"
)

func (o *replayOutputs) writeHeaders() error {
	if o.pw == nil {
		return nil
	}
	o.pw.buf = append(o.pw.buf, PredictionsHeader+"\n"...)
	o.ew.buf = append(o.ew.buf, EventsHeader+"\n"...)
	return nil
}

func (o *replayOutputs) reset() error {
	if o.pred == nil {
		return nil
	}
	for _, f := range []*os.File{o.pred, o.events} {
		if err := f.Truncate(0); err != nil {
			return fmt.Errorf("attain: replay output: %w", err)
		}
		if _, err := f.Seek(0, io.SeekStart); err != nil {
			return fmt.Errorf("attain: replay output: %w", err)
		}
	}
	o.pw.reset()
	o.ew.reset()
	return o.writeHeaders()
}

func (o *replayOutputs) commit() error {
	if o.pred == nil {
		return nil
	}
	var errs []error
	for _, x := range []struct {
		f    *os.File
		w    *rowWriter
		name string
	}{{o.pred, o.pw, "predictions.csv"}, {o.events, o.ew, "events.csv"}} {
		err := x.w.flush()
		if err == nil {
			err = x.f.Chmod(0o644) // outputs for people to read, not secrets
		}
		if err == nil {
			err = x.f.Sync()
		}
		if cerr := x.f.Close(); err == nil {
			err = cerr
		}
		if err == nil {
			err = os.Rename(x.f.Name(), filepath.Join(o.dir, x.name))
		}
		if err != nil {
			os.Remove(x.f.Name())
			errs = append(errs, fmt.Errorf("attain: writing %s: %w", x.name, err))
		}
	}
	o.pred, o.events = nil, nil
	return errors.Join(errs...)
}

func (o *replayOutputs) abort() {
	for _, f := range []*os.File{o.pred, o.events} {
		if f != nil {
			f.Close()
			os.Remove(f.Name())
		}
	}
	o.pred, o.events = nil, nil
}

// rowWriter is a byte buffer flushed to w when it grows past 1 MiB: rows
// are appended to buf directly, with no copy and no allocation per row.
type rowWriter struct {
	w   io.Writer
	buf []byte
	err error
}

const rowWriterSize = 1 << 20

func newRowWriter(w io.Writer) *rowWriter {
	return &rowWriter{w: w, buf: make([]byte, 0, rowWriterSize+4096)}
}

func (b *rowWriter) maybeFlush() error {
	if len(b.buf) >= rowWriterSize {
		return b.flush()
	}
	return b.err
}

func (b *rowWriter) flush() error {
	if b.err == nil && len(b.buf) > 0 {
		_, b.err = b.w.Write(b.buf)
	}
	b.buf = b.buf[:0]
	return b.err
}

func (b *rowWriter) reset() { b.buf, b.err = b.buf[:0], nil }

// ---- the replay state ----

// replayer is one pass: the learners' state, the scores and the counts.
type replayer struct {
	r       *Replay
	out     *replayOutputs
	source  string
	order   Order
	sorted  bool // stash everything, sort by `at`, then apply
	nModels int
	nPol    int
	window  int

	learnerIdx map[string]int32
	learners   []replayLearner
	skillIdx   map[string]int32
	skills     []replaySkill
	lskills    []learnerSkillRef // learner-skills, in order of first answer
	tracks     []replayTrack     // len(lskills) × nModels × nPol

	models []replayModel

	records, blank, answers, duplicates, late int64
	outOfOrder                                int64 // earlier than the learner's previous answer in source order
	rejected                                  int64
	rejectList                                []RejectedRecord
	rejectByField                             map[string]int64
	firstAt, lastAt                           int64
	hasAt                                     bool

	stash []stashedAnswer

	// scratch, reused for every answer
	prefix   []byte
	sk       []int32
	preds    []float64 // per model × skill
	combined float64   // the answer's prediction under the first set (Combine)
	lsOf     []int32
	events   []replayEvent
}

type replayLearner struct {
	name   string
	ids    []uint64 // applied-id window, oldest first (hashes, as the store)
	lastAt int64    // latest `at` applied
	hasAt  bool
	seenAt int64 // latest `at` of any valid answer in source order
	seen   bool
	skills []learnerSkillLink
}

type learnerSkillLink struct {
	skill int32
	ls    int32
}

type learnerSkillRef struct {
	learner int32
	skill   int32
}

type replaySkill struct {
	name     string
	params   []state.Params // per model
	versions []int64        // per model
	single   []int32        // []int32{index}, shared by one-skill answers
}

// replayTrack is one learner-skill under one parameter set and one policy.
type replayTrack struct {
	rec        state.Record
	firstReach uint32 // opportunity of the first reach (0: never)
	stuckAt    uint32 // opportunity of the stuck flag (0: never)
	reaches    uint32 // upward crossings
	next       uint8  // after the first reach: 1 waiting, 2 next was right, 3 next was wrong
}

// replayModel accumulates one parameter set's scores.
type replayModel struct {
	overall Scores
	skills  []Scores
	curves  [][]replayCurveAcc // per skill, per opportunity-1
}

type replayCurveAcc struct {
	n, wrong  int64
	predWrong float64
}

type replayEvent struct {
	kind  state.Kind
	skill int32
	rec   state.Record
}

// replayAnswer is one decoded line with what the worker prepared for it.
type replayAnswer struct {
	a      state.Answer
	hash   uint64 // idHash of a.ID
	at     int64
	pfx    [2]int32 // the row's first columns in the chunk's arena
	skills []string // a.Skills without repeats, in first-occurrence order
}

// stashedAnswer is one answer held for the sorted pass.
type stashedAnswer struct {
	id      string
	skills  []int32
	at      int64
	hash    uint64
	learner int32
	correct bool
}

func newReplayer(r *Replay, out *replayOutputs, source string, sorted bool) *replayer {
	rp := &replayer{
		r: r, out: out, source: source, order: r.opt.Order, sorted: sorted,
		nModels: len(r.opt.Params), nPol: len(r.opt.Policies), window: r.opt.DedupeWindow,
		learnerIdx:    map[string]int32{},
		skillIdx:      map[string]int32{},
		rejectByField: map[string]int64{},
		models:        make([]replayModel, len(r.opt.Params)),
	}
	return rp
}

// reject counts a record that could not be used and keeps the first
// RejectsListed by position (line, or partition and offset) — the same
// ones whatever order a source reported them in.
func (rp *replayer) reject(rec RejectedRecord) {
	rp.rejected++
	rp.rejectByField[rec.Field]++
	max := rp.r.opt.RejectsListed
	if max <= 0 {
		return
	}
	rp.rejectList = append(rp.rejectList, rec)
	if len(rp.rejectList) >= 2*max {
		rp.trimRejects()
	}
}

func (rp *replayer) trimRejects() {
	slices.SortStableFunc(rp.rejectList, func(a, b RejectedRecord) int {
		switch {
		case a.Line != b.Line:
			return a.Line - b.Line
		case a.Partition != b.Partition:
			return int(a.Partition - b.Partition)
		case a.Offset < b.Offset:
			return -1
		case a.Offset > b.Offset:
			return 1
		}
		return 0
	})
	if max := rp.r.opt.RejectsListed; len(rp.rejectList) > max {
		rp.rejectList = rp.rejectList[:max]
	}
}

// The times whose Unix nanoseconds fit an int64: the store refuses others
// (state/store_partition.go, checkAnswer), so replay rejects them too.
var (
	minReplayAt = time.Unix(0, math.MinInt64)
	maxReplayAt = time.Unix(0, math.MaxInt64)
)

// prepare checks what the store would refuse beyond the decoder's checks,
// drops repeated skill names and hashes the id. It reports false (and
// records the rejection) for an answer the store would refuse.
func (rp *replayer) prepare(d *replayAnswer) bool {
	if d.a.At.Before(minReplayAt) || d.a.At.After(maxReplayAt) {
		rp.reject(RejectedRecord{Offset: -1, AnswerID: d.a.ID, Field: "at", Reason: rangeReason(d.a.At)})
		return false
	}
	prepareDecoded(d)
	return true
}

// prepareDecoded fills the worker-side fields of d.
func prepareDecoded(d *replayAnswer) {
	d.at = d.a.At.UnixNano()
	d.hash = idHash(d.a.ID)
	d.skills = d.a.Skills
	for i := 1; i < len(d.skills); i++ {
		if slices.Contains(d.skills[:i], d.skills[i]) {
			// Rare: build the list without repeats (the store applies a
			// repeated skill once).
			u := make([]string, 0, len(d.skills))
			for _, s := range d.skills {
				if !slices.Contains(u, s) {
					u = append(u, s)
				}
			}
			d.skills = u
			break
		}
	}
}

// idHash is 64-bit FNV-1a (Fowler, Noll & Vo; offset basis and prime from
// the FNV specification, draft-eastlake-fnv), the hash the store keeps in a
// learner's applied-id window (state/encoding.go), so that replay skips
// exactly the answers the store skips.
func idHash(id string) uint64 {
	const (
		offset64 = 14695981039346656037
		prime64  = 1099511628211
	)
	h := uint64(offset64)
	for i := 0; i < len(id); i++ {
		h ^= uint64(id[i])
		h *= prime64
	}
	return h
}

// appendRowPrefix appends the columns answer_id,learner,skills,at, of d's
// row (with the trailing comma).
func appendRowPrefix(b []byte, d *replayAnswer) []byte {
	b = appendCSVField(b, d.a.ID)
	b = append(b, ',')
	b = appendCSVField(b, d.a.Learner)
	b = append(b, ',')
	if len(d.skills) == 1 {
		b = appendCSVField(b, d.skills[0])
	} else {
		start := len(b)
		for i, s := range d.skills {
			if i > 0 {
				b = append(b, ';')
			}
			b = append(b, s...)
		}
		if needsQuotes(b[start:]) {
			joined := string(b[start:])
			b = appendCSVField(b[:start], joined)
		}
	}
	b = append(b, ',')
	b = appendUTC(b, d.at)
	return append(b, ',')
}

// appendUTC appends the time at (Unix nanoseconds) as time.RFC3339Nano
// formats it in UTC — "2025-09-01T18:00:18.312Z", trailing zeros of the
// fraction dropped — without time.Time's general formatter (a third of the
// cost of a row). The date comes from the day count by the civil-from-days
// algorithm of H. Hinnant, "chrono-Compatible Low-Level Date Algorithms"
// (2013). TestAppendUTC checks it against time.Format.
func appendUTC(b []byte, at int64) []byte {
	const day = 86400
	secs := at / 1e9
	nanos := at % 1e9
	if nanos < 0 {
		nanos += 1e9
		secs--
	}
	days := secs / day
	sod := secs % day
	if sod < 0 {
		sod += day
		days--
	}
	// civil_from_days
	z := days + 719468
	era := z / 146097
	if z < 0 && z%146097 != 0 {
		era--
	}
	doe := z - era*146097
	yoe := (doe - doe/1460 + doe/36524 - doe/146096) / 365
	y := yoe + era*400
	doy := doe - (365*yoe + yoe/4 - yoe/100)
	mp := (5*doy + 2) / 153
	d := doy - (153*mp+2)/5 + 1
	m := mp + 3
	if mp >= 10 {
		m = mp - 9
	}
	if m <= 2 {
		y++
	}
	b = append(b, byte('0'+y/1000%10), byte('0'+y/100%10), byte('0'+y/10%10), byte('0'+y%10), '-',
		byte('0'+m/10), byte('0'+m%10), '-', byte('0'+d/10), byte('0'+d%10), 'T')
	h, mi, s := sod/3600, sod/60%60, sod%60
	b = append(b, byte('0'+h/10), byte('0'+h%10), ':', byte('0'+mi/10), byte('0'+mi%10), ':', byte('0'+s/10), byte('0'+s%10))
	if nanos != 0 {
		var frac [10]byte
		frac[0] = '.'
		n := nanos
		for i := 9; i >= 1; i-- {
			frac[i] = byte('0' + n%10)
			n /= 10
		}
		end := 10
		for frac[end-1] == '0' {
			end--
		}
		b = append(b, frac[:end]...)
	}
	return append(b, 'Z')
}

// appendCSVField appends s as one CSV field, quoted as RFC 4180 asks when
// it holds a comma, a quote or a line break (and, as encoding/csv does,
// when it begins with a space).
func appendCSVField(b []byte, s string) []byte {
	if !needsQuotesString(s) {
		return append(b, s...)
	}
	b = append(b, '"')
	for i := 0; i < len(s); i++ {
		if s[i] == '"' {
			b = append(b, '"')
		}
		b = append(b, s[i])
	}
	return append(b, '"')
}

func needsQuotesString(s string) bool {
	if s == "" {
		return false
	}
	if s[0] == ' ' {
		return true
	}
	for i := 0; i < len(s); i++ {
		switch s[i] {
		case ',', '"', '\r', '\n':
			return true
		}
	}
	return false
}

func needsQuotes(b []byte) bool {
	if len(b) == 0 {
		return false
	}
	return b[0] == ' ' || bytes.ContainsAny(b, ",\"\r\n")
}

// learner returns the index of the named learner, adding it when new.
func (rp *replayer) learner(name string) int32 {
	if i, ok := rp.learnerIdx[name]; ok {
		return i
	}
	i := int32(len(rp.learners))
	rp.learnerIdx[name] = i
	rp.learners = append(rp.learners, replayLearner{name: name})
	return i
}

// skill returns the index of the named skill, adding it when new.
func (rp *replayer) skill(name string) int32 {
	if i, ok := rp.skillIdx[name]; ok {
		return i
	}
	i := int32(len(rp.skills))
	rp.skillIdx[name] = i
	si := replaySkill{name: name, single: []int32{i}}
	for _, np := range rp.r.opt.Params {
		p, v := np.File.For(name)
		si.params = append(si.params, p)
		si.versions = append(si.versions, v)
	}
	rp.skills = append(rp.skills, si)
	for m := range rp.models {
		rp.models[m].skills = append(rp.models[m].skills, Scores{})
		rp.models[m].curves = append(rp.models[m].curves, nil)
	}
	return i
}

// skillsOf returns the skill indexes of d's skills (a shared slice for one
// skill; rp.sk, reused, for several).
func (rp *replayer) skillsOf(li int32, d *replayAnswer) []int32 {
	if len(d.skills) == 1 {
		return rp.skills[rp.skillOf(li, d.skills[0])].single
	}
	rp.sk = rp.sk[:0]
	for _, s := range d.skills {
		rp.sk = append(rp.sk, rp.skillOf(li, s))
	}
	return rp.sk
}

// skillOf is skill(name), looked up first among the few skills learner li
// has answered (comparing names is cheaper than hashing one).
func (rp *replayer) skillOf(li int32, name string) int32 {
	for _, ref := range rp.learners[li].skills {
		if rp.skills[ref.skill].name == name {
			return ref.skill
		}
	}
	return rp.skill(name)
}

// apply handles one prepared answer in source order: the order check, then
// (unless sorting) the answer itself. pfx holds its row prefix, or is empty
// to have it rendered here.
func (rp *replayer) apply(d *replayAnswer, pfx []byte) error {
	li := rp.learner(d.a.Learner)
	l := &rp.learners[li]
	if l.seen && d.at < l.seenAt {
		if rp.order == OrderAt && !rp.sorted {
			return errRestart
		}
		rp.outOfOrder++
	}
	if !l.seen || d.at > l.seenAt {
		l.seenAt, l.seen = d.at, true
	}
	sk := rp.skillsOf(li, d)
	if rp.sorted {
		st := stashedAnswer{id: d.a.ID, at: d.at, hash: d.hash, learner: li, correct: d.a.Correct, skills: sk}
		if len(sk) > 1 {
			st.skills = slices.Clone(sk)
		}
		rp.stash = append(rp.stash, st)
		return nil
	}
	if len(pfx) == 0 && rp.out.pw != nil {
		rp.prefix = appendRowPrefix(rp.prefix[:0], d)
		pfx = rp.prefix
	}
	return rp.step(li, sk, d.a.ID, d.hash, d.at, d.a.Correct, pfx)
}

// drainStash applies the stashed answers: in OrderAt sorted by `at` (ties
// in source order); in arrival order (a source) each learner's answers in
// the order they came, learners merged deterministically (see mergeOrder).
func (rp *replayer) drainStash(ctx context.Context) error {
	var idx []int32
	if rp.order == OrderAt {
		idx = make([]int32, len(rp.stash))
		for i := range idx {
			idx[i] = int32(i)
		}
		slices.SortStableFunc(idx, func(a, b int32) int {
			x, y := rp.stash[a].at, rp.stash[b].at
			switch {
			case x < y:
				return -1
			case x > y:
				return 1
			}
			return 0
		})
	} else {
		idx = rp.mergeOrder()
	}
	var d replayAnswer
	for n, i := range idx {
		if n%4096 == 0 {
			if err := ctx.Err(); err != nil {
				return err
			}
		}
		st := &rp.stash[i]
		var pfx []byte
		if rp.out.pw != nil {
			d.a.ID, d.a.Learner, d.at = st.id, rp.learners[st.learner].name, st.at
			d.skills = d.skills[:0]
			for _, s := range st.skills {
				d.skills = append(d.skills, rp.skills[s].name)
			}
			rp.prefix = appendRowPrefix(rp.prefix[:0], &d)
			pfx = rp.prefix
		}
		if err := rp.step(st.learner, st.skills, st.id, st.hash, st.at, st.correct, pfx); err != nil {
			return err
		}
		if n%4096 == 0 {
			rp.r.answers.Store(rp.answers)
		}
	}
	rp.r.answers.Store(rp.answers)
	rp.stash = nil
	return nil
}

// mergeOrder orders the stash so that the result depends only on each
// learner's own sequence, not on how the source interleaved learners (a
// topic's partitions arrive in whatever order the fetches complete): each
// learner's answers stay in arrival order, and the next answer taken is
// the earliest-dated head of any learner's sequence, ties by learner id.
func (rp *replayer) mergeOrder() []int32 {
	n := len(rp.stash)
	next := make([]int32, n)
	head := make([]int32, len(rp.learners))
	tail := make([]int32, len(rp.learners))
	for i := range head {
		head[i], tail[i] = -1, -1
	}
	for i := range rp.stash {
		li := rp.stash[i].learner
		next[i] = -1
		if tail[li] < 0 {
			head[li] = int32(i)
		} else {
			next[tail[li]] = int32(i)
		}
		tail[li] = int32(i)
	}
	h := &mergeHeap{rp: rp}
	for li, i := range head {
		if i >= 0 {
			h.items = append(h.items, mergeItem{li: int32(li), i: i})
		}
	}
	heap.Init(h)
	out := make([]int32, 0, n)
	for h.Len() > 0 {
		top := &h.items[0]
		out = append(out, top.i)
		if nx := next[top.i]; nx >= 0 {
			top.i = nx
			heap.Fix(h, 0)
		} else {
			heap.Pop(h)
		}
	}
	return out
}

type mergeItem struct{ li, i int32 }

type mergeHeap struct {
	rp    *replayer
	items []mergeItem
}

func (h *mergeHeap) Len() int { return len(h.items) }
func (h *mergeHeap) Less(a, b int) bool {
	x, y := &h.items[a], &h.items[b]
	if ax, ay := h.rp.stash[x.i].at, h.rp.stash[y.i].at; ax != ay {
		return ax < ay
	}
	return h.rp.learners[x.li].name < h.rp.learners[y.li].name
}
func (h *mergeHeap) Swap(a, b int) { h.items[a], h.items[b] = h.items[b], h.items[a] }
func (h *mergeHeap) Push(x any)    { h.items = append(h.items, x.(mergeItem)) }
func (h *mergeHeap) Pop() any {
	x := h.items[len(h.items)-1]
	h.items = h.items[:len(h.items)-1]
	return x
}

// step applies one answer of learner li: the duplicate check against the
// learner's window, then every skill through state.Record.Apply under every
// parameter set and policy, the scores, and the output rows.
func (rp *replayer) step(li int32, sk []int32, id string, hash uint64, at int64, correct bool, pfx []byte) error {
	l := &rp.learners[li]
	if slices.Contains(l.ids, hash) {
		rp.duplicates++
		return nil
	}
	if l.hasAt && at < l.lastAt {
		rp.late++
	}
	// The window, exactly as the store keeps it (state/encoding.go,
	// window.add): the last DedupeWindow applied ids, oldest first.
	if len(l.ids) >= rp.window {
		n := copy(l.ids, l.ids[len(l.ids)-rp.window+1:])
		l.ids = l.ids[:n]
	}
	l.ids = append(l.ids, hash)
	if !l.hasAt || at > l.lastAt {
		l.lastAt, l.hasAt = at, true
	}
	rp.answers++
	if !rp.hasAt || at < rp.firstAt {
		rp.firstAt = at
	}
	if !rp.hasAt || at > rp.lastAt {
		rp.lastAt = at
	}
	rp.hasAt = true

	rp.lsOf = rp.lsOf[:0]
	for _, s := range sk {
		rp.lsOf = append(rp.lsOf, rp.learnerSkill(li, s))
	}
	nm, np := rp.nModels, rp.nPol
	rp.preds = rp.preds[:0]
	rp.events = rp.events[:0]
	for m := 0; m < nm; m++ {
		acc := &rp.models[m]
		start := len(rp.preds)
		for k, s := range sk {
			ls := rp.lsOf[k]
			si := &rp.skills[s]
			p := si.params[m]
			base := (int(ls)*nm + m) * np
			opp := rp.tracks[base].rec.Opportunities // before the answer
			var pc float64
			for pi := 0; pi < np; pi++ {
				t := &rp.tracks[base+pi]
				out := t.rec.Apply(p, correct, at, rp.r.opt.Policies[pi])
				if pi == 0 {
					pc = out.PCorrect
				}
				if t.next == 1 {
					t.next = 2
					if !correct {
						t.next = 3
					}
				}
				if out.Reached {
					t.reaches++
					if t.firstReach == 0 {
						t.firstReach, t.next = t.rec.Opportunities, 1
					}
				}
				if out.Stuck {
					t.stuckAt = t.rec.Opportunities
				}
				if m == 0 && pi == 0 && rp.out.ew != nil {
					if out.Reached {
						rp.events = append(rp.events, replayEvent{state.KindReached, s, t.rec})
					}
					if out.Stuck {
						rp.events = append(rp.events, replayEvent{state.KindStuck, s, t.rec})
					}
				}
			}
			acc.skills[s].Add(pc, correct)
			rp.preds = append(rp.preds, pc)
			if int(opp) < rp.r.opt.CurveOpportunities {
				c := acc.curves[s]
				if int(opp) >= len(c) {
					c = append(c, make([]replayCurveAcc, int(opp)+1-len(c))...)
					acc.curves[s] = c
				}
				c[opp].n++
				c[opp].predWrong += 1 - pc
				if !correct {
					c[opp].wrong++
				}
			}
		}
		pc := Combine(rp.preds[start:])
		acc.overall.Add(pc, correct)
		if m == 0 {
			rp.combined = pc
		}
	}
	if rp.out.pw != nil {
		if err := rp.writeRow(li, sk, id, at, correct, pfx); err != nil {
			return err
		}
	}
	return nil
}

// learnerSkill returns the learner-skill index of (li, s), adding it (with
// a fresh record per parameter set and policy) when new.
func (rp *replayer) learnerSkill(li, s int32) int32 {
	l := &rp.learners[li]
	for _, r := range l.skills {
		if r.skill == s {
			return r.ls
		}
	}
	ls := int32(len(rp.lskills))
	rp.lskills = append(rp.lskills, learnerSkillRef{learner: li, skill: s})
	l.skills = append(l.skills, learnerSkillLink{skill: s, ls: ls})
	si := &rp.skills[s]
	for m := 0; m < rp.nModels; m++ {
		rec := state.NewRecord(si.params[m], si.versions[m])
		for range rp.nPol {
			rp.tracks = append(rp.tracks, replayTrack{rec: rec})
		}
	}
	return ls
}

// writeRow appends the answer's predictions.csv row and its events.
func (rp *replayer) writeRow(li int32, sk []int32, id string, at int64, correct bool, pfx []byte) error {
	w := rp.out.pw
	b := append(w.buf, pfx...)
	b = strconv.AppendFloat(b, rp.combined, 'g', -1, 64)
	if correct {
		b = append(b, ",1,"...)
	} else {
		b = append(b, ",0,"...)
	}
	nm, np := rp.nModels, rp.nPol
	if len(sk) == 1 {
		b = strconv.AppendFloat(b, rp.tracks[int(rp.lsOf[0])*nm*np].rec.Mastery, 'g', -1, 64)
		b = append(b, ',')
		b = strconv.AppendInt(b, rp.skills[sk[0]].versions[0], 10)
	} else {
		sameVersion := true
		for k, s := range sk {
			if k > 0 {
				b = append(b, ';')
			}
			b = append(b, rp.skills[s].name...)
			b = append(b, '=')
			b = strconv.AppendFloat(b, rp.tracks[int(rp.lsOf[k])*nm*np].rec.Mastery, 'g', -1, 64)
			sameVersion = sameVersion && rp.skills[s].versions[0] == rp.skills[sk[0]].versions[0]
		}
		b = append(b, ',')
		if sameVersion {
			b = strconv.AppendInt(b, rp.skills[sk[0]].versions[0], 10)
		} else {
			for k, s := range sk {
				if k > 0 {
					b = append(b, ';')
				}
				b = append(b, rp.skills[s].name...)
				b = append(b, '=')
				b = strconv.AppendInt(b, rp.skills[s].versions[0], 10)
			}
		}
	}
	w.buf = append(b, '\n')
	if len(rp.events) > 0 {
		rp.writeEvents(li, id, at)
	}
	if err := w.maybeFlush(); err != nil {
		return fmt.Errorf("attain: writing predictions.csv: %w", err)
	}
	if err := rp.out.ew.maybeFlush(); err != nil {
		return fmt.Errorf("attain: writing events.csv: %w", err)
	}
	return nil
}

func (rp *replayer) writeEvents(li int32, id string, at int64) {
	w := rp.out.ew
	learner := rp.learners[li].name
	atText := time.Unix(0, at).UTC().Format(time.RFC3339Nano)
	for _, ev := range rp.events {
		skill := rp.skills[ev.skill].name
		b := append(w.buf, state.EventID(learner, skill, ev.kind, ev.rec.Opportunities)...)
		b = append(b, ',')
		b = append(b, ev.kind.EventType()...)
		b = append(b, ',')
		b = appendCSVField(b, learner)
		b = append(b, ',')
		b = appendCSVField(b, skill)
		b = append(b, ',')
		b = strconv.AppendUint(b, uint64(ev.rec.Opportunities), 10)
		b = append(b, ',')
		b = strconv.AppendFloat(b, ev.rec.Mastery, 'g', -1, 64)
		b = append(b, ',')
		b = strconv.AppendInt(b, ev.rec.ParamsVersion, 10)
		b = append(b, ',')
		b = appendCSVField(b, id)
		b = append(b, ',')
		b = append(b, atText...)
		w.buf = append(b, '\n')
	}
}

// ---- reading a file in parallel ----

// replayChunkSize is how much of a file one decoding job holds (our choice: big
// enough that the hand-offs cost nothing per answer, small enough that the
// pipeline's buffers stay a few MiB).
const replayChunkSize = 256 << 10

type replayChunk struct {
	data    []byte // whole lines (the last one may lack its newline at EOF)
	answers []replayAnswer
	rejects []replayChunkReject
	arena   []byte // row prefixes of the answers
	lines   int
	blank   int
	done    chan struct{}
}

type replayChunkReject struct {
	line  int // 0-based within the chunk
	field string
	err   error
}

// filePass reads path with one reader goroutine and Workers decoding
// goroutines, and applies the decoded answers here, in file order.
func (r *Replay) filePass(ctx context.Context, path string, rp *replayer) (err error) {
	var in io.Reader = os.Stdin
	if path != "-" {
		f, err := os.Open(path)
		if err != nil {
			return fmt.Errorf("attain: opening answers: %w", err)
		}
		defer f.Close()
		if fi, err := f.Stat(); err == nil && fi.Mode().IsRegular() {
			r.total.Store(fi.Size())
		}
		in = f
	}
	ctx, cancel := context.WithCancel(ctx)
	workers := r.opt.Workers
	pool := 2*workers + 2
	free := make(chan *replayChunk, pool)
	for range pool {
		free <- &replayChunk{data: make([]byte, 0, replayChunkSize+4096), done: make(chan struct{}, 1)}
	}
	work := make(chan *replayChunk, pool)
	order := make(chan *replayChunk, pool)
	var readErr error
	var wg sync.WaitGroup
	// Stop order: cancel, then wait for the reader (which closes work and
	// order) and the workers (which end when work is closed).
	defer func() {
		cancel()
		wg.Wait()
	}()
	wg.Add(1)
	go func() {
		defer wg.Done()
		defer close(order)
		defer close(work)
		readErr = readChunks(ctx, in, free, work, order)
	}()
	for range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			dec := r.opt.Decoder
			for c := range work {
				decodeChunk(&dec, c, rp.out.pw != nil && !rp.sorted)
				c.done <- struct{}{}
			}
		}()
	}
	line := 0
	for c := range order {
		select {
		case <-c.done:
		case <-ctx.Done():
			return ctx.Err()
		}
		for i := range c.answers {
			d := &c.answers[i]
			var pfx []byte
			if rp.out.pw != nil {
				pfx = c.arena[d.pfx[0]:d.pfx[1]]
			}
			if err := rp.apply(d, pfx); err != nil {
				return err
			}
		}
		for _, rj := range c.rejects {
			le := &LineError{Line: line + rj.line + 1, Reason: rj.err.Error(), Err: rj.err}
			var ae *state.AnswerError
			if errors.As(rj.err, &ae) {
				le.Field, le.Reason = ae.Field, ae.Reason
			}
			rp.reject(RejectedRecord{Line: le.Line, Offset: -1, Field: le.Field, Reason: le.Reason})
		}
		line += c.lines
		rp.records += int64(c.lines - c.blank)
		rp.blank += int64(c.blank)
		r.records.Add(int64(c.lines))
		r.bytes.Add(int64(len(c.data)))
		r.answers.Store(rp.answers)
		c.answers = c.answers[:0]
		c.rejects = c.rejects[:0]
		c.arena = c.arena[:0]
		free <- c
		if err := ctx.Err(); err != nil {
			return err
		}
	}
	if readErr != nil {
		return readErr
	}
	return ctx.Err()
}

func rangeReason(at time.Time) string {
	return fmt.Sprintf("%s is outside the storable range %s to %s (Unix nanoseconds in 64 bits)",
		at.Format(time.RFC3339), minReplayAt.Format(time.RFC3339), maxReplayAt.Format(time.RFC3339))
}

// readChunks fills chunks with whole lines and hands each to the workers
// and, in the same order, to the applier.
func readChunks(ctx context.Context, in io.Reader, free chan *replayChunk, work, order chan<- *replayChunk) error {
	var carry []byte
	eof := false
	for !eof {
		var c *replayChunk
		select {
		case c = <-free:
		case <-ctx.Done():
			return ctx.Err()
		}
		c.data = append(c.data[:0], carry...)
		carry = carry[:0]
		// Fill to replayChunkSize, then to the end of the line in hand.
		for {
			if len(c.data) == cap(c.data) {
				c.data = slices.Grow(c.data, len(c.data))
			}
			n, err := in.Read(c.data[len(c.data):cap(c.data)])
			c.data = c.data[:len(c.data)+n]
			if err == io.EOF {
				eof = true
				break
			}
			if err != nil {
				return fmt.Errorf("attain: reading answers: %w", err)
			}
			if len(c.data) >= replayChunkSize {
				if i := bytes.LastIndexByte(c.data, '\n'); i >= 0 {
					carry = append(carry, c.data[i+1:]...)
					c.data = c.data[:i+1]
					break
				}
			}
		}
		if len(c.data) == 0 {
			free <- c // never blocks: the channel holds every chunk
			continue
		}
		// Never blocks: at most pool chunks exist.
		work <- c
		order <- c
	}
	return nil
}

// decodeChunk decodes every line of c.
func decodeChunk(dec *state.NativeDecoder, c *replayChunk, rows bool) {
	data := c.data
	c.lines, c.blank = 0, 0
	for len(data) > 0 {
		i := bytes.IndexByte(data, '\n')
		var line []byte
		if i < 0 {
			line, data = data, nil
		} else {
			line, data = data[:i], data[i+1:]
		}
		n := c.lines
		c.lines++
		line = bytes.TrimSpace(line)
		if len(line) == 0 {
			c.blank++
			continue
		}
		a, err := dec.Decode(line)
		if err != nil {
			var ae *state.AnswerError
			f := ""
			if errors.As(err, &ae) {
				f = ae.Field
			}
			c.rejects = append(c.rejects, replayChunkReject{line: n, field: f, err: err})
			continue
		}
		if a.At.Before(minReplayAt) || a.At.After(maxReplayAt) {
			// The store refuses it (state/store_partition.go, checkAnswer).
			c.rejects = append(c.rejects, replayChunkReject{line: n, field: "at", err: &state.AnswerError{Field: "at", Reason: rangeReason(a.At)}})
			continue
		}
		c.answers = append(c.answers, replayAnswer{a: a})
		d := &c.answers[len(c.answers)-1]
		prepareDecoded(d)
		if rows {
			start := len(c.arena)
			c.arena = appendRowPrefix(c.arena, d)
			d.pfx = [2]int32{int32(start), int32(len(c.arena))}
		}
	}
}
