package stream

import (
	"encoding/base64"
	"encoding/json"
	"fmt"
	"math"
	"strconv"
	"time"
	"unicode/utf8"

	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/state"
)

// CloudEvent is the CloudEvents 1.0 JSON envelope of an output event
// (structured content mode, github.com/cloudevents/spec, v1.0).
type CloudEvent struct {
	SpecVersion     string          `json:"specversion"`
	ID              string          `json:"id"`
	Source          string          `json:"source"`
	Type            string          `json:"type"`
	Subject         string          `json:"subject"`
	Time            time.Time       `json:"time"`
	DataContentType string          `json:"datacontenttype"`
	Data            json.RawMessage `json:"data"`
}

// MasteryData is the data of attain.mastery.reached.v1 and
// attain.mastery.stuck.v1 events.
type MasteryData struct {
	Learner       string  `json:"learner"`
	Skill         string  `json:"skill"`
	Mastery       float64 `json:"mastery"`
	Opportunities uint32  `json:"opportunities"`
	ParamsVersion int64   `json:"params_version"`
	AnswerID      string  `json:"answer_id"`
}

// Source returns the CloudEvents source of a consumer group's events.
func Source(group string) string { return "urn:attain:" + group }

// EncodeOutput returns the CloudEvents JSON of one output. The event id is
// the output's deterministic id, the subject is the learner and the time
// is the `at` of the answer that caused it.
//
// The bytes are those encoding/json gives for the CloudEvent with its
// MasteryData (a test compares the two), written directly: the publisher
// encodes every output, and doing it without reflection costs a fraction.
func EncodeOutput(o *state.Output, source string) ([]byte, error) {
	if math.IsNaN(o.Mastery) || math.IsInf(o.Mastery, 0) {
		return nil, fmt.Errorf("attain: encoding output %s: mastery %v is not a number JSON can hold", o.ID, o.Mastery)
	}
	b := make([]byte, 0, 320)
	b = append(b, `{"specversion":"1.0","id":`...)
	b = appendJSONString(b, o.ID)
	b = append(b, `,"source":`...)
	b = appendJSONString(b, source)
	b = append(b, `,"type":`...)
	b = appendJSONString(b, o.Kind.EventType())
	b = append(b, `,"subject":`...)
	b = appendJSONString(b, o.Learner)
	b = append(b, `,"time":"`...)
	b, err := o.At.UTC().AppendText(b)
	if err != nil {
		return nil, fmt.Errorf("attain: encoding output %s: %w", o.ID, err)
	}
	b = append(b, `","datacontenttype":"application/json","data":{"learner":`...)
	b = appendJSONString(b, o.Learner)
	b = append(b, `,"skill":`...)
	b = appendJSONString(b, o.Skill)
	b = append(b, `,"mastery":`...)
	b = appendJSONFloat(b, o.Mastery)
	b = append(b, `,"opportunities":`...)
	b = strconv.AppendUint(b, uint64(o.Opportunities), 10)
	b = append(b, `,"params_version":`...)
	b = strconv.AppendInt(b, o.ParamsVersion, 10)
	b = append(b, `,"answer_id":`...)
	b = appendJSONString(b, o.AnswerID)
	return append(b, "}}"...), nil
}

// appendJSONFloat writes f as encoding/json does: the shortest
// representation, in exponent form below 1e-6 and from 1e21 on, with a
// one-digit negative exponent not zero-padded. f is finite.
func appendJSONFloat(b []byte, f float64) []byte {
	format := byte('f')
	if abs := math.Abs(f); abs != 0 && (abs < 1e-6 || abs >= 1e21) {
		format = 'e'
	}
	b = strconv.AppendFloat(b, f, format, -1, 64)
	if format == 'e' {
		if n := len(b); n >= 4 && b[n-4] == 'e' && b[n-3] == '-' && b[n-2] == '0' {
			b[n-2] = b[n-1]
			b = b[:n-1]
		}
	}
	return b
}

// appendJSONString writes s as a JSON string the way encoding/json does by
// default: ", \ and control characters escaped (\b \f \n \r \t by name,
// the rest as \u00XX), <, > and & as \u003c, \u003e and \u0026, U+2028
// and U+2029 escaped, and each invalid UTF-8 byte replaced by \ufffd.
func appendJSONString(b []byte, s string) []byte {
	const hex = "0123456789abcdef"
	b = append(b, '"')
	start := 0
	for i := 0; i < len(s); {
		if c := s[i]; c < utf8.RuneSelf {
			if c >= 0x20 && c != '"' && c != '\\' && c != '<' && c != '>' && c != '&' {
				i++
				continue
			}
			b = append(b, s[start:i]...)
			switch c {
			case '"', '\\':
				b = append(b, '\\', c)
			case '\b':
				b = append(b, '\\', 'b')
			case '\f':
				b = append(b, '\\', 'f')
			case '\n':
				b = append(b, '\\', 'n')
			case '\r':
				b = append(b, '\\', 'r')
			case '\t':
				b = append(b, '\\', 't')
			default:
				b = append(b, '\\', 'u', '0', '0', hex[c>>4], hex[c&0xF])
			}
			i++
			start = i
			continue
		}
		r, size := utf8.DecodeRuneInString(s[i:])
		if r == utf8.RuneError && size == 1 {
			b = append(b, s[start:i]...)
			b = append(b, `\ufffd`...)
			i += size
			start = i
			continue
		}
		if r == '\u2028' || r == '\u2029' {
			b = append(b, s[start:i]...)
			b = append(b, '\\', 'u', '2', '0', '2', hex[r&0xF])
			i += size
			start = i
			continue
		}
		i += size
	}
	b = append(b, s[start:]...)
	return append(b, '"')
}

// DeadLetterBody is the value of a dead-letter message: why the input was
// rejected, where it came from, and the input itself, byte for byte.
// Original holds the input when it is valid UTF-8; otherwise OriginalBase64
// holds it (standard base64), so that nothing is lost either way.
type DeadLetterBody struct {
	Reason         string           `json:"reason"`
	Field          string           `json:"field,omitempty"`
	Source         DeadLetterSource `json:"source"`
	Time           time.Time        `json:"time,omitzero"`
	Original       *string          `json:"original,omitempty"`
	OriginalBase64 string           `json:"original_base64,omitempty"`
}

// DeadLetterSource locates the rejected input message.
type DeadLetterSource struct {
	Topic     string `json:"topic"`
	Partition int32  `json:"partition"`
	Offset    int64  `json:"offset"`
}

// OriginalBytes returns the rejected input exactly as it was read.
func (b *DeadLetterBody) OriginalBytes() ([]byte, error) {
	if b.Original != nil {
		return []byte(*b.Original), nil
	}
	if b.OriginalBase64 == "" {
		return []byte{}, nil
	}
	return base64.StdEncoding.DecodeString(b.OriginalBase64)
}

// Dead-letter message headers. attain-reason repeats the body's reason and
// attain-reason-code its first word; attain-value says what the value is:
// "body" (a DeadLetterBody) or "original" (the input itself, when the body
// would have been too large to publish).
const (
	HeaderReason          = "attain-reason"
	HeaderReasonCode      = "attain-reason-code"
	HeaderField           = "attain-field"
	HeaderSourceTopic     = "attain-source-topic"
	HeaderSourcePartition = "attain-source-partition"
	HeaderSourceOffset    = "attain-source-offset"
	HeaderValue           = "attain-value"
)

// maxDeadLetterBody bounds the JSON body of a dead letter: above it the
// value is the original bytes alone (reason in the headers). 900 KiB keeps
// the message under Kafka's default message.max.bytes of 1 MiB (1048588)
// with room for the headers.
const maxDeadLetterBody = 900 << 10

func deadLetterMessage(dl *state.DeadLetter, topic string) (kafka.Message, error) {
	body := DeadLetterBody{
		Reason: dl.Reason, Field: dl.Field, Time: dl.At.UTC(),
		Source: DeadLetterSource{Topic: dl.Topic, Partition: dl.Partition, Offset: dl.Offset},
	}
	if utf8.Valid(dl.Raw) {
		s := string(dl.Raw)
		body.Original = &s
	} else {
		body.OriginalBase64 = base64.StdEncoding.EncodeToString(dl.Raw)
	}
	v, err := json.Marshal(body)
	if err != nil {
		return kafka.Message{}, fmt.Errorf("attain: encoding dead letter of %s/%d@%d: %w", dl.Topic, dl.Partition, dl.Offset, err)
	}
	what := "body"
	if len(v) > maxDeadLetterBody {
		v, what = dl.Raw, "original"
	}
	code := dl.Reason
	for i := 0; i < len(code); i++ {
		if code[i] == ':' {
			code = code[:i]
			break
		}
	}
	return kafka.Message{
		Topic: topic,
		Key:   dl.Key,
		Value: v,
		Headers: []kafka.Header{
			{Key: HeaderReason, Value: []byte(dl.Reason)},
			{Key: HeaderReasonCode, Value: []byte(code)},
			{Key: HeaderField, Value: []byte(dl.Field)},
			{Key: HeaderSourceTopic, Value: []byte(dl.Topic)},
			{Key: HeaderSourcePartition, Value: strconv.AppendInt(nil, int64(dl.Partition), 10)},
			{Key: HeaderSourceOffset, Value: strconv.AppendInt(nil, dl.Offset, 10)},
			{Key: HeaderValue, Value: []byte(what)},
			{Key: "content-type", Value: []byte(map[string]string{"body": "application/json", "original": "application/octet-stream"}[what])},
		},
		Time: dl.At,
	}, nil
}

// contentTypeCloudEvents is the content-type header of a structured-mode
// CloudEvent on Kafka (CloudEvents Kafka protocol binding, v1.0, 3.2).
const contentTypeCloudEvents = "application/cloudevents+json; charset=UTF-8"

func outputMessage(o *state.Output, topic, source string) (kafka.Message, error) {
	v, err := EncodeOutput(o, source)
	if err != nil {
		return kafka.Message{}, err
	}
	return kafka.Message{
		Topic:   topic,
		Key:     []byte(o.Learner),
		Value:   v,
		Headers: []kafka.Header{{Key: "content-type", Value: []byte(contentTypeCloudEvents)}},
		Time:    o.At,
	}, nil
}
