package stream

import (
	"errors"
	"fmt"

	"github.com/attain-dev/attain/state"
)

// Decoder turns one input message value into an answer. An error rejects
// the message to the dead-letter topic; when it is (or wraps) a
// *state.AnswerError, its Field is named there. *state.NativeDecoder is the
// native JSON format; other input formats implement the same method.
type Decoder interface {
	Decode(b []byte) (state.Answer, error)
}

// sharedDecoder is a Decoder that can also decode without copying the
// value (state.NativeDecoder.DecodeShared).
type sharedDecoder interface {
	DecodeShared(b []byte) (state.Answer, error)
}

// Reason codes: the first word of every dead letter's reason, so that a
// consumer of the dead-letter topic can sort rejections without parsing
// prose. The rest of the reason is the detail, for people.
const (
	ReasonEmpty       = "empty"               // tombstone or empty value
	ReasonOversized   = "oversized"           // value larger than consumer.max_event_bytes
	ReasonVersion     = "unsupported-version" // an event version this build does not read
	ReasonMalformed   = "malformed"           // not parseable at all (not JSON, …)
	ReasonInvalid     = "invalid"             // parsed, but a field is missing, empty or of the wrong type
	ReasonUnprocessed = "unprocessable"       // decoded, but the store refused it (e.g. an over-long id)
)

// rejection is why one message is dead-lettered.
type rejection struct {
	code, detail, field string
}

func (r rejection) reason() string { return r.code + ": " + r.detail }

// decodeMessage checks the size and emptiness of v, then decodes it.
func decodeMessage(dec Decoder, v []byte, maxBytes int) (state.Answer, *rejection) {
	if len(v) == 0 {
		return state.Answer{}, &rejection{code: ReasonEmpty, detail: "the message has no value (a tombstone or an empty event); an answer event is a JSON object"}
	}
	if maxBytes > 0 && len(v) > maxBytes {
		return state.Answer{}, &rejection{code: ReasonOversized, detail: fmt.Sprintf("the event is %d bytes, over consumer.max_event_bytes = %d", len(v), maxBytes)}
	}
	var a state.Answer
	var err error
	if sd, ok := dec.(sharedDecoder); ok {
		a, err = sd.DecodeShared(v) // every message value has a buffer of its own
	} else {
		a, err = dec.Decode(v)
	}
	if err == nil {
		return a, nil
	}
	return a, rejectionOf(err, ReasonInvalid, ReasonMalformed)
}

// rejectionOf classifies a decoder or store error: withField is the code
// for an error that names a field, whole for one that does not.
func rejectionOf(err error, withField, whole string) *rejection {
	var ae *state.AnswerError
	if !errors.As(err, &ae) {
		return &rejection{code: whole, detail: err.Error()}
	}
	switch ae.Field {
	case "":
		return &rejection{code: whole, detail: ae.Reason}
	case "version":
		return &rejection{code: ReasonVersion, detail: ae.Reason, field: ae.Field}
	}
	return &rejection{code: withField, detail: fmt.Sprintf("field %q: %s", ae.Field, ae.Reason), field: ae.Field}
}
