package state

import (
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"time"
	"unsafe"
)

// ErrBadAnswer is wrapped by every error that rejects an input event.
var ErrBadAnswer = errors.New("attain: bad answer event")

// Answer is one learner's answer to one practice item: the native input
// event, version 1.
type Answer struct {
	ID      string    `json:"id"`
	Learner string    `json:"learner"`
	Item    string    `json:"item,omitempty"`
	Skills  []string  `json:"skills"`
	Correct bool      `json:"correct"`
	At      time.Time `json:"at"`
}

// AnswerError says which field of an event was rejected and why.
type AnswerError struct {
	Field  string // "" when the event as a whole is malformed
	Reason string
}

func (e *AnswerError) Error() string {
	if e.Field == "" {
		return "attain: bad answer event: " + e.Reason
	}
	return fmt.Sprintf("attain: bad answer event: field %q: %s", e.Field, e.Reason)
}

func (e *AnswerError) Unwrap() error { return ErrBadAnswer }

// NativeVersion is the only version of the native event this build reads.
const NativeVersion = 1

// NativeDecoder decodes and validates native v1 JSON answer events. The
// zero value is ready to use.
type NativeDecoder struct {
	// Items maps an item id to its skills (the Q-matrix), used when an event
	// names an item but no skills.
	Items map[string][]string
	// MaxBytes rejects larger events; 0 means no limit.
	MaxBytes int
}

type wireAnswer struct {
	Version *int      `json:"version"`
	ID      *string   `json:"id"`
	Learner *string   `json:"learner"`
	Item    *string   `json:"item"`
	Skills  *[]string `json:"skills"`
	Correct *bool     `json:"correct"`
	At      *string   `json:"at"`
}

// Decode parses one event. Unknown fields are ignored; a wrong type, a
// missing required field, an empty skill list, an unknown item or a time
// that does not parse as RFC 3339 is an *AnswerError.
func (d *NativeDecoder) Decode(b []byte) (Answer, error) {
	return d.decode(b, string(b))
}

// DecodeShared is Decode without copying b: the answer's strings share b's
// memory, so b must never change afterwards (a message value read from
// Kafka into a buffer of its own qualifies). It saves a copy and an
// allocation per event.
func (d *NativeDecoder) DecodeShared(b []byte) (Answer, error) {
	return d.decode(b, unsafe.String(unsafe.SliceData(b), len(b)))
}

func (d *NativeDecoder) decode(b []byte, src string) (Answer, error) {
	if d.MaxBytes > 0 && len(b) > d.MaxBytes {
		return Answer{}, &AnswerError{Reason: fmt.Sprintf("event is %d bytes, over the limit of %d", len(b), d.MaxBytes)}
	}
	var f fields
	if !scanAnswer(src, &f) {
		var w wireAnswer
		if err := decodeSlow(b, &w); err != nil {
			return Answer{}, err
		}
		f = w.fields()
	}
	return d.validate(&f)
}

// fields is a decoded event before validation; has says which were present.
type fields struct {
	has                   uint8
	version               int
	id, learner, item, at string
	skills                []string
	correct               bool
}

const (
	hasID uint8 = 1 << iota
	hasLearner
	hasItem
	hasAt
	hasCorrect
	hasSkills
	hasVersion
)

func (w *wireAnswer) fields() fields {
	var f fields
	if w.ID != nil {
		f.has |= hasID
		f.id = *w.ID
	}
	if w.Learner != nil {
		f.has |= hasLearner
		f.learner = *w.Learner
	}
	if w.Item != nil {
		f.has |= hasItem
		f.item = *w.Item
	}
	if w.At != nil {
		f.has |= hasAt
		f.at = *w.At
	}
	if w.Correct != nil {
		f.has |= hasCorrect
		f.correct = *w.Correct
	}
	if w.Skills != nil {
		f.has |= hasSkills
		f.skills = *w.Skills
	}
	if w.Version != nil {
		f.has |= hasVersion
		f.version = *w.Version
	}
	return f
}

// decodeSlow decodes with encoding/json and explains what is wrong.
func decodeSlow(b []byte, w *wireAnswer) error {
	if err := json.Unmarshal(b, w); err != nil {
		var te *json.UnmarshalTypeError
		if errors.As(err, &te) && te.Field == "" {
			return &AnswerError{Reason: "the event must be a JSON object, not " + te.Value}
		}
		if errors.As(err, &te) {
			return &AnswerError{Field: te.Field, Reason: fmt.Sprintf("must be a JSON %s, not %s", jsonKind(te.Type.Kind().String()), te.Value)}
		}
		return &AnswerError{Reason: "not valid JSON: " + err.Error()}
	}
	return nil
}

func (d *NativeDecoder) validate(f *fields) (Answer, error) {
	if f.has&hasVersion != 0 && f.version != NativeVersion {
		return Answer{}, &AnswerError{Field: "version", Reason: fmt.Sprintf("version %d is not supported (this build reads version %d)", f.version, NativeVersion)}
	}
	var a Answer
	switch {
	case f.has&hasID == 0:
		return a, &AnswerError{Field: "id", Reason: "missing"}
	case f.id == "":
		return a, &AnswerError{Field: "id", Reason: "empty"}
	case f.has&hasLearner == 0:
		return a, &AnswerError{Field: "learner", Reason: "missing"}
	case f.learner == "":
		return a, &AnswerError{Field: "learner", Reason: "empty"}
	case f.has&hasCorrect == 0:
		return a, &AnswerError{Field: "correct", Reason: "missing"}
	case f.has&hasAt == 0:
		return a, &AnswerError{Field: "at", Reason: "missing"}
	}
	a.ID, a.Learner, a.Correct, a.Item = f.id, f.learner, f.correct, f.item
	if strings.IndexByte(a.Learner, 0) >= 0 {
		return a, &AnswerError{Field: "learner", Reason: "contains a NUL byte"}
	}
	at, err := time.Parse(time.RFC3339Nano, f.at)
	if err != nil {
		return a, &AnswerError{Field: "at", Reason: fmt.Sprintf("%q is not an RFC 3339 time", f.at)}
	}
	a.At = at
	switch {
	case f.has&hasSkills != 0:
		a.Skills = f.skills
		if len(a.Skills) == 0 {
			return a, &AnswerError{Field: "skills", Reason: "empty list: an answer must be tagged with at least one skill"}
		}
		for _, s := range a.Skills {
			if s == "" {
				return a, &AnswerError{Field: "skills", Reason: "contains an empty skill name"}
			}
			if strings.IndexByte(s, 0) >= 0 {
				return a, &AnswerError{Field: "skills", Reason: "a skill name contains a NUL byte"}
			}
		}
	case a.Item != "" && d.Items != nil:
		skills, ok := d.Items[a.Item]
		if !ok || len(skills) == 0 {
			return a, &AnswerError{Field: "item", Reason: fmt.Sprintf("item %q has no skills in the item map and the event lists none", a.Item)}
		}
		a.Skills = skills
	default:
		return a, &AnswerError{Field: "skills", Reason: "missing (and no item map resolves the item)"}
	}
	return a, nil
}

func jsonKind(k string) string {
	switch k {
	case "string":
		return "string"
	case "bool":
		return "boolean"
	case "slice":
		return "array"
	case "int", "int64", "float64":
		return "number"
	}
	return k
}
