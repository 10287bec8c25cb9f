package stream

import (
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"
	"time"

	"github.com/attain-dev/attain/state"
)

// encodeOutputReflect is EncodeOutput as encoding/json writes it: the
// reference the direct encoder must match byte for byte.
func encodeOutputReflect(o *state.Output, source string) ([]byte, error) {
	data, err := json.Marshal(MasteryData{
		Learner: o.Learner, Skill: o.Skill, Mastery: o.Mastery, Opportunities: o.Opportunities,
		ParamsVersion: o.ParamsVersion, AnswerID: o.AnswerID,
	})
	if err != nil {
		return nil, err
	}
	return json.Marshal(CloudEvent{
		SpecVersion: "1.0", ID: o.ID, Source: source, Type: o.Kind.EventType(), Subject: o.Learner,
		Time: o.At.UTC(), DataContentType: "application/json", Data: data,
	})
}

// TestEncodeOutputMatchesEncodingJSON compares EncodeOutput with
// encoding/json on chosen hard cases (escapes, HTML characters, U+2028,
// invalid UTF-8, floats at the exponent boundaries, times with zones and
// out of JSON's range) and on random outputs.
func TestEncodeOutputMatchesEncodingJSON(t *testing.T) {
	at := time.Date(2025, 3, 1, 18, 30, 0, 123456789, time.FixedZone("x", 5*3600+1800))
	strs := []string{"", "learner-0042", `quote " and \ backslash`, "tab\tnew\nline\r\b\f\x00\x01\x1f\x7f",
		"<script>&amp;</script>", "ünïcödé ✓ 學生", "line\u2028sep\u2029", "bad \xff\xfe utf8 \xe2\x82", "\xf0\x9f\x98\x80 emoji"}
	floats := []float64{0, math.Copysign(0, -1), 1, 0.95, 0.123456789012345678, 1e-6, 9.99e-7, 1e-7, 1.5e-300,
		1e20, 1e21, 123456789e15, -0.5, math.SmallestNonzeroFloat64, math.MaxFloat64}
	times := []time.Time{at, {}, time.Unix(0, 0), time.Unix(1_700_000_000, 1), time.Date(9999, 12, 31, 23, 59, 59, 999999999, time.UTC),
		time.Date(10000, 1, 1, 0, 0, 0, 0, time.UTC), time.Date(-1, 1, 1, 0, 0, 0, 0, time.UTC)}
	check := func(o state.Output, source string) {
		t.Helper()
		want, werr := encodeOutputReflect(&o, source)
		got, gerr := EncodeOutput(&o, source)
		if (werr != nil) != (gerr != nil) {
			t.Fatalf("%+v: encoding/json error %v, EncodeOutput error %v", o, werr, gerr)
		}
		if werr == nil && !bytes.Equal(got, want) {
			t.Fatalf("%+v:\n got %s\nwant %s", o, got, want)
		}
	}
	n := 0
	for _, s := range strs {
		for _, f := range floats {
			for _, tm := range times {
				check(state.Output{Kind: state.KindReached, Learner: s, Skill: s + "-skill", Mastery: f, Opportunities: uint32(n),
					ParamsVersion: int64(n) - 40, AnswerID: s, At: tm, ID: "id-" + s}, "urn:attain:"+s)
				n++
			}
		}
	}
	for _, f := range []float64{math.NaN(), math.Inf(1), math.Inf(-1)} {
		check(state.Output{Kind: state.KindStuck, Mastery: f, At: at}, "s")
	}
	r := rand.New(rand.NewPCG(3, 4))
	randStr := func() string {
		b := make([]byte, r.IntN(12))
		for i := range b {
			b[i] = byte(r.IntN(256))
		}
		return string(b)
	}
	for range 20_000 {
		check(state.Output{
			Kind: state.Kind(1 + r.IntN(2)), Learner: randStr(), Skill: randStr(), Mastery: math.Float64frombits(r.Uint64()),
			Opportunities: r.Uint32(), ParamsVersion: r.Int64() - r.Int64(), AnswerID: randStr(),
			At: time.Unix(r.Int64N(1<<36)-1<<35, r.Int64N(1e9)), ID: fmt.Sprint(r.Uint64()),
		}, randStr())
	}
}
