package fitjob

import (
	"bytes"
	"container/heap"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"hash/maphash"
	"io"
	"math"
	"os"
	"path/filepath"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"sync"
	"sync/atomic"
	"time"
	"unsafe"

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
// export sorted by time give) streams through a pipeline (filePass): one
// reader, Workers goroutines that decode lines and render rows, the
// applier and a writer, with a few MiB of buffers.

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

	// skillNames interns skill names (name → the same name, a copy owned
	// here): the decoding goroutines give the applier these copies, so
	// that comparing two equal names (skillOf) compares two pointers and
	// reads no byte of either.
	skillNames sync.Map
}

// internSkill returns the interned copy of name.
func (r *Replay) internSkill(name string) string {
	if v, ok := r.skillNames.Load(name); ok {
		return v.(string)
	}
	name = strings.Clone(name) // name may be part of a chunk of the file
	v, _ := r.skillNames.LoadOrStore(name, name)
	return v.(string)
}

// skillInterner is one decoding goroutine's cache of internSkill, by
// skillHash: most lines name one of a few skills.
type skillInterner struct {
	r     *Replay
	cache [64]struct {
		hash uint64
		name string
	}
}

func (in *skillInterner) intern(name string, h uint64) string {
	e := &in.cache[h%uint64(len(in.cache))]
	if e.hash != h || e.name != name {
		e.hash, e.name = h, in.r.internSkill(name)
	}
	return e.name
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
		out.startSync()
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
		return rp.apply(&d)
	})
	if err != nil {
		return nil, fmt.Errorf("attain: replaying %s: %w", src.Name(), err)
	}
	if err := rp.drainStash(ctx); err != nil {
		return nil, err
	}
	out.startSync()
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

	// synced is closed when both files are flushed and synced to disk
	// (startSync), with the error of each in syncErr.
	synced  chan struct{}
	syncErr [2]error
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
	o.pw.f, o.ew.f = o.pred, o.events
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

// startSync flushes both files and syncs them to disk in the background.
// Called once the rows are all written, it lets the disk work while the
// report is computed: syncing tens of MiB costs about as much time as
// the report.
func (o *replayOutputs) startSync() {
	if o.pred == nil || o.synced != nil {
		return
	}
	o.synced = make(chan struct{})
	go func() {
		defer close(o.synced)
		var wg sync.WaitGroup
		for k, x := range []struct {
			f *os.File
			w *rowWriter
		}{{o.pred, o.pw}, {o.events, o.ew}} {
			wg.Add(1)
			go func() {
				defer wg.Done()
				err := x.w.flush()
				if err == nil {
					err = x.f.Chmod(0o644) // outputs for people to read, not secrets
				}
				if err == nil {
					err = x.f.Sync()
				}
				o.syncErr[k] = err
			}()
		}
		wg.Wait()
	}()
}

// commit waits for startSync (starting it if need be) and renames the files
// into place.
func (o *replayOutputs) commit() error {
	if o.pred == nil {
		return nil
	}
	o.startSync()
	<-o.synced
	var errs []error
	for k, x := range []struct {
		f    *os.File
		name string
	}{{o.pred, "predictions.csv"}, {o.events, "events.csv"}} {
		err := o.syncErr[k]
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
	if o.synced != nil && o.pred != nil {
		<-o.synced // no file is closed under a sync in progress
	}
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

	// f, when set, is w: every rowWriterSize written, its pages are handed
	// to the disk (startWriteback), so that the fsync of commit has little
	// left to wait for.
	f           *os.File
	off, synced int64
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
		b.writeOut(b.buf)
	}
	b.buf = b.buf[:0]
	return b.err
}

func (b *rowWriter) writeOut(p []byte) {
	var n int
	n, b.err = b.w.Write(p)
	b.off += int64(n)
	if b.f != nil && b.off-b.synced >= rowWriterSize {
		startWriteback(b.f, b.synced, b.off-b.synced)
		b.synced = b.off
	}
}

func (b *rowWriter) reset() { b.buf, b.err, b.off, b.synced = b.buf[:0], nil, 0, 0 }

// write appends p, or writes it straight through when it would not fit.
func (b *rowWriter) write(p []byte) error {
	if len(b.buf)+len(p) <= cap(b.buf) {
		b.buf = append(b.buf, p...)
		return b.maybeFlush()
	}
	if err := b.flush(); err != nil {
		return err
	}
	b.writeOut(p)
	return b.err
}

// writeChunk writes the rows of a chunk of the file pass.
func (o *replayOutputs) writeChunk(c *replayChunk) error {
	if err := o.pw.write(c.pred); err != nil {
		return fmt.Errorf("attain: writing predictions.csv: %w", err)
	}
	if err := o.ew.write(c.ev); err != nil {
		return fmt.Errorf("attain: writing events.csv: %w", err)
	}
	return nil
}

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
	learnerTab []int32 // open addressing by learner hash: index+1, 0 = empty
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

	// sink, when set, receives the rows of the answers applied instead of
	// predictions.csv: the file pass formats them on the decoding
	// goroutines (formatRows) and writes them from a writer goroutine, so
	// that the applier, the one stage that cannot run in parallel, only
	// computes. sinkAns is the index in sink.answers of the answer being
	// applied.
	sink    *replayChunk
	sinkAns int32

	// scratch, reused for every answer
	prefix   []byte
	atText   []byte
	sk       []int32
	preds    []float64 // per model × skill
	combined float64   // the answer's prediction under the first set (Combine)
	lsOf     []int32
	events   []replayEvent
}

type replayLearner struct {
	name   string
	hash   uint64 // learnerHash(name)
	key    learnerKey
	ids    []uint64 // applied-id window (hashes, as the store), a ring
	idNext int32    // where the next id goes once the window is full
	lastAt int64    // latest `at` applied
	hasAt  bool
	seenAt int64 // latest `at` of any valid answer in source order
	seen   bool
	skills []learnerSkillLink
}

type learnerSkillLink struct {
	skill int32
	ls    int32
	hash  uint64 // skillHash of the skill's name
}

type learnerSkillRef struct {
	learner int32
	skill   int32
}

type replaySkill struct {
	name     string
	hash     uint64         // skillHash(name)
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
	lhash  uint64     // learnerHash of a.Learner
	lkey   learnerKey // of a.Learner
	shash  uint64     // skillHash of a one-skill answer's skill
	atText string     // a.At as appendUTC writes it, when the line had it so; else ""
	skills []string   // a.Skills without repeats, in first-occurrence order
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
	d.at, d.atText = d.a.At.UnixNano(), ""
	prepareFields(d)
}

// prepareFields fills the worker-side fields of d but its time.
func prepareFields(d *replayAnswer) {
	d.hash = idHash(d.a.ID)
	d.lhash = learnerHash(d.a.Learner)
	d.lkey = keyOf(d.a.Learner)
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
	if len(d.skills) == 1 {
		d.shash = skillHash(d.skills[0])
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
	if d.atText != "" {
		b = append(b, d.atText...)
	} else {
		b = appendUTC(b, d.at)
	}
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
	// Eight bytes at a time (every row has three or more fields to check):
	// (x−0x01…)&^x&0x80… is non-zero exactly when x has a zero byte, that
	// is when w has a byte equal to the one x was made with.
	const ones, highs = 0x0101010101010101, 0x8080808080808080
	has := func(w uint64, c byte) uint64 {
		x := w ^ (uint64(c) * ones)
		return (x - ones) &^ x
	}
	i := 0
	for ; i+8 <= len(s); i += 8 {
		t := s[i : i+8]
		w := uint64(t[0]) | uint64(t[1])<<8 | uint64(t[2])<<16 | uint64(t[3])<<24 |
			uint64(t[4])<<32 | uint64(t[5])<<40 | uint64(t[6])<<48 | uint64(t[7])<<56
		if (has(w, ',')|has(w, '"')|has(w, '\r')|has(w, '\n'))&highs != 0 {
			return true
		}
	}
	for ; i < len(s); i++ {
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

// learnerSeed seeds learnerHash: one per process, since the hashes only
// find learners in the replayer's table and never reach an output.
var learnerSeed = maphash.MakeSeed()

// learnerHash is the hash of a learner id by which the applier finds the
// learner; the decoding goroutines compute it, so that the applier's look-up
// is a probe and one comparison of the id.
func learnerHash(name string) uint64 { return maphash.String(learnerSeed, name) }

// learnerKey is the length and first 16 bytes of a learner's id: with the
// hash, it tells two ids apart without reading either's bytes (most ids
// are that short), which spares the applier a cache miss an answer.
type learnerKey struct {
	n    int
	head [2]uint64
}

func keyOf(name string) learnerKey {
	k := learnerKey{n: len(name)}
	for i := 0; i < len(name) && i < 16; i++ {
		k.head[i/8] |= uint64(name[i]) << (8 * (i % 8))
	}
	return k
}

// learner returns the index of the learner named name, whose learnerHash is
// h and keyOf k, adding it when new.
func (rp *replayer) learner(name string, h uint64, k learnerKey) int32 {
	if len(rp.learnerTab) == 0 {
		rp.learnerTab = make([]int32, 1024)
	}
	mask := uint64(len(rp.learnerTab) - 1)
	slot := h & mask
	for ; ; slot = (slot + 1) & mask {
		e := rp.learnerTab[slot]
		if e == 0 {
			break
		}
		if l := &rp.learners[e-1]; l.hash == h && l.key == k && (k.n <= 16 || l.name[16:] == name[16:]) {
			return e - 1
		}
	}
	i := int32(len(rp.learners))
	// A copy: name may be part of a chunk of the file, which the learner
	// must not keep alive.
	name = strings.Clone(name)
	rp.learnerIdx[name] = i
	rp.learners = append(rp.learners, replayLearner{name: name, hash: h, key: k})
	if 2*len(rp.learners) <= len(rp.learnerTab) {
		rp.learnerTab[slot] = i + 1
		return i
	}
	// Over half full: double the table and place every learner again.
	rp.learnerTab = make([]int32, 2*len(rp.learnerTab))
	mask = uint64(len(rp.learnerTab) - 1)
	for j := range rp.learners {
		s := rp.learners[j].hash & mask
		for rp.learnerTab[s] != 0 {
			s = (s + 1) & mask
		}
		rp.learnerTab[s] = int32(j) + 1
	}
	return i
}

// skill returns the index of the named skill, adding it when new.
func (rp *replayer) skill(name string) int32 {
	if i, ok := rp.skillIdx[name]; ok {
		return i
	}
	i := int32(len(rp.skills))
	name = rp.r.internSkill(name) // a copy, as for a learner's id, and the one the decoders hand out
	rp.skillIdx[name] = i
	si := replaySkill{name: name, hash: skillHash(name), single: []int32{i}}
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
		return rp.skills[rp.skillOf(li, d.skills[0], d.shash)].single
	}
	rp.sk = rp.sk[:0]
	for _, s := range d.skills {
		rp.sk = append(rp.sk, rp.skillOf(li, s, skillHash(s)))
	}
	return rp.sk
}

// skillOf is skill(name), looked up first among the few skills learner li
// has answered, by the hash h of name (skillHash) and then the name.
func (rp *replayer) skillOf(li int32, name string, h uint64) int32 {
	for _, ref := range rp.learners[li].skills {
		if ref.hash == h && rp.skills[ref.skill].name == name {
			return ref.skill
		}
	}
	return rp.skill(name)
}

// skillHash is the hash of a skill's name by which skillOf finds it.
func skillHash(name string) uint64 { return maphash.String(learnerSeed, name) }

// apply handles one prepared answer in source order: the order check, then
// (unless sorting) the answer itself.
func (rp *replayer) apply(d *replayAnswer) error {
	li := rp.learner(d.a.Learner, d.lhash, d.lkey)
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
		// The id is copied for the reason the learner's is.
		st := stashedAnswer{id: strings.Clone(d.a.ID), at: d.at, hash: d.hash, learner: li, correct: d.a.Correct, skills: sk}
		if len(sk) > 1 {
			st.skills = slices.Clone(sk)
		}
		rp.stash = append(rp.stash, st)
		return nil
	}
	var pfx []byte
	if rp.sink == nil && rp.out.pw != nil {
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
	// The window holds the same ids as the store's (state/encoding.go,
	// window.add: the last DedupeWindow applied ids), as a ring: only
	// membership is asked of it here, and a ring takes the next id without
	// moving the others.
	if len(l.ids) < rp.window {
		l.ids = append(l.ids, hash)
	} else {
		l.ids[l.idNext] = hash
		if l.idNext++; int(l.idNext) == len(l.ids) {
			l.idNext = 0
		}
	}
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
			reserveScores(&acc.skills[s])
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
		reserveScores(&acc.overall)
		acc.overall.Add(pc, correct)
		if m == 0 {
			rp.combined = pc
		}
	}
	if rp.out.pw != nil {
		if rp.sink != nil {
			rp.sinkRow(sk, li)
			return nil
		}
		if err := rp.writeRow(li, sk, id, at, correct, pfx); err != nil {
			return err
		}
	}
	return nil
}

// sinkRow keeps what the answer's predictions.csv row and events.csv rows
// need beyond the answer itself; formatRows writes them as writeRow would.
func (rp *replayer) sinkRow(sk []int32, li int32) {
	c := rp.sink
	if len(c.rows) == cap(c.rows) {
		c.rows = slices.Grow(c.rows, len(c.answers)-len(c.rows))
	}
	nm, np := rp.nModels, rp.nPol
	row := replayRow{ans: rp.sinkAns, combined: rp.combined, multi: -1}
	v0 := rp.skills[sk[0]].versions[0]
	if len(sk) == 1 {
		row.mastery, row.version = rp.tracks[int(rp.lsOf[0])*nm*np].rec.Mastery, v0
	} else {
		row.multi, row.version = int32(len(c.multi)), v0
		row.sameVersion = true
		for k, s := range sk {
			v := rp.skills[s].versions[0]
			c.multi = append(c.multi, replayRowSkill{rp.tracks[int(rp.lsOf[k])*nm*np].rec.Mastery, v})
			row.sameVersion = row.sameVersion && v == v0
		}
	}
	c.rows = append(c.rows, row)
	for _, ev := range rp.events {
		c.events = append(c.events, sinkEvent{rp.sinkAns, ev.kind, rp.learners[li].name, rp.skills[ev.skill].name, ev.rec})
	}
}

// formatRows renders the chunk's predictions.csv and events.csv rows, byte
// for byte as writeRow does; it runs on a decoding goroutine.
func formatRows(c *replayChunk) {
	// A row is shorter than its line: one growth at most.
	b := slices.Grow(c.pred[:0], len(c.data))
	for i := range c.rows {
		row := &c.rows[i]
		d := &c.answers[row.ans]
		b = appendRowPrefix(b, d)
		b = strconv.AppendFloat(b, row.combined, 'g', -1, 64)
		if d.a.Correct {
			b = append(b, ",1,"...)
		} else {
			b = append(b, ",0,"...)
		}
		if row.multi < 0 {
			b = strconv.AppendFloat(b, row.mastery, 'g', -1, 64)
			b = append(b, ',')
			b = strconv.AppendInt(b, row.version, 10)
		} else {
			sks := c.multi[row.multi : int(row.multi)+len(d.skills)]
			for k, s := range d.skills {
				if k > 0 {
					b = append(b, ';')
				}
				b = append(b, s...)
				b = append(b, '=')
				b = strconv.AppendFloat(b, sks[k].mastery, 'g', -1, 64)
			}
			b = append(b, ',')
			if row.sameVersion {
				b = strconv.AppendInt(b, row.version, 10)
			} else {
				for k, s := range d.skills {
					if k > 0 {
						b = append(b, ';')
					}
					b = append(b, s...)
					b = append(b, '=')
					b = strconv.AppendInt(b, sks[k].version, 10)
				}
			}
		}
		b = append(b, '\n')
	}
	c.pred = b
	e := c.ev[:0]
	var atText []byte
	for i := range c.events {
		ev := &c.events[i]
		d := &c.answers[ev.ans]
		atText = appendUTC(atText[:0], d.at)
		e = appendEvent(e, ev.learner, ev.skill, d.a.ID, atText, ev.kind, &ev.rec)
	}
	c.ev = e
}

// reserveScores makes room in s for the next pair by doubling: append grows
// a long slice by a quarter at a time, which over a file of millions of
// answers allocates five times the final size and copies four times over,
// all on the applier.
func reserveScores(s *Scores) {
	if len(s.p) == cap(s.p) {
		s.p = slices.Grow(s.p, max(len(s.p), 1024))
	}
	if len(s.y) == cap(s.y) {
		s.y = slices.Grow(s.y, max(len(s.y), 1024))
	}
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
	l.skills = append(l.skills, learnerSkillLink{skill: s, ls: ls, hash: rp.skills[s].hash})
	si := &rp.skills[s]
	if n := rp.nModels * rp.nPol; len(rp.tracks)+n > cap(rp.tracks) {
		rp.tracks = slices.Grow(rp.tracks, max(len(rp.tracks), 4096)) // doubling, as reserveScores
	}
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
		rp.out.ew.buf = rp.appendEvents(rp.out.ew.buf, li, id, at)
	}
	if err := w.maybeFlush(); err != nil {
		return fmt.Errorf("attain: writing predictions.csv: %w", err)
	}
	if err := rp.out.ew.maybeFlush(); err != nil {
		return fmt.Errorf("attain: writing events.csv: %w", err)
	}
	return nil
}

// appendEvents appends the answer's events.csv rows to b.
func (rp *replayer) appendEvents(b []byte, li int32, id string, at int64) []byte {
	learner := rp.learners[li].name
	atText := appendUTC(rp.atText[:0], at)
	rp.atText = atText
	for _, ev := range rp.events {
		b = appendEvent(b, learner, rp.skills[ev.skill].name, id, atText, ev.kind, &ev.rec)
	}
	return b
}

// appendEvent appends one events.csv row; atText is the answer's time as
// time.RFC3339Nano writes it in UTC (appendUTC).
func appendEvent(b []byte, learner, skill, id string, atText []byte, kind state.Kind, rec *state.Record) []byte {
	b = append(b, state.EventID(learner, skill, kind, rec.Opportunities)...)
	b = append(b, ',')
	b = append(b, kind.EventType()...)
	b = append(b, ',')
	b = appendCSVField(b, learner)
	b = append(b, ',')
	b = appendCSVField(b, skill)
	b = append(b, ',')
	b = strconv.AppendUint(b, uint64(rec.Opportunities), 10)
	b = append(b, ',')
	b = strconv.AppendFloat(b, rec.Mastery, 'g', -1, 64)
	b = append(b, ',')
	b = strconv.AppendInt(b, rec.ParamsVersion, 10)
	b = append(b, ',')
	b = appendCSVField(b, id)
	b = append(b, ',')
	b = append(b, atText...)
	return append(b, '\n')
}

// sinkEvent is an event of the file pass, kept for formatRows: the names
// are the replayer's own (immutable) strings, so that a worker can read
// them while the applier goes on.
type sinkEvent struct {
	ans            int32 // index in the chunk's answers
	kind           state.Kind
	learner, skill string
	rec            state.Record
}

// ---- reading a file in parallel ----

// replayChunkSize is how much of a file one decoding job holds (our choice:
// big enough that the hand-offs cost nothing per answer — some 400 lines a
// chunk — and small enough that a chunk's answers are still in the caches
// when the next stage takes them; 64 KiB measured a little faster than
// 256 KiB on the 2-core development machine, 32 KiB no faster).
const replayChunkSize = 64 << 10

// replayChunk is one piece of the file on its way through the pipeline of
// filePass: read, decoded, applied, its rows formatted, written.
type replayChunk struct {
	// data holds whole lines (the last one may lack its newline at EOF).
	// The answers' strings point into it (decodeChunk): nothing may keep
	// one after the chunk returns to the pool.
	data    []byte
	answers []replayAnswer
	skills  []string // the skill lists of the answers the fast path read
	rejects []replayChunkReject
	lines   int
	blank   int
	done    chan struct{} // decoded

	// Filled by the applier (sinkRow), then rendered into pred by a
	// decoding goroutine (formatRows), then written.
	rows      []replayRow
	multi     []replayRowSkill
	events    []sinkEvent
	ev        []byte // events.csv rows of the chunk
	pred      []byte // predictions.csv rows of the chunk
	formatted chan struct{}
}

func newReplayChunk() *replayChunk {
	return &replayChunk{data: make([]byte, 0, replayChunkSize+4096), done: make(chan struct{}, 1), formatted: make(chan struct{}, 1)}
}

// reset empties c for the next piece of the file.
func (c *replayChunk) reset() {
	c.answers, c.skills, c.rejects = c.answers[:0], c.skills[:0], c.rejects[:0]
	c.rows, c.multi, c.events, c.ev, c.pred = c.rows[:0], c.multi[:0], c.events[:0], c.ev[:0], c.pred[:0]
}

// replayRow is what a predictions.csv row holds beyond the answer: the
// numbers the applier computed for it.
type replayRow struct {
	ans         int32 // index in the chunk's answers
	multi       int32 // first of the answer's skills in the chunk's multi; -1: one skill
	combined    float64
	mastery     float64 // one skill
	version     int64   // one skill, or the version every skill has (sameVersion)
	sameVersion bool
}

type replayRowSkill struct {
	mastery float64
	version int64
}

type replayChunkReject struct {
	line  int // 0-based within the chunk
	field string
	err   error
}

// filePass reads path through a pipeline: one reader goroutine cuts the
// file into chunks of whole lines; Workers goroutines decode them; this
// goroutine applies the answers in file order (the only stage that must be
// sequential, so it does nothing else); the same workers render the rows
// of applied chunks; a writer goroutine writes them in order. Chunks come
// back to a fixed pool, so the buffers stay bounded whatever the file's
// size, and every stage runs while the others do.
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
	// Rows are rendered off the applier when the pass writes them as it
	// goes; a sorted pass writes them when it drains the stash.
	rows := rp.out.pw != nil && !rp.sorted
	// Enough chunks that the reader and the decoders can run ahead of the
	// applier by a chunk per worker while others are formatted and written.
	pool := 4*workers + 4
	free := make(chan *replayChunk, pool)
	for range pool {
		free <- newReplayChunk()
	}
	// Every channel holds the whole pool: no send blocks.
	work := make(chan *replayChunk, pool)
	order := make(chan *replayChunk, pool)
	toFormat := make(chan *replayChunk, pool)
	toWrite := make(chan *replayChunk, pool)
	closeOut := sync.OnceFunc(func() {
		close(toFormat)
		close(toWrite)
	})
	var readErr, writeErr error
	var wg sync.WaitGroup
	// Stop order: cancel, close the applier's outputs, then wait for the
	// reader (which closes work and order), the workers (which end when
	// work and toFormat are closed) and the writer. A write error is the
	// pass's error, whatever stopped the others.
	defer func() {
		cancel()
		closeOut()
		wg.Wait()
		rp.sink = nil
		if writeErr != nil {
			err = writeErr
		}
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
			in := &skillInterner{r: r}
			work, toFormat := work, toFormat
			for work != nil || toFormat != nil {
				// Rendering first: it is what the writer, and through the
				// pool the reader, wait for.
				select {
				case c, ok := <-toFormat:
					if !ok {
						toFormat = nil
						continue
					}
					formatRows(c)
					c.formatted <- struct{}{}
					continue
				default:
				}
				select {
				case c, ok := <-toFormat:
					if !ok {
						toFormat = nil
						continue
					}
					formatRows(c)
					c.formatted <- struct{}{}
				case c, ok := <-work:
					if !ok {
						work = nil
						continue
					}
					decodeChunk(&dec, in, c)
					c.done <- struct{}{}
				case <-ctx.Done():
					return
				}
			}
		}()
	}
	wg.Add(1)
	go func() {
		defer wg.Done()
		for c := range toWrite {
			select {
			case <-c.formatted:
			case <-ctx.Done():
				return
			}
			if writeErr = rp.out.writeChunk(c); writeErr != nil {
				cancel()
				return
			}
			c.reset()
			free <- c
		}
	}()
	line := 0
	for c := range order {
		select {
		case <-c.done:
		case <-ctx.Done():
			return ctx.Err()
		}
		if rows {
			rp.sink = c
		}
		for i := range c.answers {
			d := &c.answers[i]
			rp.sinkAns = int32(i)
			if err := rp.apply(d); err != nil {
				return err
			}
		}
		rp.sink = nil
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
		if rows {
			toFormat <- c
			toWrite <- c
		} else {
			c.reset()
			free <- c
		}
		if err := ctx.Err(); err != nil {
			return err
		}
	}
	// Every chunk is applied: let the workers and the writer finish.
	closeOut()
	wg.Wait()
	if writeErr != nil {
		return writeErr
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

// decodeChunk decodes every line of c: lines of the common shape by
// fastDecoder, the others by dec. The answers' skill names are interned
// (skillInterner).
func decodeChunk(dec *state.NativeDecoder, in *skillInterner, c *replayChunk) {
	// The answers' strings are substrings of the chunk's buffer itself, not
	// of a copy: copying 256 KiB a chunk (and collecting the copies) cost
	// more than a tenth of a second per million answers. This is safe
	// because the buffer is written only by the reader, only once the chunk
	// is back in the pool, when nothing refers to its answers any more;
	// what the replay keeps beyond a chunk (learners' and skills' names,
	// the sorted pass's ids) it copies: see learner, skill and apply.
	var text string
	if len(c.data) > 0 {
		text = unsafe.String(&c.data[0], len(c.data))
	}
	var fd fastDecoder
	c.lines, c.blank = 0, 0
	for start := 0; start < len(text); {
		end := len(text)
		next := end
		if i := strings.IndexByte(text[start:], '\n'); i >= 0 {
			end = start + i
			next = end + 1
		}
		n := c.lines
		c.lines++
		raw := c.data[start:end]
		// Trim ASCII white space as bytes.TrimSpace does; a line that then
		// begins or ends with a byte from 0x80 (perhaps Unicode white
		// space) is the decoder's, trimmed by bytes.TrimSpace.
		lo, hi := start, end
		for lo < hi && asciiSpace(text[lo]) {
			lo++
		}
		for hi > lo && asciiSpace(text[hi-1]) {
			hi--
		}
		start = next
		if lo == hi {
			c.blank++
			continue
		}
		if text[lo] < 0x80 && text[hi-1] < 0x80 && (dec.MaxBytes <= 0 || hi-lo <= dec.MaxBytes) {
			n0 := len(c.skills)
			if fa, ok := fd.decode(text[lo:hi], &c.skills); ok {
				sk := c.skills[n0:len(c.skills):len(c.skills)] // capped: nothing appends through it
				c.answers = append(c.answers, replayAnswer{a: state.Answer{ID: fa.id, Learner: fa.learner, Skills: sk, Correct: fa.correct}, at: fa.at, atText: fa.atText})
				in.prepare(&c.answers[len(c.answers)-1])
				continue
			}
		}
		line := bytes.TrimSpace(raw)
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
		d.at = a.At.UnixNano()
		// Interned in a list of its own: the decoder's may be the item
		// map's.
		d.a.Skills = slices.Clone(d.a.Skills)
		in.prepare(d)
	}
}

// prepare is prepareFields, the skill names then interned (in place: the
// list is the chunk's).
func (in *skillInterner) prepare(d *replayAnswer) {
	prepareFields(d)
	if len(d.skills) == 1 {
		d.skills[0] = in.intern(d.skills[0], d.shash)
		return
	}
	for k, s := range d.skills {
		d.skills[k] = in.intern(s, skillHash(s))
	}
}

// asciiSpace is the ASCII white space of bytes.TrimSpace.
func asciiSpace(c byte) bool {
	return c == ' ' || c == '\t' || c == '\n' || c == '\r' || c == '\v' || c == '\f'
}
