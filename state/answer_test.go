package state

import (
	"errors"
	"strings"
	"testing"
	"time"
)

func TestDecodeGood(t *testing.T) {
	d := &NativeDecoder{Items: map[string][]string{"tb-003": {"trial-balance"}}}
	a, err := d.Decode([]byte(`{"id":"a1","learner":"hl-00001","item":"je-001","skills":["journal-entries"],"correct":true,"at":"2026-03-02T19:04:05.5Z","extra":{"x":1}}`))
	if err != nil {
		t.Fatal(err)
	}
	want := time.Date(2026, 3, 2, 19, 4, 5, 5e8, time.UTC)
	if a.ID != "a1" || a.Learner != "hl-00001" || a.Item != "je-001" || len(a.Skills) != 1 || a.Skills[0] != "journal-entries" || !a.Correct || !a.At.Equal(want) {
		t.Fatalf("decoded %+v", a)
	}
	// The item map resolves an item with no skills listed.
	a, err = d.Decode([]byte(`{"id":"a2","learner":"hl-00001","item":"tb-003","correct":false,"at":"2026-03-02T19:04:05+01:00","version":1}`))
	if err != nil || len(a.Skills) != 1 || a.Skills[0] != "trial-balance" || a.Correct {
		t.Fatalf("decoded %+v, %v", a, err)
	}
}

func TestDecodeBad(t *testing.T) {
	d := &NativeDecoder{MaxBytes: 300, Items: map[string][]string{"tb-003": {"trial-balance"}}}
	ok := `"id":"a1","learner":"hl-1","skills":["trial-balance"],"correct":true,"at":"2026-03-02T19:04:05Z"`
	cases := []struct {
		name, in, field, reason string
	}{
		{"not json", `{"id":`, "", "not valid JSON"},
		{"not an object", `[1,2]`, "", "JSON"},
		{"missing id", `{"learner":"hl-1","skills":["x"],"correct":true,"at":"2026-03-02T19:04:05Z"}`, "id", "missing"},
		{"empty learner", `{"id":"a","learner":"","skills":["x"],"correct":true,"at":"2026-03-02T19:04:05Z"}`, "learner", "empty"},
		{"missing correct", `{"id":"a","learner":"l","skills":["x"],"at":"2026-03-02T19:04:05Z"}`, "correct", "missing"},
		{"correct as string", `{"id":"a","learner":"l","skills":["x"],"correct":"yes","at":"2026-03-02T19:04:05Z"}`, "correct", "boolean"},
		{"skills as string", `{"id":"a","learner":"l","skills":"x","correct":true,"at":"2026-03-02T19:04:05Z"}`, "skills", "array"},
		{"empty skills", `{"id":"a","learner":"l","skills":[],"correct":true,"at":"2026-03-02T19:04:05Z"}`, "skills", "empty list"},
		{"no skills no item", `{"id":"a","learner":"l","correct":true,"at":"2026-03-02T19:04:05Z"}`, "skills", "missing"},
		{"unknown item", `{"id":"a","learner":"l","item":"zz","correct":true,"at":"2026-03-02T19:04:05Z"}`, "item", "no skills"},
		{"bad time", `{"id":"a","learner":"l","skills":["x"],"correct":true,"at":"yesterday"}`, "at", "RFC 3339"},
		{"missing time", `{"id":"a","learner":"l","skills":["x"],"correct":true}`, "at", "missing"},
		{"version 2", `{"version":2,` + ok + `}`, "version", "not supported"},
		{"oversized", `{` + ok + `,"pad":"` + strings.Repeat("x", 300) + `"}`, "", "over the limit"},
		{"NUL in learner", `{"id":"a","learner":"l\u0000x","skills":["x"],"correct":true,"at":"2026-03-02T19:04:05Z"}`, "learner", "NUL"},
	}
	for _, c := range cases {
		_, err := d.Decode([]byte(c.in))
		var ae *AnswerError
		if !errors.As(err, &ae) || !errors.Is(err, ErrBadAnswer) {
			t.Errorf("%s: got %v, want an AnswerError", c.name, err)
			continue
		}
		if ae.Field != c.field || !strings.Contains(ae.Reason, c.reason) {
			t.Errorf("%s: got field %q reason %q, want field %q reason containing %q", c.name, ae.Field, ae.Reason, c.field, c.reason)
		}
	}
}

// FuzzDecode: the decoder never panics, and everything it accepts satisfies
// the documented invariants.
func FuzzDecode(f *testing.F) {
	f.Add([]byte(`{"id":"a1","learner":"hl-1","skills":["trial-balance"],"correct":true,"at":"2026-03-02T19:04:05Z"}`))
	f.Add([]byte(`{"id":"a1","learner":"hl-1","item":"tb-003","correct":false,"at":"2026-03-02T19:04:05.123+02:00"}`))
	f.Add([]byte(`{"skills":[null],"correct":null}`))
	d := &NativeDecoder{MaxBytes: 4096, Items: map[string][]string{"tb-003": {"trial-balance"}}}
	f.Fuzz(func(t *testing.T, b []byte) {
		a, err := d.Decode(b)
		if err != nil {
			if !errors.Is(err, ErrBadAnswer) {
				t.Fatalf("error %v does not wrap ErrBadAnswer", err)
			}
			return
		}
		if a.ID == "" || a.Learner == "" || len(a.Skills) == 0 || a.At.IsZero() && !strings.Contains(string(b), "0001-01-01") {
			t.Fatalf("accepted an invalid answer %+v from %q", a, b)
		}
		for _, s := range a.Skills {
			if s == "" || strings.IndexByte(s, 0) >= 0 {
				t.Fatalf("accepted skill %q", s)
			}
		}
	})
}

func BenchmarkDecode(b *testing.B) {
	msg := []byte(`{"id":"hl-00042-000017","learner":"hl-00042","item":"tb-003","skills":["trial-balance"],"correct":true,"at":"2026-03-02T19:04:05.123Z"}`)
	d := &NativeDecoder{MaxBytes: 65536}
	b.SetBytes(int64(len(msg)))
	for b.Loop() {
		if _, err := d.Decode(msg); err != nil {
			b.Fatal(err)
		}
	}
}

// FuzzDecodeFastPath: wherever the fast path accepts an event, encoding/json
// (the reference) decodes it to the same fields.
func FuzzDecodeFastPath(f *testing.F) {
	for _, s := range []string{
		`{"id":"a1","learner":"hl-1","skills":["trial-balance","journal-entries"],"correct":true,"at":"2026-03-02T19:04:05Z"}`,
		`{"id":"a1","ID":"b","learner":"hl-1","correct":false,"at":"x","version":1,"extra":[1,{"a":null},-0.5e3,"s"]}`,
		` { "version" : 12 , "skills" : [ ] } `,
		`{"learner":"h\u00e9","item":"caf\xc3\xa9"}`,
	} {
		f.Add([]byte(s))
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		var fast fields
		if !scanAnswer(string(b), &fast) {
			return
		}
		var slow wireAnswer
		if err := decodeSlow(b, &slow); err != nil {
			t.Fatalf("fast path accepted %q, encoding/json rejects it: %v", b, err)
		}
		if ref := slow.fields(); !sameFields(fast, ref) {
			t.Fatalf("%q: fast path %+v, encoding/json %+v", b, fast, ref)
		}
	})
}

func sameFields(a, b fields) bool {
	if a.has != b.has || a.id != b.id || a.learner != b.learner || a.item != b.item || a.at != b.at ||
		a.correct != b.correct || a.version != b.version || len(a.skills) != len(b.skills) {
		return false
	}
	if (a.skills == nil) != (b.skills == nil) && a.has&hasSkills != 0 {
		return false
	}
	for i := range a.skills {
		if a.skills[i] != b.skills[i] {
			return false
		}
	}
	return true
}
