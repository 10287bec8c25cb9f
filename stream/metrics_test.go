package stream

import (
	"bufio"
	"bytes"
	"fmt"
	"math"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"
)

// The checks below follow the Prometheus text exposition format, version
// 0.0.4 (prometheus.io/docs/instrumenting/exposition_formats/): metric
// names match [a-zA-Z_:][a-zA-Z0-9_:]*, label names [a-zA-Z_][a-zA-Z0-9_]*,
// label values are double-quoted with \\, \" and \n escapes, a value is a
// Go float or +Inf/-Inf/NaN, optionally followed by an integer timestamp;
// a HELP and a TYPE line precede a family's samples and TYPE appears at
// most once per family; a histogram's buckets carry an `le` label, are
// cumulative and end with le="+Inf", whose value equals _count.

var (
	metricNameRe = regexp.MustCompile(`^[a-zA-Z_:][a-zA-Z0-9_:]*$`)
	labelNameRe  = regexp.MustCompile(`^[a-zA-Z_][a-zA-Z0-9_]*$`)
)

type expoSample struct {
	name   string
	labels map[string]string
	value  float64
}

type expoFamily struct {
	name, typ, help string
	hasHelp         bool
	samples         []expoSample
}

// parseExposition parses text-format output strictly and returns its
// families in order, or the first problem found with its line number.
func parseExposition(text string) ([]*expoFamily, error) {
	var fams []*expoFamily
	byName := map[string]*expoFamily{}
	seenSeries := map[string]bool{}
	var cur *expoFamily
	family := func(name string) *expoFamily {
		f := byName[name]
		if f == nil {
			f = &expoFamily{name: name}
			byName[name] = f
			fams = append(fams, f)
		}
		return f
	}
	sc := bufio.NewScanner(strings.NewReader(text))
	n := 0
	for sc.Scan() {
		n++
		line := sc.Text()
		if strings.TrimSpace(line) == "" {
			continue
		}
		if strings.HasPrefix(line, "#") {
			fields := strings.SplitN(strings.TrimLeft(line[1:], " \t"), " ", 3)
			if len(fields) < 2 || (fields[0] != "HELP" && fields[0] != "TYPE") {
				continue // a plain comment
			}
			name := fields[1]
			if !metricNameRe.MatchString(name) {
				return nil, fmt.Errorf("line %d: bad metric name %q in %s line", n, name, fields[0])
			}
			f := family(name)
			if len(f.samples) > 0 {
				return nil, fmt.Errorf("line %d: %s for %s after its samples", n, fields[0], name)
			}
			rest := ""
			if len(fields) == 3 {
				rest = fields[2]
			}
			if fields[0] == "HELP" {
				if f.hasHelp {
					return nil, fmt.Errorf("line %d: second HELP for %s", n, name)
				}
				if err := checkHelpEscapes(rest); err != nil {
					return nil, fmt.Errorf("line %d: %v", n, err)
				}
				f.hasHelp, f.help = true, rest
			} else {
				if f.typ != "" {
					return nil, fmt.Errorf("line %d: second TYPE for %s", n, name)
				}
				switch rest {
				case "counter", "gauge", "histogram", "summary", "untyped":
				default:
					return nil, fmt.Errorf("line %d: unknown TYPE %q for %s", n, rest, name)
				}
				f.typ = rest
			}
			cur = f
			continue
		}
		s, err := parseSampleLine(line)
		if err != nil {
			return nil, fmt.Errorf("line %d: %v: %q", n, err, line)
		}
		fname := s.name
		if f := byName[fname]; f == nil || f.typ == "" {
			for _, suf := range []string{"_bucket", "_sum", "_count"} {
				if base, ok := strings.CutSuffix(s.name, suf); ok {
					if f := byName[base]; f != nil && (f.typ == "histogram" || f.typ == "summary") {
						fname = base
					}
				}
			}
		}
		f := byName[fname]
		if f == nil || f.typ == "" || !f.hasHelp {
			return nil, fmt.Errorf("line %d: sample %s without a preceding HELP and TYPE", n, s.name)
		}
		if f != cur {
			return nil, fmt.Errorf("line %d: sample of %s is not grouped with its family", n, fname)
		}
		key := s.name + "{" + canonicalLabels(s.labels) + "}"
		if seenSeries[key] {
			return nil, fmt.Errorf("line %d: duplicate series %s", n, key)
		}
		seenSeries[key] = true
		f.samples = append(f.samples, s)
	}
	if err := sc.Err(); err != nil {
		return nil, err
	}
	for _, f := range fams {
		if !f.hasHelp || f.typ == "" {
			return nil, fmt.Errorf("family %s lacks HELP or TYPE", f.name)
		}
		if f.typ == "histogram" {
			if err := checkHistogram(f); err != nil {
				return nil, err
			}
		}
	}
	return fams, nil
}

func checkHelpEscapes(s string) error {
	for i := 0; i < len(s); i++ {
		if s[i] == '\\' {
			if i+1 == len(s) || (s[i+1] != '\\' && s[i+1] != 'n') {
				return fmt.Errorf("bad escape in HELP %q", s)
			}
			i++
		}
	}
	return nil
}

// parseSampleLine parses `name{label="value",...} value [timestamp]`.
func parseSampleLine(line string) (expoSample, error) {
	s := expoSample{labels: map[string]string{}}
	i := 0
	for i < len(line) && line[i] != '{' && line[i] != ' ' && line[i] != '\t' {
		i++
	}
	s.name = line[:i]
	if !metricNameRe.MatchString(s.name) {
		return s, fmt.Errorf("bad metric name %q", s.name)
	}
	if i < len(line) && line[i] == '{' {
		i++
		for {
			if i < len(line) && line[i] == '}' {
				i++
				break
			}
			j := i
			for j < len(line) && line[j] != '=' {
				j++
			}
			if j == len(line) {
				return s, fmt.Errorf("label without '='")
			}
			lname := line[i:j]
			if !labelNameRe.MatchString(lname) {
				return s, fmt.Errorf("bad label name %q", lname)
			}
			if j+1 >= len(line) || line[j+1] != '"' {
				return s, fmt.Errorf("label %s value not quoted", lname)
			}
			var val strings.Builder
			k := j + 2
			closed := false
			for k < len(line) {
				c := line[k]
				if c == '\\' {
					if k+1 == len(line) {
						return s, fmt.Errorf("dangling escape in label %s", lname)
					}
					switch line[k+1] {
					case '\\':
						val.WriteByte('\\')
					case '"':
						val.WriteByte('"')
					case 'n':
						val.WriteByte('\n')
					default:
						return s, fmt.Errorf("bad escape \\%c in label %s", line[k+1], lname)
					}
					k += 2
					continue
				}
				if c == '"' {
					closed = true
					k++
					break
				}
				val.WriteByte(c)
				k++
			}
			if !closed {
				return s, fmt.Errorf("unterminated value of label %s", lname)
			}
			if _, dup := s.labels[lname]; dup {
				return s, fmt.Errorf("label %s repeated", lname)
			}
			s.labels[lname] = val.String()
			i = k
			if i < len(line) && line[i] == ',' {
				i++
				continue
			}
			if i < len(line) && line[i] == '}' {
				i++
				break
			}
			return s, fmt.Errorf("expected ',' or '}' after label %s", lname)
		}
	}
	rest := strings.Fields(line[i:])
	if i == len(line) || (line[i] != ' ' && line[i] != '\t') || len(rest) < 1 || len(rest) > 2 {
		return s, fmt.Errorf("want ' value [timestamp]' after the name and labels")
	}
	v, err := parseExpoFloat(rest[0])
	if err != nil {
		return s, err
	}
	s.value = v
	if len(rest) == 2 {
		if _, err := strconv.ParseInt(rest[1], 10, 64); err != nil {
			return s, fmt.Errorf("bad timestamp %q", rest[1])
		}
	}
	return s, nil
}

func parseExpoFloat(t string) (float64, error) {
	switch t {
	case "+Inf":
		return math.Inf(1), nil
	case "-Inf":
		return math.Inf(-1), nil
	case "NaN":
		return math.NaN(), nil
	}
	v, err := strconv.ParseFloat(t, 64)
	if err != nil || math.IsInf(v, 0) || math.IsNaN(v) {
		return 0, fmt.Errorf("value %q does not parse as a float", t)
	}
	return v, nil
}

func canonicalLabels(l map[string]string) string {
	keys := make([]string, 0, len(l))
	for k := range l {
		keys = append(keys, k)
	}
	slices.Sort(keys)
	var b strings.Builder
	for _, k := range keys {
		fmt.Fprintf(&b, "%s=%q,", k, l[k])
	}
	return b.String()
}

func checkHistogram(f *expoFamily) error {
	var buckets []expoSample
	var count, sum *expoSample
	for i := range f.samples {
		s := &f.samples[i]
		switch s.name {
		case f.name + "_bucket":
			if _, ok := s.labels["le"]; !ok {
				return fmt.Errorf("%s: bucket without le", f.name)
			}
			buckets = append(buckets, *s)
		case f.name + "_count":
			count = s
		case f.name + "_sum":
			sum = s
		default:
			return fmt.Errorf("%s: unexpected sample %s in a histogram", f.name, s.name)
		}
	}
	if count == nil || sum == nil || len(buckets) == 0 {
		return fmt.Errorf("%s: histogram needs buckets, _sum and _count", f.name)
	}
	prevLe, prevV := math.Inf(-1), 0.0
	for _, b := range buckets {
		le, err := parseExpoFloat(b.labels["le"])
		if err != nil {
			return fmt.Errorf("%s: le %q: %v", f.name, b.labels["le"], err)
		}
		if le <= prevLe {
			return fmt.Errorf("%s: le %q not increasing", f.name, b.labels["le"])
		}
		if b.value < prevV {
			return fmt.Errorf("%s: bucket le=%q = %v below the previous %v: not cumulative", f.name, b.labels["le"], b.value, prevV)
		}
		prevLe, prevV = le, b.value
	}
	last := buckets[len(buckets)-1]
	if last.labels["le"] != "+Inf" {
		return fmt.Errorf("%s: last bucket is le=%q, not +Inf", f.name, last.labels["le"])
	}
	if last.value != count.value {
		return fmt.Errorf("%s: +Inf bucket %v != _count %v", f.name, last.value, count.value)
	}
	return nil
}

func findSample(t *testing.T, fams []*expoFamily, name string, labels map[string]string) float64 {
	t.Helper()
	want := canonicalLabels(labels)
	for _, f := range fams {
		for _, s := range f.samples {
			if s.name == name && canonicalLabels(s.labels) == want {
				return s.value
			}
		}
	}
	t.Fatalf("no sample %s{%s}", name, want)
	return 0
}

// The parser must reject each of these, or the passing test below proves
// nothing.
func TestExpositionParserRejects(t *testing.T) {
	const ok = "# HELP a_total A.\n# TYPE a_total counter\na_total 1\n"
	if _, err := parseExposition(ok); err != nil {
		t.Fatalf("well-formed input rejected: %v", err)
	}
	hist := func(b1, b2, inf, count string) string {
		return "# HELP h H.\n# TYPE h histogram\n" +
			`h_bucket{le="0.1"} ` + b1 + "\n" + `h_bucket{le="1"} ` + b2 + "\n" +
			`h_bucket{le="+Inf"} ` + inf + "\nh_sum 0.5\nh_count " + count + "\n"
	}
	if _, err := parseExposition(hist("1", "2", "3", "3")); err != nil {
		t.Fatalf("well-formed histogram rejected: %v", err)
	}
	bad := map[string]string{
		"name starts with digit":   "# HELP 1a A.\n# TYPE 1a counter\n1a 1\n",
		"name with dash":           "# HELP a-b A.\n# TYPE a-b gauge\na-b 1\n",
		"no TYPE":                  "# HELP a A.\na 1\n",
		"no HELP":                  "# TYPE a gauge\na 1\n",
		"bad type":                 "# HELP a A.\n# TYPE a meter\na 1\n",
		"value not a float":        ok + "# HELP b B.\n# TYPE b gauge\nb one\n",
		"no value":                 "# HELP a A.\n# TYPE a gauge\na\n",
		"unquoted label":           "# HELP a A.\n# TYPE a gauge\na{p=3} 1\n",
		"unterminated label":       "# HELP a A.\n# TYPE a gauge\na{p=\"3} 1\n",
		"bad label name":           "# HELP a A.\n# TYPE a gauge\na{3p=\"3\"} 1\n",
		"bad label escape":         "# HELP a A.\n# TYPE a gauge\na{p=\"\\t\"} 1\n",
		"duplicate series":         "# HELP a A.\n# TYPE a gauge\na{p=\"1\"} 1\na{p=\"1\"} 2\n",
		"not grouped":              ok + "# HELP b B.\n# TYPE b gauge\nb 1\na_total 2\n",
		"not cumulative":           hist("2", "1", "3", "3"),
		"+Inf differs from count":  hist("1", "2", "3", "4"),
		"no +Inf bucket":           "# HELP h H.\n# TYPE h histogram\nh_bucket{le=\"1\"} 1\nh_sum 1\nh_count 1\n",
		"bad timestamp":            "# HELP a A.\n# TYPE a gauge\na 1 soon\n",
		"bad HELP escape":          "# HELP a A \\x.\n# TYPE a gauge\na 1\n",
		"TYPE after samples":       "# HELP a A.\n# TYPE a gauge\na 1\n# TYPE a gauge\n",
		"trailing junk after name": "# HELP a A.\n# TYPE a gauge\na{p=\"1\"}x 1\n",
	}
	for name, text := range bad {
		if _, err := parseExposition(text); err == nil {
			t.Errorf("%s: parser accepted %q", name, text)
		}
	}
}

func TestWritePrometheus(t *testing.T) {
	m := NewMetrics()
	m.Consumed.Add(7)
	m.Applied.Add(5)
	m.Duplicates.Add(1)
	m.Late.Add(2)
	m.DeadLettered.Add(1)
	m.Rederived.Add(4)
	m.PublishedReached.Add(3)
	m.PublishedStuck.Add(2)
	m.PublishedDeadLetters.Add(1)
	m.Commits.Add(6)
	m.Committed.Add(8)
	m.SkippedOffsets.Add(9)
	m.ParamsVersion.Store(3)
	m.ParamsSwaps.Add(2)
	// Observations below, exactly on, between and above the bounds.
	for _, d := range []time.Duration{
		300 * time.Microsecond, // ≤ 0.0005
		time.Millisecond,       // exactly 0.001: le is "less than or equal"
		7 * time.Millisecond,   // ≤ 0.01
		3 * time.Second,        // above 2.5: +Inf only
	} {
		m.ObserveCommit(d)
	}
	for _, d := range []time.Duration{80 * time.Millisecond, 130 * time.Millisecond, 90 * time.Millisecond} {
		m.ObserveBatchAge(d) // the largest is kept
	}
	m.SetAssigned([]int32{3, 0, 11})
	m.SetResumed(0)
	m.SetLag(3, 42)
	m.SetLag(11, 0)
	m.SetLag(7, 99) // not assigned: ignored

	var buf bytes.Buffer
	m.WritePrometheus(&buf, 17)
	fams, err := parseExposition(buf.String())
	if err != nil {
		t.Fatalf("output does not parse: %v\n%s", err, buf.String())
	}
	for _, f := range fams {
		if f.typ == "counter" && !strings.HasSuffix(f.name, "_total") {
			t.Errorf("counter %s does not end in _total", f.name)
		}
		if !strings.HasPrefix(f.name, "attain_") {
			t.Errorf("family %s lacks the attain_ prefix", f.name)
		}
	}
	none := map[string]string(nil)
	for name, want := range map[string]float64{
		"attain_messages_consumed_total":       7,
		"attain_answers_applied_total":         5,
		"attain_answers_duplicate_total":       1,
		"attain_answers_late_total":            2,
		"attain_messages_deadlettered_total":   1,
		"attain_records_rederived_total":       4,
		"attain_deadletters_published_total":   1,
		"attain_commits_total":                 6,
		"attain_batch_age_max_seconds":         0.13,
		"attain_messages_committed_total":      8,
		"attain_offsets_skipped_total":         9,
		"attain_outbox_depth":                  17,
		"attain_params_version":                3,
		"attain_params_swaps_total":            2,
		"attain_partitions_assigned":           3,
		"attain_partitions_resumed":            1,
		"attain_ready":                         0,
		"attain_commit_duration_seconds_count": 4,
	} {
		if got := findSample(t, fams, name, none); got != want {
			t.Errorf("%s = %v, want %v", name, got, want)
		}
	}
	if got := findSample(t, fams, "attain_mastery_events_published_total", map[string]string{"kind": "reached"}); got != 3 {
		t.Errorf("reached published = %v, want 3", got)
	}
	if got := findSample(t, fams, "attain_mastery_events_published_total", map[string]string{"kind": "stuck"}); got != 2 {
		t.Errorf("stuck published = %v, want 2", got)
	}
	for le, want := range map[string]float64{"0.0005": 1, "0.001": 2, "0.0025": 2, "0.005": 2, "0.01": 3, "2.5": 3, "+Inf": 4} {
		if got := findSample(t, fams, "attain_commit_duration_seconds_bucket", map[string]string{"le": le}); got != want {
			t.Errorf("bucket le=%s = %v, want %v", le, got, want)
		}
	}
	if got, want := findSample(t, fams, "attain_commit_duration_seconds_sum", none), 0.0003+0.001+0.007+3; math.Abs(got-want) > 1e-12 {
		t.Errorf("_sum = %v, want %v", got, want)
	}
	if got := findSample(t, fams, "attain_consumer_lag", map[string]string{"partition": "3"}); got != 42 {
		t.Errorf(`lag{partition="3"} = %v, want 42`, got)
	}
	if got := findSample(t, fams, "attain_consumer_lag", map[string]string{"partition": "11"}); got != 0 {
		t.Errorf(`lag{partition="11"} = %v, want 0`, got)
	}
	if strings.Contains(buf.String(), `partition="7"`) {
		t.Errorf("lag of unassigned partition 7 was exported")
	}

	// A new generation drops the lag of partitions it no longer holds.
	m.SetAssigned([]int32{11})
	buf.Reset()
	m.WritePrometheus(&buf, 0)
	if _, err := parseExposition(buf.String()); err != nil {
		t.Fatalf("output does not parse: %v", err)
	}
	if strings.Contains(buf.String(), `partition="3"`) {
		t.Errorf("lag of revoked partition 3 still exported")
	}
}

func TestReadiness(t *testing.T) {
	m := NewMetrics()
	step := func(what string, want bool) {
		t.Helper()
		ok, reason := m.readiness()
		if ok != want || m.Ready() != want {
			t.Fatalf("%s: ready = %v (%q), want %v", what, ok, reason, want)
		}
		if !ok && reason == "" {
			t.Fatalf("%s: not ready without a reason", what)
		}
	}
	step("before any generation", false)
	m.SetAssigned([]int32{0, 1})
	step("assigned, none resumed", false)
	m.SetResumed(0)
	step("one of two resumed", false)
	if _, reason := m.readiness(); !strings.Contains(reason, "1 of 2") || !strings.Contains(reason, ": 1") {
		t.Errorf("reason %q does not name the waiting partition", reason)
	}
	m.SetResumed(5) // not assigned
	step("unassigned partition resumed", false)
	m.SetResumed(1)
	step("all resumed", true)
	m.SetAssigned([]int32{1, 2})
	step("new generation resets resumed", false)
	m.SetResumed(1)
	m.SetResumed(2)
	step("new generation all resumed", true)
	m.SetAssigned(nil)
	step("member with no partitions", true)
}

// Run with -race: counters, histogram, gauges and rendering at once.
func TestMetricsConcurrent(t *testing.T) {
	m := NewMetrics()
	const workers, per = 4, 500
	var wg sync.WaitGroup
	for w := range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range per {
				m.Consumed.Add(1)
				m.Applied.Add(1)
				m.ObserveCommit(time.Duration(i) * time.Microsecond)
				m.SetLag(int32(w), int64(i))
				m.SetResumed(int32(w))
			}
		}()
	}
	stop := make(chan struct{})
	var rwg sync.WaitGroup
	rwg.Add(1)
	go func() {
		defer rwg.Done()
		for {
			select {
			case <-stop:
				return
			default:
			}
			m.SetAssigned([]int32{0, 1, 2, 3})
			var buf bytes.Buffer
			m.WritePrometheus(&buf, 1)
			if _, err := parseExposition(buf.String()); err != nil {
				t.Errorf("concurrent output does not parse: %v", err)
				return
			}
		}
	}()
	wg.Wait()
	close(stop)
	rwg.Wait()

	var buf bytes.Buffer
	m.WritePrometheus(&buf, 0)
	fams, err := parseExposition(buf.String())
	if err != nil {
		t.Fatal(err)
	}
	if got := findSample(t, fams, "attain_commit_duration_seconds_count", nil); got != workers*per {
		t.Errorf("_count = %v, want %d", got, workers*per)
	}
	if got := m.Consumed.Load(); got != workers*per {
		t.Errorf("Consumed = %d, want %d", got, workers*per)
	}
}

func BenchmarkObserveCommit(b *testing.B) {
	m := NewMetrics()
	for i := 0; b.Loop(); i++ {
		m.ObserveCommit(time.Duration(i%5000) * time.Microsecond)
	}
}

func BenchmarkWritePrometheus(b *testing.B) {
	m := NewMetrics()
	ps := make([]int32, 64)
	for i := range ps {
		ps[i] = int32(i)
	}
	m.SetAssigned(ps)
	for _, p := range ps {
		m.SetLag(p, int64(p))
	}
	var buf bytes.Buffer
	for b.Loop() {
		buf.Reset()
		m.WritePrometheus(&buf, 10)
	}
}
