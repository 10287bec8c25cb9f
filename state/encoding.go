package state

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"time"
)

// ErrCorruptStore is wrapped by every error about a stored key or value that
// does not decode.
var ErrCorruptStore = errors.New("attain: corrupt store data")

// Value encodings. Every value starts with a version byte; this build
// writes the latest version of each, reads the older ones listed here, and
// rejects any other with a clear error (a newer build wrote it), so a
// format change is always explicit.
const (
	recordV1    byte = 1 // the record's fields; its history one key per answer (read only)
	recordV2    byte = 2 // the record's fields and the tail of its history
	historyV1   byte = 1 // one answer per history key (read only)
	historyV2   byte = 2 // a chunk of answers per history key
	windowV1    byte = 1
	partStateV1 byte = 1
	outboxV1    byte = 1
	metaV1      byte = 1
)

// recordLen is the size of a version 1 record value, and of the fixed
// part of a version 2 one:
// version(1) mastery(8) opportunities(4) correct(4) flags(1) params_version(8) updated(8) not_mastered(8).
const recordLen = 1 + 8 + 4 + 4 + 1 + 8 + 8 + 8

const (
	recMastered     byte = 1 << 0
	recEverMastered byte = 1 << 1
)

// recVal is a learner-skill record as stored: the record and the tail of
// its history, the latest tailN answers, which live in the record's value
// until they are moved to a history chunk key (see Partition.Apply). The
// answers before the tail are in the history keys. Keeping the latest
// answers in the value that is rewritten anyway saves a Pebble key per
// answer.
type recVal struct {
	rec    Record
	tail   []byte // tailN entries in the compact history encoding (appendHistEntry)
	tailN  uint32
	prevAt int64 // `at` of the tail's last entry (0 when the tail is empty)
}

// push appends one answer to the tail. It never writes into tail's spare
// capacity when that is shared: values handed to the cache are capped
// (len == cap), so the first push after a load copies.
func (rv *recVal) push(h HistoryEntry) {
	if rv.tailN == 0 {
		rv.prevAt = 0
	}
	rv.tail = appendHistEntry(rv.tail, rv.prevAt, h)
	rv.tailN++
	rv.prevAt = h.At
}

// Record value, version 2: the 41 bytes of the record's fields as in
// version 1, then tail_n(uvarint) tail_bytes(uvarint) and the tail's
// entries, then the learner's applied-id window when this record carries
// it: 0 (it does not); 1 seq(uvarint) and the window's body (see
// appendWindowBody): the whole window; or 2 seq(uvarint) base(uvarint) and
// a body holding only the ids added since the whole window of sequence
// base, which another record of the learner carries.
//
// The record its latest answer updated carries the learner's current
// window (the highest seq; others may keep older ones), so that an answer
// rewrites one key, not a record and a window; and mostly as a delta from
// the last whole window, since the ids are most of the value's bytes.
func appendRecordVal(dst []byte, rv *recVal, w *window) []byte {
	dst = append(dst, recordV2)
	dst = appendRecordFields(dst, rv.rec)
	dst = binary.AppendUvarint(dst, uint64(rv.tailN))
	dst = binary.AppendUvarint(dst, uint64(len(rv.tail)))
	dst = append(dst, rv.tail...)
	switch {
	case w == nil:
		return append(dst, 0)
	case w.base == 0:
		dst = append(dst, 1)
		dst = binary.AppendUvarint(dst, w.seq)
	default:
		dst = append(dst, 2)
		dst = binary.AppendUvarint(dst, w.seq)
		dst = binary.AppendUvarint(dst, w.base)
	}
	return appendWindowBody(dst, w)
}

// appendRecord is the version 1 record value (the format of records
// written before history tails; kept to check that it is still read).
func appendRecord(dst []byte, r Record) []byte {
	return appendRecordFields(append(dst, recordV1), r)
}

func appendRecordFields(dst []byte, r Record) []byte {
	dst = binary.BigEndian.AppendUint64(dst, math.Float64bits(r.Mastery))
	dst = binary.BigEndian.AppendUint32(dst, r.Opportunities)
	dst = binary.BigEndian.AppendUint32(dst, r.Correct)
	var f byte
	if r.Mastered {
		f |= recMastered
	}
	if r.EverMastered {
		f |= recEverMastered
	}
	dst = append(dst, f)
	dst = binary.BigEndian.AppendUint64(dst, uint64(r.ParamsVersion))
	dst = binary.BigEndian.AppendUint64(dst, uint64(r.Updated))
	return binary.BigEndian.AppendUint64(dst, math.Float64bits(r.NotMastered))
}

// decodeRecord returns the record of a version 1 or 2 record value.
func decodeRecord(b []byte) (Record, error) {
	rv, _, err := decodeRecordVal(b)
	return rv.rec, err
}

// decodeRecordVal decodes a version 1 (no tail, no window) or 2 record
// value; w is the window it carries, nil if none. The tail is a view into b.
func decodeRecordVal(b []byte) (rv recVal, w *window, err error) {
	rv, rest, err := decodeRecordHead(b)
	if err != nil || rest == nil {
		return rv, nil, err
	}
	switch {
	case len(rest) == 1 && rest[0] == 0:
		return rv, nil, nil
	case len(rest) > 1 && (rest[0] == 1 || rest[0] == 2):
		r := reader{b: rest[1:]}
		seq := r.uvarint()
		var base uint64
		if rest[0] == 2 {
			if base = r.uvarint(); r.err == nil && (base == 0 || base >= seq) {
				r.err = fmt.Errorf("delta window of sequence %d from base %d", seq, base)
			}
		}
		if r.err != nil {
			return recVal{}, nil, fmt.Errorf("%w: record value has a bad window header: %v", ErrCorruptStore, r.err)
		}
		dw, err := decodeWindowBody(r.b)
		if err != nil {
			return recVal{}, nil, err
		}
		dw.seq, dw.base = seq, base
		return rv, &dw, nil
	}
	return recVal{}, nil, fmt.Errorf("%w: record value has a bad window section", ErrCorruptStore)
}

// decodeRecordHead decodes a record value up to its tail; rest is what
// follows the tail in a version 2 value, nil for version 1.
func decodeRecordHead(b []byte) (rv recVal, rest []byte, err error) {
	if len(b) == 0 {
		return recVal{}, nil, fmt.Errorf("%w: empty record value", ErrCorruptStore)
	}
	switch {
	case b[0] == recordV1 && len(b) != recordLen:
		return recVal{}, nil, fmt.Errorf("%w: record value is %d bytes, want %d", ErrCorruptStore, len(b), recordLen)
	case b[0] == recordV2 && len(b) < recordLen+1:
		return recVal{}, nil, fmt.Errorf("%w: record value is %d bytes, want at least %d", ErrCorruptStore, len(b), recordLen+1)
	case b[0] != recordV1 && b[0] != recordV2:
		return recVal{}, nil, versionErr("record", b[0], recordV2)
	}
	rec, err := decodeRecordFields(b)
	if err != nil {
		return recVal{}, nil, err
	}
	rv = recVal{rec: rec}
	if b[0] == recordV1 {
		return rv, nil, nil
	}
	r := reader{b: b[recordLen:]}
	n, nb := r.uvarint(), r.uvarint()
	if r.err != nil || nb > uint64(len(r.b)) {
		return recVal{}, nil, fmt.Errorf("%w: record value has a bad history tail length", ErrCorruptStore)
	}
	if n > uint64(rec.Opportunities) {
		return recVal{}, nil, fmt.Errorf("%w: record history tail holds %d answers, more than its %d opportunities", ErrCorruptStore, n, rec.Opportunities)
	}
	rv.tail = r.b[:nb:nb]
	rv.tailN = uint32(n)
	last, err := forHistEntries(rv.tail, n, nil)
	if err != nil {
		return recVal{}, nil, fmt.Errorf("%w: record history tail: %v", ErrCorruptStore, err)
	}
	if n > 0 {
		rv.prevAt = last
	}
	return rv, r.b[nb:], nil
}

func decodeRecordFields(b []byte) (Record, error) {
	f := b[17]
	if f&^(recMastered|recEverMastered) != 0 {
		return Record{}, fmt.Errorf("%w: record flags %#x has unknown bits", ErrCorruptStore, f)
	}
	return Record{
		Mastery:       math.Float64frombits(binary.BigEndian.Uint64(b[1:])),
		Opportunities: binary.BigEndian.Uint32(b[9:]),
		Correct:       binary.BigEndian.Uint32(b[13:]),
		Mastered:      f&recMastered != 0,
		EverMastered:  f&recEverMastered != 0,
		ParamsVersion: int64(binary.BigEndian.Uint64(b[18:])),
		Updated:       int64(binary.BigEndian.Uint64(b[26:])),
		NotMastered:   math.Float64frombits(binary.BigEndian.Uint64(b[34:])),
	}, nil
}

func versionErr(what string, got, want byte) error {
	return fmt.Errorf("%w: %s value has version %d, this build reads version %d (written by a newer attain? upgrade)", ErrCorruptStore, what, got, want)
}

// History value, version 1 (one answer per key, read only): version(1)
// flags(1: bit 0 = correct) at(varint, Unix nanoseconds).
const histCorrect byte = 1 << 0

func appendHistory(dst []byte, h HistoryEntry) []byte {
	var f byte
	if h.Correct {
		f = histCorrect
	}
	dst = append(dst, historyV1, f)
	return binary.AppendVarint(dst, h.At)
}

func decodeHistory(b []byte) (HistoryEntry, error) {
	if len(b) < 3 {
		return HistoryEntry{}, fmt.Errorf("%w: history value is %d bytes", ErrCorruptStore, len(b))
	}
	if b[0] != historyV1 {
		return HistoryEntry{}, versionErr("history", b[0], historyV1)
	}
	if b[1]&^histCorrect != 0 {
		return HistoryEntry{}, fmt.Errorf("%w: history flags %#x has unknown bits", ErrCorruptStore, b[1])
	}
	at, n := binary.Varint(b[2:])
	if n <= 0 || 2+n != len(b) {
		return HistoryEntry{}, fmt.Errorf("%w: history value has a bad time", ErrCorruptStore)
	}
	return HistoryEntry{At: at, Correct: b[1]&histCorrect != 0}, nil
}

// History chunk value, version 2: version(1) n(uvarint, ≥ 1) then n
// entries in the compact history encoding, the first relative to 0. The
// key names the opportunity of the chunk's first answer.
func appendHistoryChunk(dst []byte, n uint32, entries []byte) []byte {
	dst = append(dst, historyV2)
	dst = binary.AppendUvarint(dst, uint64(n))
	return append(dst, entries...)
}

// forHistoryValue calls fn for each answer of a version 1 or 2 history
// value, in order, and returns how many there were.
func forHistoryValue(b []byte, fn func(HistoryEntry)) (int, error) {
	if len(b) > 0 && b[0] == historyV2 {
		n, k := binary.Uvarint(b[1:])
		if k <= 0 || n == 0 || n > uint64(len(b)) {
			return 0, fmt.Errorf("%w: history chunk has a bad length", ErrCorruptStore)
		}
		if _, err := forHistEntries(b[1+k:], n, fn); err != nil {
			return 0, fmt.Errorf("%w: history chunk: %v", ErrCorruptStore, err)
		}
		return int(n), nil
	}
	h, err := decodeHistory(b)
	if err != nil {
		if len(b) > 0 && b[0] != historyV1 {
			return 0, versionErr("history", b[0], historyV2)
		}
		return 0, err
	}
	if fn != nil {
		fn(h)
	}
	return 1, nil
}

// The compact history encoding of one answer, relative to the `at` of the
// previous answer in the same chunk or tail (prev, 0 for the first):
//
//	uvarint(zz<<3 | unit<<1 | correct)
//
// where delta = at − prev (two's-complement, wrapping), unit (0..3) is the
// largest of ns, µs, ms, s that divides delta (s for 0), and zz is the
// zigzag encoding of delta/unit. Answers a minute apart at whole seconds
// take 2 bytes, at whole milliseconds 3. When zz does not fit in 61 bits
// (|delta| ≥ 2⁶⁰ ns, about 36 years) the entry is uvarint(correct) — unit
// ns with zz 0, which the rule above never produces — followed by
// uvarint(zz) in full.
var histUnits = [4]int64{1, 1e3, 1e6, 1e9}

func appendHistEntry(dst []byte, prev int64, h HistoryEntry) []byte {
	d := int64(uint64(h.At) - uint64(prev))
	unit := 3
	for unit > 0 && d%histUnits[unit] != 0 {
		unit--
	}
	q := d / histUnits[unit]
	zz := uint64(q<<1) ^ uint64(q>>63)
	var c uint64
	if h.Correct {
		c = 1
	}
	if zz >= 1<<61 {
		dst = binary.AppendUvarint(dst, c)
		return binary.AppendUvarint(dst, zz)
	}
	return binary.AppendUvarint(dst, zz<<3|uint64(unit)<<1|c)
}

// forHistEntries decodes exactly n entries filling b, calling fn (if not
// nil) for each; it returns the last `at`.
func forHistEntries(b []byte, n uint64, fn func(HistoryEntry)) (int64, error) {
	var prev int64
	for i := uint64(0); i < n; i++ {
		x, k := binary.Uvarint(b)
		if k <= 0 {
			return 0, fmt.Errorf("entry %d of %d is truncated", i+1, n)
		}
		b = b[k:]
		unit, zz := (x>>1)&3, x>>3
		if x>>1 == 0 {
			if zz, k = binary.Uvarint(b); k <= 0 {
				return 0, fmt.Errorf("entry %d of %d is truncated", i+1, n)
			}
			b = b[k:]
		}
		q := int64(zz>>1) ^ -int64(zz&1)
		prev = int64(uint64(prev) + uint64(q*histUnits[unit]))
		if fn != nil {
			fn(HistoryEntry{At: prev, Correct: x&1 != 0})
		}
	}
	if len(b) != 0 {
		return 0, fmt.Errorf("%d bytes after %d entries", len(b), n)
	}
	return prev, nil
}

// window is a learner's applied-id window: the hashes of the last ids
// applied (oldest first) and the latest `at` seen.
//
// Ids are kept as 64-bit FNV-1a hashes: 8 bytes instead of the whole id, so
// the window that is rewritten on every commit of an active learner stays
// small. Two different ids of one learner collide with probability about
// 2⁻⁶⁴ per pair (ideal 64-bit hash; FNV-1a is close to ideal on
// non-adversarial input), i.e. ~32·2⁻⁶⁴ ≈ 1.7·10⁻¹⁸ per answer with a
// window of 32 — far below any other failure rate of the system.
type window struct {
	seq    uint64 // answers applied to the learner (0 in schema 1 windows)
	base   uint64 // as stored: 0 for a whole window; for a delta, the seq of the whole window it adds ids to
	hasAt  bool
	lastAt int64
	ids    []uint64
}

func (w *window) contains(h uint64) bool {
	for _, x := range w.ids {
		if x == h {
			return true
		}
	}
	return false
}

func (w *window) add(h uint64, at int64, max int) {
	if len(w.ids) >= max {
		n := copy(w.ids, w.ids[len(w.ids)-max+1:])
		w.ids = w.ids[:n]
	}
	w.ids = append(w.ids, h)
	w.seq++
	if !w.hasAt || at > w.lastAt {
		w.lastAt, w.hasAt = at, true
	}
}

func (w window) clone() window {
	w.ids = append(make([]uint64, 0, len(w.ids)+1), w.ids...)
	return w
}

// idHash is 64-bit FNV-1a (Fowler, Noll & Vo; offset basis and prime from
// the FNV specification, draft-eastlake-fnv).
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

// Window value (schema 1 window keys; read only): version(1) and the body.
func appendWindow(dst []byte, w *window) []byte {
	return appendWindowBody(append(dst, windowV1), w)
}

// Window body: flags(1: bit 0 = has at) last_at(varint) n(uvarint) n×hash(8, BE).
func appendWindowBody(dst []byte, w *window) []byte {
	var f byte
	if w.hasAt {
		f = 1
	}
	dst = append(dst, f)
	dst = binary.AppendVarint(dst, w.lastAt)
	dst = binary.AppendUvarint(dst, uint64(len(w.ids)))
	for _, h := range w.ids {
		dst = binary.BigEndian.AppendUint64(dst, h)
	}
	return dst
}

func decodeWindow(b []byte) (window, error) {
	if len(b) < 2 {
		return window{}, fmt.Errorf("%w: id window value is %d bytes", ErrCorruptStore, len(b))
	}
	if b[0] != windowV1 {
		return window{}, versionErr("id window", b[0], windowV1)
	}
	return decodeWindowBody(b[1:])
}

func decodeWindowBody(b []byte) (window, error) {
	if len(b) < 1 {
		return window{}, fmt.Errorf("%w: id window is empty", ErrCorruptStore)
	}
	if b[0] > 1 {
		return window{}, fmt.Errorf("%w: id window flags %#x has unknown bits", ErrCorruptStore, b[0])
	}
	w := window{hasAt: b[0] == 1}
	r := reader{b: b[1:]}
	w.lastAt = r.varint()
	n := r.uvarint()
	if r.err == nil && (n > uint64(len(r.b))/8 || n*8 != uint64(len(r.b))) {
		return window{}, fmt.Errorf("%w: id window says %d ids but holds %d bytes", ErrCorruptStore, n, len(r.b))
	}
	if r.err != nil {
		return window{}, fmt.Errorf("%w: id window: %v", ErrCorruptStore, r.err)
	}
	w.ids = make([]uint64, n, n+1)
	for i := range w.ids {
		w.ids[i] = binary.BigEndian.Uint64(r.b[8*i:])
	}
	return w, nil
}

// partState is what a partition stores about itself, rewritten by every
// commit in the same batch as the changes.
type partState struct {
	hasOffset bool
	offset    int64  // last consumed offset
	nextSeq   uint64 // next outbox sequence number (starts at 1)
	records   uint64 // learner-skill records in the partition
}

// Partition state value: version(1) offset(8) next_seq(8) records(8).
const partStateLen = 1 + 8 + 8 + 8

func appendPartState(dst []byte, s partState) []byte {
	dst = append(dst, partStateV1)
	dst = binary.BigEndian.AppendUint64(dst, uint64(s.offset))
	dst = binary.BigEndian.AppendUint64(dst, s.nextSeq)
	return binary.BigEndian.AppendUint64(dst, s.records)
}

func decodePartState(b []byte) (partState, error) {
	if len(b) == 0 {
		return partState{}, fmt.Errorf("%w: empty partition state value", ErrCorruptStore)
	}
	if b[0] != partStateV1 {
		return partState{}, versionErr("partition state", b[0], partStateV1)
	}
	if len(b) != partStateLen {
		return partState{}, fmt.Errorf("%w: partition state value is %d bytes, want %d", ErrCorruptStore, len(b), partStateLen)
	}
	return partState{
		hasOffset: true,
		offset:    int64(binary.BigEndian.Uint64(b[1:])),
		nextSeq:   binary.BigEndian.Uint64(b[9:]),
		records:   binary.BigEndian.Uint64(b[17:]),
	}, nil
}

// Outbox value: version(1) type(1) then the fields of the Output or
// DeadLetter in declaration order: strings and byte slices as uvarint
// length + bytes (byte slices as length+1, 0 = nil), integers as varints,
// floats as 8 bytes big-endian, times as flag(1) seconds(varint) nanos(uvarint).
const (
	outboxOutput     byte = 1
	outboxDeadLetter byte = 2
)

func appendOutbox(dst []byte, e *OutboxEntry) []byte {
	dst = append(dst, outboxV1)
	switch {
	case e.Output != nil:
		o := e.Output
		dst = append(dst, outboxOutput, byte(o.Kind))
		dst = appendString(dst, o.Learner)
		dst = appendString(dst, o.Skill)
		dst = binary.BigEndian.AppendUint64(dst, math.Float64bits(o.Mastery))
		dst = binary.AppendUvarint(dst, uint64(o.Opportunities))
		dst = binary.AppendVarint(dst, o.ParamsVersion)
		dst = appendString(dst, o.AnswerID)
		dst = appendTime(dst, o.At)
		dst = appendString(dst, o.ID)
	case e.DeadLetter != nil:
		d := e.DeadLetter
		dst = append(dst, outboxDeadLetter)
		dst = appendBytes(dst, d.Raw)
		dst = appendBytes(dst, d.Key)
		dst = appendString(dst, d.Topic)
		dst = binary.AppendVarint(dst, int64(d.Partition))
		dst = binary.AppendVarint(dst, d.Offset)
		dst = appendString(dst, d.Reason)
		dst = appendString(dst, d.Field)
		dst = appendTime(dst, d.At)
	default:
		panic("attain: outbox entry with neither output nor dead letter")
	}
	return dst
}

func decodeOutbox(b []byte) (OutboxEntry, error) {
	if len(b) < 2 {
		return OutboxEntry{}, fmt.Errorf("%w: outbox value is %d bytes", ErrCorruptStore, len(b))
	}
	if b[0] != outboxV1 {
		return OutboxEntry{}, versionErr("outbox", b[0], outboxV1)
	}
	r := reader{b: b[2:]}
	var e OutboxEntry
	switch b[1] {
	case outboxOutput:
		o := &Output{}
		o.Kind = Kind(r.byte())
		o.Learner = r.string()
		o.Skill = r.string()
		o.Mastery = math.Float64frombits(r.uint64())
		opp := r.uvarint()
		if opp > math.MaxUint32 && r.err == nil {
			r.err = errors.New("opportunities out of range")
		}
		o.Opportunities = uint32(opp)
		o.ParamsVersion = r.varint()
		o.AnswerID = r.string()
		o.At = r.time()
		o.ID = r.string()
		if r.err == nil && o.Kind != KindReached && o.Kind != KindStuck {
			r.err = fmt.Errorf("unknown output kind %d", o.Kind)
		}
		e.Output = o
	case outboxDeadLetter:
		d := &DeadLetter{}
		d.Raw = r.bytes()
		d.Key = r.bytes()
		d.Topic = r.string()
		part := r.varint()
		if (part < math.MinInt32 || part > math.MaxInt32) && r.err == nil {
			r.err = errors.New("partition out of range")
		}
		d.Partition = int32(part)
		d.Offset = r.varint()
		d.Reason = r.string()
		d.Field = r.string()
		d.At = r.time()
		e.DeadLetter = d
	default:
		return OutboxEntry{}, fmt.Errorf("%w: outbox entry type %d unknown", ErrCorruptStore, b[1])
	}
	if r.err == nil && len(r.b) != 0 {
		r.err = fmt.Errorf("%d trailing bytes", len(r.b))
	}
	if r.err != nil {
		return OutboxEntry{}, fmt.Errorf("%w: outbox entry: %v", ErrCorruptStore, r.err)
	}
	return e, nil
}

func appendString(dst []byte, s string) []byte {
	dst = binary.AppendUvarint(dst, uint64(len(s)))
	return append(dst, s...)
}

func appendBytes(dst, b []byte) []byte {
	if b == nil {
		return append(dst, 0)
	}
	dst = binary.AppendUvarint(dst, uint64(len(b))+1)
	return append(dst, b...)
}

func appendTime(dst []byte, t time.Time) []byte {
	if t.IsZero() {
		return append(dst, 0)
	}
	dst = append(dst, 1)
	dst = binary.AppendVarint(dst, t.Unix())
	return binary.AppendUvarint(dst, uint64(t.Nanosecond()))
}

// reader decodes the primitives above; the first error sticks.
type reader struct {
	b   []byte
	err error
}

func (r *reader) fail(what string) {
	if r.err == nil {
		r.err = errors.New("truncated or malformed " + what)
	}
	r.b = nil
}

func (r *reader) byte() byte {
	if len(r.b) < 1 {
		r.fail("byte")
		return 0
	}
	c := r.b[0]
	r.b = r.b[1:]
	return c
}

func (r *reader) uint64() uint64 {
	if len(r.b) < 8 {
		r.fail("fixed 8 bytes")
		return 0
	}
	v := binary.BigEndian.Uint64(r.b)
	r.b = r.b[8:]
	return v
}

func (r *reader) uvarint() uint64 {
	v, n := binary.Uvarint(r.b)
	if n <= 0 {
		r.fail("uvarint")
		return 0
	}
	r.b = r.b[n:]
	return v
}

func (r *reader) varint() int64 {
	v, n := binary.Varint(r.b)
	if n <= 0 {
		r.fail("varint")
		return 0
	}
	r.b = r.b[n:]
	return v
}

func (r *reader) string() string {
	n := r.uvarint()
	if n > uint64(len(r.b)) {
		r.fail("string")
		return ""
	}
	s := string(r.b[:n])
	r.b = r.b[n:]
	return s
}

func (r *reader) bytes() []byte {
	n := r.uvarint()
	if n == 0 {
		return nil
	}
	n--
	if n > uint64(len(r.b)) {
		r.fail("byte string")
		return nil
	}
	b := append(make([]byte, 0, n), r.b[:n]...)
	r.b = r.b[n:]
	return b
}

func (r *reader) time() time.Time {
	switch r.byte() {
	case 0:
		return time.Time{}
	case 1:
	default:
		r.fail("time flag")
		return time.Time{}
	}
	sec := r.varint()
	ns := r.uvarint()
	if ns >= 1e9 {
		r.fail("time nanoseconds")
		return time.Time{}
	}
	return time.Unix(sec, int64(ns)).UTC()
}
