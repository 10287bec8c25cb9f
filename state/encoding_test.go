package state

import (
	"bytes"
	"encoding/binary"
	"errors"
	"math"
	"reflect"
	"slices"
	"testing"
	"time"
)

// FuzzRecordEncoding checks that every record survives encode/decode
// exactly and that decoding arbitrary bytes never panics.
func FuzzRecordEncoding(f *testing.F) {
	f.Add(0.3, uint32(0), uint32(0), false, false, int64(1), int64(0))
	f.Add(0.97, uint32(12), uint32(9), true, true, int64(3), int64(1_700_000_000_000_000_000))
	f.Add(math.Inf(1), ^uint32(0), ^uint32(0), false, true, int64(math.MinInt64), int64(-1))
	f.Fuzz(func(t *testing.T, mastery float64, opp, correct uint32, mastered, ever bool, version, updated int64) {
		r := Record{Mastery: mastery, Opportunities: opp, Correct: correct, Mastered: mastered, EverMastered: ever, ParamsVersion: version, Updated: updated}
		b := appendRecord(nil, r)
		if len(b) != recordLen || b[0] != recordV1 {
			t.Fatalf("encoded %d bytes, version %d", len(b), b[0])
		}
		got, err := decodeRecord(b)
		if err != nil {
			t.Fatal(err)
		}
		if math.Float64bits(got.Mastery) != math.Float64bits(r.Mastery) {
			t.Fatalf("mastery bits changed: %v → %v", r.Mastery, got.Mastery)
		}
		got.Mastery, r.Mastery = 0, 0
		if got != r {
			t.Fatalf("round trip: %+v → %+v", r, got)
		}
		// Version 2: the same fields, a tail of up to opp answers (times
		// drawn from the fuzzed values), with and without a window.
		rv := recVal{rec: r}
		var want []HistoryEntry
		for i := uint32(0); i < min(opp, 20); i++ {
			h := HistoryEntry{At: updated*int64(i) - version, Correct: (i+correct)%3 == 0}
			rv.push(h)
			want = append(want, h)
		}
		w := &window{seq: uint64(opp), hasAt: mastered, lastAt: updated, ids: []uint64{uint64(version), uint64(updated)}}
		for _, win := range []*window{nil, w} {
			b2 := appendRecordVal(nil, &rv, win)
			got2, gotW, err := decodeRecordVal(b2)
			if err != nil {
				t.Fatal(err)
			}
			got2.rec.Mastery = 0
			var tail []HistoryEntry
			if _, err := forHistEntries(got2.tail, uint64(got2.tailN), func(h HistoryEntry) { tail = append(tail, h) }); err != nil {
				t.Fatal(err)
			}
			if got2.rec != r || !slices.Equal(tail, want) || got2.tailN != rv.tailN || (len(want) > 0 && got2.prevAt != want[len(want)-1].At) {
				t.Fatalf("v2 round trip: %+v %v → %+v %v", rv, want, got2, tail)
			}
			if !reflect.DeepEqual(gotW, win) {
				t.Fatalf("v2 window round trip: %+v → %+v", win, gotW)
			}
		}
		// Arbitrary bytes: an error or a value, never a panic; a value
		// re-encodes to the same bytes.
		raw := append(b[:0:0], b...)
		raw[int(opp)%len(raw)] ^= byte(updated)
		if d, err := decodeRecord(raw); err == nil && !bytes.Equal(appendRecord(nil, d), raw) {
			t.Fatalf("decode(%x) = %+v re-encodes differently", raw, d)
		}
	})
}

// FuzzValueDecoders feeds arbitrary bytes to every decoder: errors, never
// panics, and anything accepted re-encodes to the same bytes.
func FuzzValueDecoders(f *testing.F) {
	f.Add(appendHistory(nil, HistoryEntry{At: 1_700_000_000_000_000_000, Correct: true}))
	f.Add(appendHistoryChunk(nil, 2, appendHistEntry(appendHistEntry(nil, 0, HistoryEntry{At: 5e9, Correct: true}), 5e9, HistoryEntry{At: 6e9})))
	f.Add(appendRecordVal(nil, &recVal{rec: Record{Opportunities: 2}, tailN: 1, tail: []byte{0x0e}}, &window{seq: 3, ids: []uint64{9}}))
	f.Add(appendWindow(nil, &window{hasAt: true, lastAt: 5, ids: []uint64{1, 2}}))
	f.Add(appendPartState(nil, partState{offset: 9, nextSeq: 3, records: 2}))
	f.Add(appendOutbox(nil, &OutboxEntry{Output: &Output{Kind: KindReached, Learner: "l", Skill: "s", Mastery: 0.96, Opportunities: 4, ParamsVersion: 2, AnswerID: "a", At: time.Unix(5, 6).UTC(), ID: "x"}}))
	f.Add(appendOutbox(nil, &OutboxEntry{DeadLetter: &DeadLetter{Raw: []byte("{"), Key: []byte{}, Topic: "answers", Partition: 3, Offset: -1, Reason: "r", Field: "at"}}))
	// Inputs the fuzzer found once: an overlong varint, a NaN mastery.
	f.Add([]byte("\x01\x00\xf5\x00"))
	f.Add([]byte("\x01\x01\x01\x010\x010\x7f\xff00000000\x010\x0100\x010"))
	f.Fuzz(func(t *testing.T, b []byte) {
		// Varints have several encodings of one value (overlong ones decode
		// too), so accepted values must round-trip as values.
		if h, err := decodeHistory(b); err == nil {
			if h2, err := decodeHistory(appendHistory(nil, h)); err != nil || h2 != h {
				t.Fatalf("history %x → %+v does not round-trip", b, h)
			}
		}
		// History values of both versions: the answers re-encode to a chunk
		// that decodes to the same answers.
		var hs []HistoryEntry
		if n, err := forHistoryValue(b, func(h HistoryEntry) { hs = append(hs, h) }); err == nil {
			var enc []byte
			var prev int64
			for _, h := range hs {
				enc = appendHistEntry(enc, prev, h)
				prev = h.At
			}
			var hs2 []HistoryEntry
			if _, err := forHistoryValue(appendHistoryChunk(nil, uint32(n), enc), func(h HistoryEntry) { hs2 = append(hs2, h) }); err != nil || !slices.Equal(hs, hs2) {
				t.Fatalf("history %x → %v does not round-trip: %v, %v", b, hs, hs2, err)
			}
		}
		if rv, w, err := decodeRecordVal(b); err == nil {
			rv2, w2, err := decodeRecordVal(appendRecordVal(nil, &rv, w))
			if err != nil || math.Float64bits(rv.rec.Mastery) != math.Float64bits(rv2.rec.Mastery) || rv2.tailN != rv.tailN || !bytes.Equal(rv2.tail, rv.tail) || !reflect.DeepEqual(w, w2) {
				t.Fatalf("record %x → %+v %+v does not round-trip: %+v %+v, %v", b, rv, w, rv2, w2, err)
			}
		}
		if w, err := decodeWindow(b); err == nil {
			w2, err := decodeWindow(appendWindow(nil, &w))
			if err != nil || !reflect.DeepEqual(w, w2) {
				t.Fatalf("window %x → %+v does not round-trip", b, w)
			}
		}
		if st, err := decodePartState(b); err == nil && !bytes.Equal(appendPartState(nil, st), b) {
			t.Fatalf("partition state %x → %+v re-encodes differently", b, st)
		}
		if e, err := decodeOutbox(b); err == nil {
			// Compared re-encoded (a NaN mastery is not equal to itself).
			enc := appendOutbox(nil, &e)
			e2, err := decodeOutbox(enc)
			if err != nil || !bytes.Equal(appendOutbox(nil, &e2), enc) {
				t.Fatalf("outbox %x → %+v does not round-trip: %+v, %v", b, e, e2, err)
			}
		}
	})
}

func TestOutboxEncodingRoundTrip(t *testing.T) {
	at := time.Date(2025, 9, 1, 18, 30, 0, 987654321, time.FixedZone("x", -4*3600))
	for _, e := range []OutboxEntry{
		{Output: &Output{Kind: KindStuck, Learner: "ada", Skill: "trial-balance", Mastery: 0.41, Opportunities: 10, ParamsVersion: 7, AnswerID: "q-1", At: at, ID: EventID("ada", "trial-balance", KindStuck, 10)}},
		{DeadLetter: &DeadLetter{Raw: []byte(`{"id":`), Key: nil, Topic: "answers", Partition: 2, Offset: 1 << 40, Reason: "not valid JSON", At: time.Time{}}},
		{DeadLetter: &DeadLetter{Raw: []byte{}, Key: []byte("k"), Field: "at", At: at}},
	} {
		got, err := decodeOutbox(appendOutbox(nil, &e))
		if err != nil {
			t.Fatal(err)
		}
		if got.Output != nil {
			if !got.Output.At.Equal(e.Output.At) {
				t.Fatalf("At %v, want %v", got.Output.At, e.Output.At)
			}
			got.Output.At = e.Output.At
		}
		if got.DeadLetter != nil {
			if !got.DeadLetter.At.Equal(e.DeadLetter.At) || got.DeadLetter.At.IsZero() != e.DeadLetter.At.IsZero() {
				t.Fatalf("At %v, want %v", got.DeadLetter.At, e.DeadLetter.At)
			}
			got.DeadLetter.At = e.DeadLetter.At
		}
		if !reflect.DeepEqual(got, e) {
			t.Fatalf("round trip:\n got %+v\nwant %+v", got, e)
		}
	}
	if _, err := decodeRecord([]byte{recordV1 + 1, 0}); err == nil {
		t.Fatal("a newer record version was accepted")
	}
}

// TestHistEntryEncoding checks the compact answer encoding on the cases
// its rule names: deltas in whole seconds, milliseconds, microseconds and
// nanoseconds, zero and negative deltas (late answers), and the extremes of
// int64 whose difference wraps and needs the escape.
func TestHistEntryEncoding(t *testing.T) {
	t0 := time.Date(2025, 9, 1, 18, 0, 0, 0, time.UTC).UnixNano()
	cases := []struct {
		name   string
		ats    []int64
		maxLen int // bytes of the entries after the first (our format's promise)
	}{
		{"a minute apart in seconds", []int64{t0, t0 + 60e9, t0 + 120e9, t0 + 180e9}, 2},
		{"milliseconds", []int64{t0 + 123e6, t0 + 45_678e6, t0 + 99_001e6}, 3},
		{"microseconds", []int64{t0 + 1e3, t0 + 5e3}, 2},
		{"nanoseconds", []int64{t0 + 1, t0 + 2, t0 + 999_999_999}, 5},
		{"same time", []int64{t0, t0, t0}, 1},
		{"late", []int64{t0, t0 - 3*3600e9, t0 + 1}, 9},
		{"extremes", []int64{math.MaxInt64, math.MinInt64, math.MaxInt64, 0, math.MinInt64, -1}, 11},
	}
	for _, c := range cases {
		var enc []byte
		var prev int64
		var want []HistoryEntry
		for i, at := range c.ats {
			h := HistoryEntry{At: at, Correct: i%2 == 0}
			n := len(enc)
			enc = appendHistEntry(enc, prev, h)
			if i > 0 && len(enc)-n > c.maxLen {
				t.Errorf("%s: entry %d takes %d bytes, want at most %d", c.name, i, len(enc)-n, c.maxLen)
			}
			prev = at
			want = append(want, h)
		}
		var got []HistoryEntry
		last, err := forHistEntries(enc, uint64(len(want)), func(h HistoryEntry) { got = append(got, h) })
		if err != nil || !slices.Equal(got, want) || last != c.ats[len(c.ats)-1] {
			t.Errorf("%s: decoded %v (last %d, %v), want %v", c.name, got, last, err, want)
		}
		if _, err := forHistEntries(enc, uint64(len(want)+1), nil); err == nil {
			t.Errorf("%s: one entry more than encoded was accepted", c.name)
		}
		if _, err := forHistEntries(append(enc, 0x0e), uint64(len(want)), nil); err == nil {
			t.Errorf("%s: trailing bytes were accepted", c.name)
		}
	}
	// Both history value versions read; an unknown one is refused.
	n, err := forHistoryValue(appendHistory(nil, HistoryEntry{At: 7, Correct: true}), nil)
	if err != nil || n != 1 {
		t.Fatalf("version 1 history value: %d, %v", n, err)
	}
	if _, err := forHistoryValue([]byte{historyV2 + 1, 1, 0x0e}, nil); !errors.Is(err, ErrCorruptStore) {
		t.Fatalf("history version 3: %v, want ErrCorruptStore", err)
	}
	if _, _, err := decodeRecordVal(append([]byte{recordV2 + 1}, make([]byte, recordLen)...)); !errors.Is(err, ErrCorruptStore) {
		t.Fatalf("record version 3: %v, want ErrCorruptStore", err)
	}
}

func TestWindowBound(t *testing.T) {
	var w window
	for i := uint64(1); i <= 10; i++ {
		w.add(i, int64(i), 4)
	}
	if !reflect.DeepEqual(w.ids, []uint64{7, 8, 9, 10}) || w.lastAt != 10 {
		t.Fatalf("window %+v", w)
	}
	w.add(11, 3, 4) // a late answer does not move lastAt back
	if w.lastAt != 10 || !w.contains(11) || w.contains(7) {
		t.Fatalf("window %+v", w)
	}
	// FNV-1a 64 reference values: the FNV specification's test vectors
	// (draft-eastlake-fnv, "" → offset basis, "a" → 0xaf63dc4c8601ec8c).
	if idHash("") != 0xcbf29ce484222325 || idHash("a") != 0xaf63dc4c8601ec8c {
		t.Fatalf("idHash: %x %x", idHash(""), idHash("a"))
	}
}

func TestKeyOrdering(t *testing.T) {
	// Partitions sort numerically, the metadata pseudo-partition last.
	var prev []byte
	for _, p := range []int32{0, 1, 255, 256, 65536, math.MaxInt32} {
		k := recordKey(nil, p, "a", "b")
		if prev != nil && bytes.Compare(prev, k) >= 0 {
			t.Fatalf("partition order broken at %d", p)
		}
		prev = k
	}
	if bytes.Compare(prev, metaKey("schema")) >= 0 {
		t.Fatal("metadata does not sort after every partition")
	}
	// Families are contiguous and in order inside a partition.
	ks := [][]byte{
		recordKey(nil, 3, "zz", "zz"), historyKey(nil, 3, "a", "a", 1), windowKey(nil, 3, "a"),
		stateKey(3), outboxKey(nil, 3, 1), recordKey(nil, 4, "", ""),
	}
	for i := 1; i < len(ks); i++ {
		if bytes.Compare(ks[i-1], ks[i]) >= 0 {
			t.Fatalf("key %d (%x) does not sort before key %d (%x)", i-1, ks[i-1], i, ks[i])
		}
	}
	// History and outbox sequence numbers sort numerically.
	for _, n := range []uint32{1, 255, 256, 1 << 24} {
		if bytes.Compare(historyKey(nil, 0, "l", "s", n), historyKey(nil, 0, "l", "s", n+1)) >= 0 {
			t.Fatalf("history %d !< %d", n, n+1)
		}
		if bytes.Compare(outboxKey(nil, 0, uint64(n)), outboxKey(nil, 0, uint64(n)+1)) >= 0 {
			t.Fatalf("outbox %d !< %d", n, n+1)
		}
	}
	// A learner's prefix never matches another learner, nor a skill another skill.
	if bytes.HasPrefix(recordKey(nil, 0, "ab", "s"), learnerRecordPrefix(nil, 0, "a")) {
		t.Fatal("learner a's prefix matches learner ab")
	}
	if bytes.HasPrefix(historyKey(nil, 0, "l", "skill-2", 1), historyPrefix(nil, 0, "l", "skill")) {
		t.Fatal("skill's history prefix matches skill-2")
	}
	// All of one learner-skill's history lies between its prefix and prefixEnd.
	lo := historyPrefix(nil, 0, "l", "s")
	hi := prefixEnd(lo)
	for _, k := range [][]byte{historyKey(nil, 0, "l", "s", 0), historyKey(nil, 0, "l", "s", math.MaxUint32)} {
		if bytes.Compare(k, lo) < 0 || bytes.Compare(k, hi) >= 0 {
			t.Fatalf("%x outside [%x, %x)", k, lo, hi)
		}
	}
	if bytes.Compare(historyKey(nil, 0, "l", "s\x01", 1), hi) < 0 {
		t.Fatal("the next skill sorts inside the range")
	}
	// Round trips of the key parsers.
	rk := recordKey(nil, 9, "learner-1", "trial-balance")
	if l, s, err := splitRecordKey(rk); err != nil || l != "learner-1" || s != "trial-balance" {
		t.Fatalf("splitRecordKey = %q %q %v", l, s, err)
	}
	hk := historyKeyFromRecordKey(nil, rk, 77)
	if !bytes.Equal(hk, historyKey(nil, 9, "learner-1", "trial-balance", 77)) {
		t.Fatalf("historyKeyFromRecordKey = %x", hk)
	}
	g, opp, err := splitHistoryKey(hk)
	if err != nil || opp != 77 {
		t.Fatal(opp, err)
	}
	if l, s, err := splitGroup(g); err != nil || l != "learner-1" || s != "trial-balance" {
		t.Fatalf("splitGroup = %q %q %v", l, s, err)
	}
	if p, fam, ok := keyPartition(hk); !ok || p != 9 || fam != famHistory {
		t.Fatal(p, fam, ok)
	}
	if binary.BigEndian.Uint32(stateKey(7)) != 7 {
		t.Fatal("state key partition")
	}
	if prefixEnd([]byte{1, 0xFF, 0xFF}) == nil || !bytes.Equal(prefixEnd([]byte{1, 0xFF}), []byte{2}) || prefixEnd([]byte{0xFF}) != nil {
		t.Fatal("prefixEnd")
	}
}
