package fitjob

import (
	"bufio"
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"os"

	"github.com/attain-dev/attain/state"
)

// LineError is one rejected line of a file of native answer events.
type LineError struct {
	Line   int    // 1-based
	Field  string // "" when the line as a whole is malformed
	Reason string
	Err    error // the decoder's error (wraps state.ErrBadAnswer)
}

func (e *LineError) Error() string {
	where := fmt.Sprintf("line %d", e.Line)
	if e.Field != "" {
		where += fmt.Sprintf(": field %q", e.Field)
	}
	return fmt.Sprintf("%s: %s; fix: %s", where, e.Reason, fixFor(e.Field))
}

func (e *LineError) Unwrap() error { return e.Err }

// fixFor says how to repair a rejected field of a native event.
func fixFor(field string) string {
	switch field {
	case "":
		return "each line must be one JSON object, a native version 1 answer event"
	case "id":
		return `give every answer a non-empty "id" string, unique per learner`
	case "learner":
		return `give the learner's id as a non-empty "learner" string`
	case "correct":
		return `set "correct" to true or false`
	case "at":
		return `set "at" to an RFC 3339 time such as "2025-03-04T19:30:00Z"`
	case "skills":
		return `tag the answer with its skills, e.g. "skills": ["trial-balance"]`
	case "item":
		return `add the item to the item map, or list its "skills" in the event`
	case "version":
		return `write version 1 events, or leave "version" out`
	}
	return fmt.Sprintf("correct the value of %q", field)
}

// ReadStats counts the lines of a file of native events.
type ReadStats struct {
	Lines    int // lines read, blank ones included
	Blank    int // empty or all-whitespace lines, ignored
	Answers  int // valid answers passed on
	Rejected int // lines that did not decode
}

// ReadAnswers decodes a stream of native v1 answer events, one JSON object
// per line. Valid answers go to fn in file order; a line that does not
// decode is passed to reject (when not nil), counted and skipped, so that
// one bad line loses nothing else. Blank lines are ignored. It stops at
// the first error of fn or of r, or when ctx ends.
func ReadAnswers(ctx context.Context, r io.Reader, dec *state.NativeDecoder, fn func(state.Answer) error, reject func(*LineError)) (ReadStats, error) {
	var st ReadStats
	br := bufio.NewReaderSize(r, 1<<16)
	var long []byte // a line longer than br's buffer, put together
	for {
		line, err := br.ReadSlice('\n')
		if err == bufio.ErrBufferFull {
			long = append(long[:0], line...)
			for err == bufio.ErrBufferFull {
				line, err = br.ReadSlice('\n')
				long = append(long, line...)
			}
			line = long
		}
		if len(line) > 0 {
			st.Lines++
			if st.Lines%4096 == 0 {
				if cerr := ctx.Err(); cerr != nil {
					return st, cerr
				}
			}
			if b := bytes.TrimSpace(line); len(b) == 0 {
				st.Blank++
			} else if a, derr := dec.Decode(b); derr != nil {
				st.Rejected++
				if reject != nil {
					le := &LineError{Line: st.Lines, Reason: derr.Error(), Err: derr}
					var ae *state.AnswerError
					if errors.As(derr, &ae) {
						le.Field, le.Reason = ae.Field, ae.Reason
					}
					reject(le)
				}
			} else {
				st.Answers++
				if ferr := fn(a); ferr != nil {
					return st, ferr
				}
			}
		}
		if err == io.EOF {
			return st, nil
		}
		if err != nil {
			return st, fmt.Errorf("attain: reading line %d: %w", st.Lines+1, err)
		}
	}
}

// FileSource reads native v1 answer events from a JSON-lines file ("-" is
// standard input). Within one learner, answers are passed on in file order;
// History orders them by `at`.
type FileSource struct {
	Path    string
	Decoder state.NativeDecoder
	// Reject, when set, is called for every line that does not decode.
	Reject func(*LineError)
	// Stats are the counts of the latest Answers call.
	Stats ReadStats
}

// Name is the file's path.
func (s *FileSource) Name() string { return s.Path }

// Answers reads the whole file; see ReadAnswers.
func (s *FileSource) Answers(ctx context.Context, fn func(state.Answer) error) error {
	var r io.Reader = os.Stdin
	if s.Path != "-" {
		f, err := os.Open(s.Path)
		if err != nil {
			return fmt.Errorf("attain: opening answers: %w", err)
		}
		defer f.Close()
		r = f
	}
	st, err := ReadAnswers(ctx, r, &s.Decoder, fn, s.Reject)
	s.Stats = st
	return err
}
