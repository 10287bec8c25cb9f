package state

import (
	"bytes"
	"encoding/binary"
	"math"
	"reflect"
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
