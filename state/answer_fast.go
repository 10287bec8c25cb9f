package state

import (
	"strings"
	"unicode/utf8"
)

// scanAnswer is the decoder's fast path: a single pass over an event of the
// common shape (a flat object whose strings have no escapes). It reports ok
// = false for anything else — escapes, nulls, duplicate or differently cased
// keys, malformed JSON — and the caller falls back to encoding/json, which
// then decides and explains. For every input where ok is true, the result
// equals encoding/json's (FuzzDecodeFastPath checks this).
//
// src is the whole event as one string: every field is a substring of it,
// so the fast path allocates only the skill list.
func scanAnswer(src string, f *fields) (ok bool) {
	s := scanner{b: src}
	s.ws()
	if !s.eat('{') {
		return false
	}
	s.ws()
	if s.eat('}') {
		return s.end()
	}
	for {
		s.ws()
		key, ok := s.key()
		if !ok {
			return false
		}
		s.ws()
		if !s.eat(':') {
			return false
		}
		s.ws()
		var bit uint8
		switch key {
		case "id":
			bit = hasID
			if f.id, ok = s.str(); !ok {
				return false
			}
		case "learner":
			bit = hasLearner
			if f.learner, ok = s.str(); !ok {
				return false
			}
		case "item":
			bit = hasItem
			if f.item, ok = s.str(); !ok {
				return false
			}
		case "at":
			bit = hasAt
			if f.at, ok = s.str(); !ok {
				return false
			}
		case "correct":
			bit = hasCorrect
			if f.correct, ok = s.boolean(); !ok {
				return false
			}
		case "skills":
			bit = hasSkills
			if !s.strArray(&f.skills) {
				return false
			}
		case "version":
			bit = hasVersion
			if f.version, ok = s.smallInt(); !ok {
				return false
			}
		default:
			if foldsToKnown(key) || !s.skipValue(0) {
				return false
			}
		}
		if f.has&bit != 0 {
			return false // a repeated key: let encoding/json decide
		}
		f.has |= bit
		s.ws()
		if s.eat(',') {
			continue
		}
		if s.eat('}') {
			return s.end()
		}
		return false
	}
}

// foldsToKnown reports whether key would match a known field under
// encoding/json's case-insensitive matching.
func foldsToKnown(key string) bool {
	for _, k := range [...]string{"id", "learner", "item", "at", "correct", "skills", "version"} {
		if strings.EqualFold(key, k) {
			return true
		}
	}
	// encoding/json also folds the Kelvin sign and long s; keys with
	// non-ASCII bytes go the slow way.
	for i := 0; i < len(key); i++ {
		if key[i] >= utf8.RuneSelf {
			return true
		}
	}
	return false
}

type scanner struct {
	b string
	i int
}

func (s *scanner) ws() {
	for s.i < len(s.b) {
		switch s.b[s.i] {
		case ' ', '\t', '\n', '\r':
			s.i++
		default:
			return
		}
	}
}

func (s *scanner) eat(c byte) bool {
	if s.i < len(s.b) && s.b[s.i] == c {
		s.i++
		return true
	}
	return false
}

func (s *scanner) end() bool {
	s.ws()
	return s.i == len(s.b)
}

// knownKeys are the field names of the native event, each with its
// closing quote, by first byte.
var knownKeys = [256][]string{
	'i': {`id"`, `item"`},
	'l': {`learner"`},
	's': {`skills"`},
	'c': {`correct"`},
	'a': {`at"`},
	'v': {`version"`},
}

// key reads an object key: one of the known field names without a scan
// for escapes, any other key as str does.
func (s *scanner) key() (string, bool) {
	if s.i+1 < len(s.b) && s.b[s.i] == '"' {
		rest := s.b[s.i+1:]
		for _, k := range knownKeys[rest[0]] {
			if strings.HasPrefix(rest, k) {
				s.i += 1 + len(k)
				return k[:len(k)-1], true
			}
		}
	}
	return s.str()
}

// str reads a string without escapes; control characters and invalid UTF-8
// send the event the slow way.
func (s *scanner) str() (string, bool) {
	if !s.eat('"') {
		return "", false
	}
	n := strings.IndexByte(s.b[s.i:], '"')
	if n < 0 {
		return "", false
	}
	v := s.b[s.i : s.i+n]
	ascii := true
	for i := 0; i < len(v); i++ {
		switch c := v[i]; {
		case c == '\\' || c < 0x20:
			return "", false
		case c >= utf8.RuneSelf:
			ascii = false
		}
	}
	if !ascii && !utf8.ValidString(v) {
		return "", false
	}
	s.i += n + 1
	return v, true
}

func (s *scanner) lit(word string) bool {
	if len(s.b)-s.i >= len(word) && s.b[s.i:s.i+len(word)] == word {
		s.i += len(word)
		return true
	}
	return false
}

func (s *scanner) boolean() (bool, bool) {
	if s.lit("true") {
		return true, true
	}
	if s.lit("false") {
		return false, true
	}
	return false, false
}

// smallInt reads a plain non-negative integer of at most 6 digits.
func (s *scanner) smallInt() (int, bool) {
	n, digits := 0, 0
	for s.i < len(s.b) && s.b[s.i] >= '0' && s.b[s.i] <= '9' && digits < 7 {
		n = n*10 + int(s.b[s.i]-'0')
		s.i++
		digits++
	}
	if digits == 0 || digits > 6 || (digits > 1 && s.b[s.i-digits] == '0') {
		return 0, false
	}
	if s.i < len(s.b) {
		switch s.b[s.i] {
		case '.', 'e', 'E':
			return 0, false
		}
	}
	return n, true
}

func (s *scanner) strArray(out *[]string) bool {
	if !s.eat('[') {
		return false
	}
	*out = (*out)[:0]
	s.ws()
	if s.eat(']') {
		if *out == nil {
			*out = []string{}
		}
		return true
	}
	for {
		s.ws()
		v, ok := s.str()
		if !ok {
			return false
		}
		*out = append(*out, v)
		s.ws()
		if s.eat(',') {
			continue
		}
		return s.eat(']')
	}
}

// skipValue skips one JSON value of an unknown field, strictly enough that
// anything it accepts is valid JSON.
func (s *scanner) skipValue(depth int) bool {
	if depth > 32 || s.i >= len(s.b) {
		return false
	}
	switch c := s.b[s.i]; {
	case c == '"':
		_, ok := s.str()
		return ok
	case c == '{':
		s.i++
		s.ws()
		if s.eat('}') {
			return true
		}
		for {
			s.ws()
			if _, ok := s.str(); !ok {
				return false
			}
			s.ws()
			if !s.eat(':') {
				return false
			}
			s.ws()
			if !s.skipValue(depth + 1) {
				return false
			}
			s.ws()
			if s.eat(',') {
				continue
			}
			return s.eat('}')
		}
	case c == '[':
		s.i++
		s.ws()
		if s.eat(']') {
			return true
		}
		for {
			s.ws()
			if !s.skipValue(depth + 1) {
				return false
			}
			s.ws()
			if s.eat(',') {
				continue
			}
			return s.eat(']')
		}
	case c == 't':
		return s.lit("true")
	case c == 'f':
		return s.lit("false")
	case c == 'n':
		return s.lit("null")
	case c == '-' || (c >= '0' && c <= '9'):
		return s.number()
	}
	return false
}

// number accepts exactly the JSON number grammar.
func (s *scanner) number() bool {
	s.eat('-')
	if s.eat('0') {
	} else if s.i < len(s.b) && s.b[s.i] >= '1' && s.b[s.i] <= '9' {
		for s.i < len(s.b) && s.b[s.i] >= '0' && s.b[s.i] <= '9' {
			s.i++
		}
	} else {
		return false
	}
	if s.eat('.') {
		if !s.digits() {
			return false
		}
	}
	if s.eat('e') || s.eat('E') {
		if !s.eat('+') {
			s.eat('-')
		}
		if !s.digits() {
			return false
		}
	}
	return true
}

func (s *scanner) digits() bool {
	start := s.i
	for s.i < len(s.b) && s.b[s.i] >= '0' && s.b[s.i] <= '9' {
		s.i++
	}
	return s.i > start
}
