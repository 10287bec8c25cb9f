package config

import (
	"reflect"
	"slices"
	"strconv"
	"strings"
	"time"
)

// key is one leaf setting of Config: its key path in the file, its
// environment variable, its flag (if any) and where it lives in the struct.
type key struct {
	path    string // "batch.interval"
	env     string // "ATTAIN_BATCH_INTERVAL"
	flag    string // "brokers", or "" when there is no flag
	index   []int  // reflect field index path from Config
	typ     reflect.Type
	meaning string
}

// meanings documents every key; keys() refuses a key without one, and the
// tests check that this table and the struct agree.
var meanings = map[string]string{
	"brokers":                     "Kafka bootstrap addresses (host:port list). Empty: start the embedded broker at embedded_broker_addr.",
	"data_dir":                    "Directory of the Pebble store (state, history, offsets, outbox).",
	"http_addr":                   `Listen address of the HTTP API (/v1/learners, /healthz, /readyz, /metrics). "" disables it.`,
	"http_token":                  "Bearer token required on /v1/* when set. Prefer the environment variable to the file.",
	"params":                      "Parameter file (JSON) to start from; must exist when set. Empty: the built-in default set.",
	"params_from_topic":           "Read the params topic to its end at start and follow it, so refits by any instance reach every instance.",
	"items_file":                  `Item-to-skills map (Q-matrix), JSON {"item": ["skill", ...]}, for answers that name an item but no skills; must exist when set.`,
	"embedded_broker_addr":        "Listen address of the embedded broker, used when brokers is empty.",
	"topics.answers":              "Input topic of answer events, keyed by learner.",
	"topics.mastery":              "Output topic of reached/stuck events.",
	"topics.params":               "Compacted topic of parameter sets, key = skill.",
	"topics.deadletter":           "Topic that receives undecodable or invalid input with the reason.",
	"topics.partitions":           "Partition count used when attain creates the topics itself (embedded broker).",
	"consumer.group":              "Kafka consumer group of the processors.",
	"consumer.start":              "Where a partition with no stored offset starts: earliest or latest.",
	"consumer.max_event_bytes":    "Largest accepted answer event in bytes; larger ones are dead-lettered.",
	"consumer.dedupe_window":      "Applied answer ids remembered per learner, to skip redelivered answers.",
	"consumer.session_timeout":    "Time without a heartbeat after which the group coordinator declares an instance dead and gives its partitions to the others.",
	"consumer.heartbeat_interval": "Time between an instance's heartbeats to the group coordinator; less than consumer.session_timeout (a third of it or less is common practice).",
	"batch.interval":              "Longest time between state commits while answers arrive.",
	"batch.max_answers":           "Answers after which a state commit happens without waiting for batch.interval.",
	"cache.records":               "Write-through cache of learner-skill records (Go heap), in records; at least 1.",
	"cache.block_cache_mb":        "Pebble's cache in MiB, its memtables (a third of it, up to 64 MiB) included. With cgo this memory is outside the Go heap and GOMEMLIMIT.",
	"model.threshold":             "Mastery threshold: mastered when P(L next) is at least this.",
	"model.stuck_after":           "Opportunities without ever reaching mastery after which one stuck event is sent.",
	"producer.balancer":           "Key-to-partition mapping of the output producer: murmur2 (as the Java client) or crc32 (as librdkafka).",
	"refit.interval":              "Time between refits inside attain run; 0 = no timed refit.",
	"refit.answers":               "Answers applied since the last refit that trigger a refit; 0 = off.",
	"refit.min_learners":          "Learners a skill needs before it is refitted.",
	"refit.min_answers":           "Answers a skill needs before it is refitted.",
	"refit.margin":                "Held-out log-loss improvement a refitted skill needs to replace the parameters in force.",
	"refit.folds":                 "Folds of learner-wise cross-validation used to score a refit.",
	"log.level":                   "Log level: trace, debug, info, warn, error, fatal, panic or disabled.",
	"log.format":                  "Log format: json, console, or auto (console on a terminal, JSON otherwise).",
}

// flagNames are the keys that also have a flag (RegisterFlags).
var flagNames = map[string]string{
	"brokers":              "brokers",
	"data_dir":             "data-dir",
	"http_addr":            "http-addr",
	"params":               "params",
	"embedded_broker_addr": "embedded-broker-addr",
}

// envConfig names the config file; it is the one ATTAIN_ variable that is
// not a key.
const envConfig = "ATTAIN_CONFIG"

var (
	allKeys  = buildKeys()
	byPath   = index(allKeys, func(k *key) string { return k.path })
	byEnv    = index(allKeys, func(k *key) string { return k.env })
	durType  = reflect.TypeFor[time.Duration]()
	listType = reflect.TypeFor[[]string]()
)

func index(ks []*key, name func(*key) string) map[string]*key {
	m := make(map[string]*key, len(ks))
	for _, k := range ks {
		m[name(k)] = k
	}
	return m
}

// buildKeys walks Config by its yaml tags, in field order.
func buildKeys() []*key {
	var ks []*key
	var walk func(t reflect.Type, prefix string, idx []int)
	walk = func(t reflect.Type, prefix string, idx []int) {
		for i := range t.NumField() {
			f := t.Field(i)
			name, _, _ := strings.Cut(f.Tag.Get("yaml"), ",")
			if name == "" || name == "-" {
				continue
			}
			path := prefix + name
			fi := append(slices.Clone(idx), i)
			if f.Type.Kind() == reflect.Struct && f.Type != durType {
				walk(f.Type, path+".", fi)
				continue
			}
			m, ok := meanings[path]
			if !ok {
				panic("config: key " + path + " has no entry in meanings")
			}
			ks = append(ks, &key{
				path:    path,
				env:     "ATTAIN_" + strings.ToUpper(strings.ReplaceAll(path, ".", "_")),
				flag:    flagNames[path],
				index:   fi,
				typ:     f.Type,
				meaning: m,
			})
		}
	}
	walk(reflect.TypeFor[Config](), "", nil)
	return ks
}

// field returns the addressable field of c that k names.
func (k *key) field(c *Config) reflect.Value {
	return reflect.ValueOf(c).Elem().FieldByIndex(k.index)
}

// parse converts the text of an environment variable or flag to k's type.
// Lists are comma-separated (blanks around items dropped, empty items
// ignored), bools follow strconv.ParseBool.
func (k *key) parse(s string) (reflect.Value, error) {
	v := reflect.New(k.typ).Elem()
	switch {
	case k.typ == durType:
		d, err := time.ParseDuration(strings.TrimSpace(s))
		if err != nil {
			return v, err
		}
		v.SetInt(int64(d))
	case k.typ == listType:
		var items []string
		for it := range strings.SplitSeq(s, ",") {
			if it = strings.TrimSpace(it); it != "" {
				items = append(items, it)
			}
		}
		v.Set(reflect.ValueOf(items))
	default:
		switch k.typ.Kind() {
		case reflect.String:
			v.SetString(s)
		case reflect.Bool:
			b, err := strconv.ParseBool(strings.TrimSpace(s))
			if err != nil {
				return v, err
			}
			v.SetBool(b)
		case reflect.Int:
			n, err := strconv.ParseInt(strings.TrimSpace(s), 10, strconv.IntSize)
			if err != nil {
				return v, err
			}
			v.SetInt(n)
		case reflect.Float64:
			f, err := strconv.ParseFloat(strings.TrimSpace(s), 64)
			if err != nil {
				return v, err
			}
			v.SetFloat(f)
		default:
			panic("config: key " + k.path + " has unsupported type " + k.typ.String())
		}
	}
	return v, nil
}

// kind describes k's type in an error message ("a duration").
func (k *key) kind() string {
	switch {
	case k.typ == durType:
		return "a duration"
	case k.typ == listType:
		return "a list"
	}
	switch k.typ.Kind() {
	case reflect.Bool:
		return "true or false"
	case reflect.Int:
		return "an integer"
	case reflect.Float64:
		return "a number"
	}
	return "a string"
}

// example is a valid value for k in a fix, in the syntax of an environment
// variable or flag: the default when it says something, else a sample.
func (k *key) example() string {
	def := Default()
	v := k.field(&def)
	switch {
	case k.typ == durType:
		if v.Int() == 0 {
			return "a Go duration such as 1h (0 turns it off)"
		}
		return "a Go duration such as " + time.Duration(v.Int()).String()
	case k.typ == listType:
		return "a comma-separated list such as kafka-1:9092,kafka-2:9092"
	}
	switch k.typ.Kind() {
	case reflect.Bool:
		return "true or false"
	case reflect.Int:
		return "an integer such as " + strconv.FormatInt(v.Int(), 10)
	case reflect.Float64:
		return "a number such as " + strconv.FormatFloat(v.Float(), 'g', -1, 64)
	}
	return "a string"
}

// yamlExample is a valid value for k in the file's syntax.
func (k *key) yamlExample() string {
	if k.typ == listType {
		return "a list such as [kafka-1:9092, kafka-2:9092]"
	}
	return k.example()
}

// format renders a value for documentation and flag defaults.
func format(v reflect.Value) string {
	switch {
	case v.Type() == durType:
		return time.Duration(v.Int()).String()
	case v.Type() == listType:
		return strings.Join(v.Interface().([]string), ",")
	}
	switch v.Kind() {
	case reflect.Bool:
		return strconv.FormatBool(v.Bool())
	case reflect.Int:
		return strconv.FormatInt(v.Int(), 10)
	case reflect.Float64:
		return strconv.FormatFloat(v.Float(), 'g', -1, 64)
	}
	return v.String()
}

// closest returns the candidate nearest to s by edit distance, if it is
// close enough to be a likely typo: at most 2 edits, or a third of the
// candidate's length for long names (common practice for "did you mean").
func closest(s string, candidates []string) (string, bool) {
	best, bestD := "", -1
	for _, c := range candidates {
		d := distance(strings.ToLower(s), strings.ToLower(c))
		if bestD < 0 || d < bestD {
			best, bestD = c, d
		}
	}
	if bestD < 0 || bestD > max(2, len(best)/3) {
		return "", false
	}
	return best, true
}

// distance is the Levenshtein edit distance (insert, delete, substitute).
func distance(a, b string) int {
	ra, rb := []rune(a), []rune(b)
	prev := make([]int, len(rb)+1)
	cur := make([]int, len(rb)+1)
	for j := range prev {
		prev[j] = j
	}
	for i := 1; i <= len(ra); i++ {
		cur[0] = i
		for j := 1; j <= len(rb); j++ {
			cost := 1
			if ra[i-1] == rb[j-1] {
				cost = 0
			}
			cur[j] = min(prev[j]+1, cur[j-1]+1, prev[j-1]+cost)
		}
		prev, cur = cur, prev
	}
	return prev[len(rb)]
}

// quote renders user text in a message, shortened so that a huge value
// does not flood the log.
func quote(s string) string {
	const maxLen = 60
	if r := []rune(s); len(r) > maxLen {
		s = string(r[:maxLen]) + "…"
	}
	return strconv.Quote(s)
}

// keyError builds a KeyError.
func keyError(key, problem, fix string) *KeyError {
	return &KeyError{Key: key, Problem: problem, Fix: fix}
}
