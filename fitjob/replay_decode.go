package fitjob

import (
	"math/bits"
	"strings"
	"time"
)

// The replay's own fast path for the lines of a file.
//
// state.NativeDecoder costs about a microsecond a line, mostly in copying
// the line into a string of its own, allocating the skill list and
// time.Parse; on two cores that alone would use half of the time budget of
// a million answers a second. Replay only needs the id, learner, skills,
// outcome and time of a valid event, so it reads the lines of the most
// common shape itself and gives every other line, untouched, to the
// configured NativeDecoder:
//
//   - the line is printable ASCII without a backslash (so no string holds
//     an escape, a control character or a multi-byte rune), and a flat JSON
//     object whose keys are id, learner, item, skills, correct, at, version
//     or other names that do not fold to one of those, each at most once;
//   - the values have the types the decoder wants, other fields are JSON
//     scalars, and the event passes every check the decoder makes (version
//     1, non-empty id, learner and skill names, a time that parses and that
//     the store can hold).
//
// On that subset the decoder accepts the event and returns exactly these
// fields (TestReplayFastDecode and FuzzReplayFastDecode compare the two),
// so the fast path changes the speed of a replay and nothing else: a line
// it does not take is decoded, accepted or rejected and explained by the
// decoder as before. The strings it returns are substrings of the line.

// fastAnswer is what fastDecode reads from one line.
type fastAnswer struct {
	id, learner string
	correct     bool
	at          int64 // Unix nanoseconds
	// atText is the time as written when it is exactly what appendUTC
	// would write for at (UTC, no trailing zero in the fraction), so that
	// the row can copy it; else "".
	atText string
}

// fastDecoder is fastDecode's state on one goroutine: the last date it
// read, since the lines of a file mostly share their date.
type fastDecoder struct {
	date [10]byte // "2025-09-01"
	days int64    // since 1970-01-01; valid when has
	has  bool
}

// Keys of the fields, as bits of fastDecode's "seen" set.
const (
	fastID = 1 << iota
	fastLearner
	fastItem
	fastSkills
	fastCorrect
	fastAt
	fastVersion
	fastRequired = fastID | fastLearner | fastSkills | fastCorrect | fastAt
)

// fastDecode reads line (already trimmed of surrounding white space),
// appending its skills to *skills; ok is false when the line is not of the
// shape described above, and *skills is then left as it was.
//
// Every byte of an accepted line is either checked by the parse (the
// structure, literals and numbers) or inside a string, which fastString
// checks for the bytes it refuses; there is no separate pass over the line.
func (fd *fastDecoder) decode(line string, skills *[]string) (a fastAnswer, ok bool) {
	n0 := len(*skills)
	fail := func() (fastAnswer, bool) {
		*skills = (*skills)[:n0]
		return fastAnswer{}, false
	}
	s := line
	i := 0
	if len(s) < 2 || s[0] != '{' || s[len(s)-1] != '}' {
		return a, false
	}
	i = skipSpaces(s, 1)
	seen := 0
	var at string
	if i < len(s) && s[i] == '}' {
		return a, false // {} misses every required field
	}
	for {
		key, j, ok := fastString(s, i)
		if !ok {
			return fail()
		}
		i = skipSpaces(s, j)
		if i >= len(s) || s[i] != ':' {
			return fail()
		}
		i = skipSpaces(s, i+1)
		bit := 0
		switch key {
		case "id":
			bit = fastID
			a.id, i, ok = fastString(s, i)
			ok = ok && a.id != ""
		case "learner":
			bit = fastLearner
			a.learner, i, ok = fastString(s, i)
			ok = ok && a.learner != ""
		case "item":
			bit = fastItem
			_, i, ok = fastString(s, i)
		case "at":
			bit = fastAt
			at, i, ok = fastString(s, i)
		case "correct":
			bit = fastCorrect
			switch {
			case strings.HasPrefix(s[i:], "true"):
				a.correct, i, ok = true, i+4, true
			case strings.HasPrefix(s[i:], "false"):
				a.correct, i, ok = false, i+5, true
			default:
				ok = false
			}
		case "skills":
			bit = fastSkills
			i, ok = fastSkillList(s, i, skills)
		case "version":
			// Only the supported version, written as the plain number 1; a
			// following digit, point or exponent fails at the delimiter.
			bit = fastVersion
			ok = i < len(s) && s[i] == '1'
			i++
		default:
			// encoding/json matches keys without regard to case.
			ok = !foldsToField(key)
			if ok {
				i, ok = skipScalar(s, i)
			}
		}
		if !ok || seen&bit != 0 {
			return fail()
		}
		seen |= bit
		i = skipSpaces(s, i)
		if i >= len(s) {
			return fail()
		}
		if s[i] == ',' {
			i = skipSpaces(s, i+1)
			continue
		}
		if s[i] == '}' && i == len(s)-1 {
			break
		}
		return fail()
	}
	if seen&fastRequired != fastRequired {
		return fail()
	}
	ns, canonical, ok := fd.parseAt(at)
	if !ok {
		return fail()
	}
	a.at = ns
	if canonical {
		a.atText = at
	}
	return a, true
}

// skipSpaces skips the spaces from s[i]; the other JSON white space (tab,
// line feed, carriage return) sends the line to the decoder.
func skipSpaces(s string, i int) int {
	for i < len(s) && s[i] == ' ' {
		i++
	}
	return i
}

// fastString reads the string starting at s[i] and returns it and the
// index after its closing quote. It refuses (ok = false) a string holding
// a backslash, a byte below 0x20 (which JSON does not allow unescaped) or
// a byte from 0x80 (a multi-byte rune, left to the decoder's UTF-8
// handling).
//
// Eight bytes at a time: in a word w, the classic zero-byte test
// (x−0x01…)&^x&0x80… flags the bytes of w equal to the one x was made
// with, and (w−0x20…)&^w&0x80… those below 0x20. Both can flag a byte
// above a flagged one (a borrow) but never below, so the lowest flag of
// each is exact, and the string ends well if the first quote comes before
// the first refused byte.
func fastString(s string, i int) (string, int, bool) {
	const (
		ones  = 0x0101010101010101
		highs = 0x8080808080808080
		space = 0x20 * ones
		quote = '"' * ones
		bsl   = '\\' * ones
	)
	if i >= len(s) || s[i] != '"' {
		return "", i, false
	}
	j := i + 1
	for ; j+8 <= len(s); j += 8 {
		t := s[j : j+8]
		w := uint64(t[0]) | uint64(t[1])<<8 | uint64(t[2])<<16 | uint64(t[3])<<24 |
			uint64(t[4])<<32 | uint64(t[5])<<40 | uint64(t[6])<<48 | uint64(t[7])<<56
		q, x := w^quote, w^bsl
		end := (q - ones) &^ q & highs
		bad := (w | (w-space)&^w | (x-ones)&^x) & highs
		if end|bad == 0 {
			continue
		}
		if bits.TrailingZeros64(bad) < bits.TrailingZeros64(end) {
			return "", i, false
		}
		n := j + bits.TrailingZeros64(end)/8
		return s[i+1 : n], n + 1, true
	}
	for ; j < len(s); j++ {
		switch c := s[j]; {
		case c == '"':
			return s[i+1 : j], j + 1, true
		case c < 0x20 || c >= 0x80 || c == '\\':
			return "", i, false
		}
	}
	return "", i, false
}

// fastSkillList reads a non-empty array of non-empty strings at s[i].
func fastSkillList(s string, i int, skills *[]string) (int, bool) {
	if i >= len(s) || s[i] != '[' {
		return i, false
	}
	i = skipSpaces(s, i+1)
	for {
		v, j, ok := fastString(s, i)
		if !ok || v == "" {
			return i, false
		}
		*skills = append(*skills, v)
		i = skipSpaces(s, j)
		if i >= len(s) {
			return i, false
		}
		switch s[i] {
		case ',':
			i = skipSpaces(s, i+1)
		case ']':
			return i + 1, true
		default:
			return i, false
		}
	}
}

// foldsToField reports whether key equals one of the event's field names
// under ASCII case folding (key is ASCII: fastString).
func foldsToField(key string) bool {
	for _, k := range [...]string{"id", "learner", "item", "at", "correct", "skills", "version"} {
		if strings.EqualFold(key, k) {
			return true
		}
	}
	return false
}

// skipScalar skips a JSON string, number, true, false or null at s[i];
// arrays and objects are left to the decoder.
func skipScalar(s string, i int) (int, bool) {
	if i >= len(s) {
		return i, false
	}
	switch c := s[i]; {
	case c == '"':
		_, j, ok := fastString(s, i)
		return j, ok
	case c == 't' && strings.HasPrefix(s[i:], "true"):
		return i + 4, true
	case c == 'f' && strings.HasPrefix(s[i:], "false"):
		return i + 5, true
	case c == 'n' && strings.HasPrefix(s[i:], "null"):
		return i + 4, true
	case c == '-' || (c >= '0' && c <= '9'):
		return skipNumber(s, i)
	}
	return i, false
}

// skipNumber accepts exactly the JSON number grammar.
func skipNumber(s string, i int) (int, bool) {
	digits := func(i int) (int, bool) {
		j := i
		for j < len(s) && s[j] >= '0' && s[j] <= '9' {
			j++
		}
		return j, j > i
	}
	if s[i] == '-' {
		i++
	}
	switch {
	case i < len(s) && s[i] == '0':
		i++
	case i < len(s) && s[i] >= '1' && s[i] <= '9':
		i, _ = digits(i)
	default:
		return i, false
	}
	ok := true
	if i < len(s) && s[i] == '.' {
		if i, ok = digits(i + 1); !ok {
			return i, false
		}
	}
	if i < len(s) && (s[i] == 'e' || s[i] == 'E') {
		i++
		if i < len(s) && (s[i] == '+' || s[i] == '-') {
			i++
		}
		if i, ok = digits(i); !ok {
			return i, false
		}
	}
	return i, true
}

// parseAt returns the Unix nanoseconds of at as time.Parse with
// time.RFC3339Nano reads it, and ok = false when it does not parse or is
// beyond what the store can hold (the decoder's path then rejects it). The
// usual form, "2025-09-01T18:00:40.8Z" with up to nine digits of fraction
// and a year well inside the storable range, is computed here (canonical
// when it is also how appendUTC writes the time); any other goes to
// time.Parse.
func (fd *fastDecoder) parseAt(at string) (ns int64, canonical, ok bool) {
	if ns, ok := fd.parseUTC(at); ok {
		return ns, len(at) == 20 || at[len(at)-2] != '0', true // no fraction, or one not ending in 0
	}
	t, err := time.Parse(time.RFC3339Nano, at)
	if err != nil || t.Before(minReplayAt) || t.After(maxReplayAt) {
		return 0, false, false
	}
	return t.UnixNano(), false, true
}

// parseUTC reads "YYYY-MM-DDTHH:MM:SS[.F]Z" (F one to nine digits, year
// 1700–2200) with time.Parse's range checks: month 1–12, a day of that
// month, hour ≤ 23, minute and second ≤ 59. The day count is the
// days-from-civil computation inverse to appendUTC's. TestReplayParseUTC
// checks it against time.Parse.
func (fd *fastDecoder) parseUTC(s string) (int64, bool) {
	if len(s) < 20 || len(s) > 30 || s[len(s)-1] != 'Z' || s[10] != 'T' || s[13] != ':' || s[16] != ':' {
		return 0, false
	}
	if !fd.has || string(fd.date[:]) != s[:10] {
		days, ok := civilDays(s[:10])
		if !ok {
			return 0, false
		}
		copy(fd.date[:], s[:10])
		fd.days, fd.has = days, true
	}
	hh, ok1 := digits2(s[11:13])
	mm, ok2 := digits2(s[14:16])
	ss, ok3 := digits2(s[17:19])
	if !(ok1 && ok2 && ok3) || hh > 23 || mm > 59 || ss > 59 {
		return 0, false
	}
	var nsec int64
	if frac := s[19 : len(s)-1]; frac != "" {
		if len(frac) < 2 || frac[0] != '.' {
			return 0, false
		}
		for k := 1; k < len(frac); k++ {
			c := frac[k]
			if c < '0' || c > '9' {
				return 0, false
			}
			nsec = nsec*10 + int64(c-'0')
		}
		for k := len(frac) - 1; k < 9; k++ {
			nsec *= 10
		}
	}
	return (fd.days*86400+hh*3600+mm*60+ss)*1e9 + nsec, true
}

// digits2 reads two decimal digits.
func digits2(s string) (int64, bool) {
	a, b := s[0]-'0', s[1]-'0'
	return int64(a)*10 + int64(b), a <= 9 && b <= 9
}

// civilDays returns the days from 1970-01-01 to the date "YYYY-MM-DD"
// (year 1700–2200, month 1–12, a day of that month).
func civilDays(s string) (int64, bool) {
	if s[4] != '-' || s[7] != '-' {
		return 0, false
	}
	y1, ok1 := digits2(s[0:2])
	y2, ok2 := digits2(s[2:4])
	m, ok3 := digits2(s[5:7])
	d, ok4 := digits2(s[8:10])
	y := y1*100 + y2
	if !(ok1 && ok2 && ok3 && ok4) || y < 1700 || y > 2200 || m < 1 || m > 12 || d < 1 {
		return 0, false
	}
	mdays := [...]int64{31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31}[m-1]
	if m == 2 && y%4 == 0 && (y%100 != 0 || y%400 == 0) {
		mdays = 29
	}
	if d > mdays {
		return 0, false
	}
	// days_from_civil (the years here are positive).
	if m <= 2 {
		y--
	}
	era := y / 400
	yoe := y - era*400
	mp := (m + 9) % 12 // March = 0
	doy := (153*mp+2)/5 + d - 1
	doe := yoe*365 + yoe/4 - yoe/100 + doy
	return era*146097 + doe - 719468, true
}
