package config

import (
	"errors"
	"os"
	"path/filepath"
	"reflect"
	"slices"
	"strings"
	"testing"
	"time"
)

const fixtures = "../testdata/config"

// keyErrors flattens a joined error into its *KeyError parts.
func keyErrors(t *testing.T, err error) []*KeyError {
	t.Helper()
	var out []*KeyError
	var walk func(error)
	walk = func(e error) {
		var ke *KeyError
		if errors.As(e, &ke) && ke == e {
			out = append(out, ke)
			return
		}
		if j, ok := e.(interface{ Unwrap() []error }); ok {
			for _, x := range j.Unwrap() {
				walk(x)
			}
			return
		}
		t.Errorf("error %q is not a *KeyError", e)
	}
	walk(err)
	return out
}

// loadAndValidate is what a command does: Load, then Validate.
func loadAndValidate(path string, environ []string) (Config, error) {
	c, err := Load(path, environ, nil)
	if err != nil {
		return c, err
	}
	return c, c.Validate()
}

func TestGoodFixtures(t *testing.T) {
	files, err := filepath.Glob(filepath.Join(fixtures, "*.good.yml"))
	if err != nil || len(files) < 5 {
		t.Fatalf("good fixtures: %v, %v", files, err)
	}
	// The example configuration a platform team starts from is a good
	// fixture too.
	files = append(files, "../deploy/attain.yaml")
	for _, f := range files {
		t.Run(filepath.Base(f), func(t *testing.T) {
			if _, err := loadAndValidate(f, nil); err != nil {
				t.Fatalf("want valid, got:\n%v", err)
			}
		})
	}
}

func TestFullFixtureValues(t *testing.T) {
	got, err := loadAndValidate(filepath.Join(fixtures, "full.good.yml"), nil)
	if err != nil {
		t.Fatal(err)
	}
	want := Config{
		Brokers:            []string{"kafka-1:9092", "kafka-2.internal:19092", "[::1]:9093"},
		DataDir:            "/srv/attain/store",
		HTTPAddr:           ":9000",
		HTTPToken:          "s3cret-token",
		ParamsFromTopic:    true,
		EmbeddedBrokerAddr: "127.0.0.1:0",
		Topics:             Topics{Answers: "harbour-lane.answers", Mastery: "harbour-lane.mastery", Params: "harbour-lane.params", DeadLetter: "harbour-lane.deadletter", Partitions: 12},
		Consumer:           Consumer{Group: "attain-harbour-lane", Start: "latest", MaxEventBytes: 1 << 20, DedupeWindow: 64, SessionTimeout: 45 * time.Second, HeartbeatInterval: 5 * time.Second},
		Batch:              Batch{Interval: 250 * time.Millisecond, MaxAnswers: 500},
		Cache:              Cache{Records: 1000, BlockCacheMB: 256},
		Model:              Model{Threshold: 0.9, StuckAfter: 15},
		Producer:           Producer{Balancer: "crc32"},
		Refit:              Refit{Interval: 90 * time.Minute, Answers: 100000, MinLearners: 20, MinAnswers: 200, Margin: 0.002, Folds: 10},
		Log:                Log{Level: "debug", Format: "json"},
	}
	if !reflect.DeepEqual(got, want) {
		t.Fatalf("loaded\n%+v\nwant\n%+v", got, want)
	}
	// Every leaf differs from its default, so the fixture exercises every
	// key (params and items_file excepted: they must name real files).
	def := Default()
	for _, k := range allKeys {
		if k.path == "params" || k.path == "items_file" {
			continue
		}
		if reflect.DeepEqual(k.field(&got).Interface(), k.field(&def).Interface()) {
			t.Errorf("full.good.yml leaves %s at its default", k.path)
		}
	}
}

func TestSpecialGoodFixtures(t *testing.T) {
	c, err := loadAndValidate(filepath.Join(fixtures, "nulls.good.yml"), nil)
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(c, Default()) {
		t.Errorf("nulls.good.yml: got %+v, want the defaults", c)
	}
	c, err = loadAndValidate(filepath.Join(fixtures, "anchors.good.yml"), nil)
	if err != nil {
		t.Fatal(err)
	}
	if c.Refit.Interval != 200*time.Millisecond || c.Topics.Answers != "harbour-lane" {
		t.Errorf("anchors: refit.interval %v, topics.answers %q", c.Refit.Interval, c.Topics.Answers)
	}
	c, err = loadAndValidate(filepath.Join(fixtures, "embedded.good.yml"), nil)
	if err != nil {
		t.Fatal(err)
	}
	if c.Brokers != nil && len(c.Brokers) != 0 || c.HTTPAddr != "" || c.EmbeddedBrokerAddr != "127.0.0.1:19092" {
		t.Errorf("embedded: %+v", c)
	}
}

// badFixtures: for each *.bad.yml, the substrings its error must contain
// (key names and fixes) and the number of problems reported.
var badFixtures = map[string]struct {
	want     []string
	problems int
}{
	"unknown-key.bad.yml": {problems: 3, want: []string{
		"batch.intervl: unknown key (line 2 of", "fix: did you mean batch.interval?",
		"consumer.dedup_window: unknown key (line 4", "did you mean consumer.dedupe_window?",
		"log.colour: unknown key", "remove it; the keys under log: are level, format",
	}},
	"misplaced-key.bad.yml": {problems: 2, want: []string{
		"threshold: unknown key (line 2", "did you mean model.threshold? (check the indentation)",
		"interval: unknown key (line 3", "did you mean batch.interval or refit.interval?",
	}},
	"wrong-types.bad.yml": {problems: 7, want: []string{
		`brokers: must be a list, not "kafka-1:9092" (line 1`, "fix: write it as a list such as [kafka-1:9092, kafka-2:9092]",
		`batch.interval: "fast" is not a duration (line 3`, "fix: set batch.interval to a Go duration such as 100ms",
		`batch.max_answers: "lots" is not an integer`, "set batch.max_answers to an integer such as 10000",
		"model.threshold: must be a number, not a list (line 6",
		// yaml.v3 refuses a bare number for a duration.
		`refit.interval: "3600" is not a duration (line 8`, "set refit.interval to a Go duration such as 1h",
		`params_from_topic: "maybe" is not true or false`,
		`topics: must be a mapping of keys, not "answers" (line 10`, "write it as key: value lines under topics:",
	}},
	"duplicate-key.bad.yml": {problems: 1, want: []string{
		"batch.interval: is set twice (lines 2 and 3 of", "fix: keep one of the two",
	}},
	"two-documents.bad.yml": {problems: 1, want: []string{
		"two-documents.bad.yml: holds more than one YAML document (the second starts at line 2)", "fix: keep one document",
	}},
	"syntax.bad.yml": {problems: 1, want: []string{
		"syntax.bad.yml: not valid YAML: yaml: line", "fix: correct the YAML syntax",
	}},
	"not-a-mapping.bad.yml": {problems: 1, want: []string{
		"not-a-mapping.bad.yml: must be a mapping of keys, not a list (line 1", "at the top level",
	}},
	"topics.bad.yml": {problems: 4, want: []string{
		`topics.answers: "learner answers" contains ' ', which Kafka does not allow in a topic name; fix: set topics.answers to a name of letters, digits, '.', '_' and '-', e.g. answers`,
		`topics.mastery: ".." is not a valid Kafka topic name`,
		`topics.deadletter: "attain.deadletter" collides with topics.params ("attain_deadletter") in Kafka's metric names`,
		"topics.partitions: must be between 1 and 10000 (got 20000)",
	}},
	"same-topic.bad.yml": {problems: 1, want: []string{
		`topics.deadletter: is the same topic as topics.mastery ("attain.out"); fix: give each topic its own name, e.g. topics.deadletter: attain.deadletter`,
	}},
	"many.bad.yml": {problems: 28, want: []string{
		`brokers: item 1 "kafka-1" is not host:port; fix: list brokers as host:port, e.g. kafka-1:9092`,
		`brokers: item 2 "kafka-2:port" has port "port"; a port is a number from 1 to 65535`,
		`brokers: item 3 ":9092" has no host`,
		"data_dir: must not be empty; fix: set data_dir to a directory, e.g. attain-data",
		`http_addr: "localhost" is not host:port; fix: set http_addr to host:port`,
		`params: cannot use "testdata/config/no-such-params.json": no such file or directory; fix: set params to the path of a parameter file`,
		`items_file: cannot use "testdata/config/no-such-items.json"`,
		"topics.answers: must not be empty",
		"topics.partitions: must be between 1 and 10000 (got 0); fix: set topics.partitions to e.g. 4",
		"consumer.group: must not be empty; fix: set consumer.group to e.g. attain",
		`consumer.start: must be one of earliest, latest (got "middle"); fix: set consumer.start to one of earliest, latest`,
		"consumer.max_event_bytes: must be between 256 and 16777216 (16 MiB) (got 100); fix: set consumer.max_event_bytes to e.g. 65536",
		"consumer.dedupe_window: must be between 1 and 10000 (got 0); fix: set consumer.dedupe_window to e.g. 32",
		// The example of the brief, word for word.
		"batch.interval: must be between 1ms and 10s (got 0s); fix: set batch.interval to e.g. 100ms",
		"batch.max_answers: must be at least 1 (got 0); fix: set batch.max_answers to e.g. 10000",
		"cache.records: must be at least 1 (got -1); the store has no setting without a record cache",
		"cache.block_cache_mb: must be between 1 and 1048576 MiB (got 0); fix: set cache.block_cache_mb to e.g. 144",
		"model.threshold: must be strictly between 0 and 1 (got 1.5); fix: set model.threshold to e.g. 0.95",
		"model.stuck_after: must be between 1 and 4294967295 (got 0); fix: set model.stuck_after to e.g. 10",
		`producer.balancer: must be one of murmur2, crc32 (got "murmur3"); fix: did you mean murmur2? set producer.balancer to one of murmur2, crc32`,
		"refit.interval: must not be negative (got -1h0m0s)",
		"refit.answers: must not be negative (got -5)",
		"refit.min_learners: must not be negative (got -1)",
		"refit.min_answers: must not be negative (got -1)",
		"refit.margin: must be a finite number of at least 0 (got -0.1)",
		"refit.folds: must be at least 2 (got 1)",
		`log.level: must be one of trace, debug, info, warn, error, fatal, panic, disabled (got "loud")`,
		`log.format: must be one of auto, json, console (got "xml")`,
	}},
}

func TestBadFixtures(t *testing.T) {
	files, err := filepath.Glob(filepath.Join(fixtures, "*.bad.yml"))
	if err != nil {
		t.Fatal(err)
	}
	var names []string
	for _, f := range files {
		names = append(names, filepath.Base(f))
	}
	for name := range badFixtures {
		if !slices.Contains(names, name) {
			t.Errorf("table names %s, which is not in %s", name, fixtures)
		}
	}
	for _, name := range names {
		t.Run(name, func(t *testing.T) {
			tc, ok := badFixtures[name]
			if !ok {
				t.Fatalf("%s has no entry in badFixtures", name)
			}
			_, err := loadAndValidate(filepath.Join(fixtures, name), nil)
			if err == nil {
				t.Fatal("want an error, got none")
			}
			if !errors.Is(err, ErrInvalid) {
				t.Errorf("errors.Is(err, ErrInvalid) = false for %v", err)
			}
			msg := err.Error()
			for _, w := range tc.want {
				if !strings.Contains(msg, w) {
					t.Errorf("error lacks %q; got:\n%s", w, msg)
				}
			}
			kes := keyErrors(t, err)
			if len(kes) != tc.problems {
				t.Errorf("%d problems reported, want %d:\n%s", len(kes), tc.problems, msg)
			}
			for _, ke := range kes {
				if ke.Key == "" || ke.Problem == "" || ke.Fix == "" {
					t.Errorf("problem without key, description or fix: %#v", ke)
				}
			}
		})
	}
}

func TestMissingFile(t *testing.T) {
	missing := filepath.Join(t.TempDir(), "nope.yml")
	_, err := Load(missing, nil, nil)
	if !errors.Is(err, os.ErrNotExist) || !errors.Is(err, ErrInvalid) {
		t.Fatalf("want ErrNotExist and ErrInvalid, got %v", err)
	}
	if !strings.HasPrefix(err.Error(), "--config: cannot read the config file") {
		t.Errorf("error names the wrong source: %v", err)
	}
	_, err = Load("", []string{"ATTAIN_CONFIG=" + missing}, nil)
	if err == nil || !strings.HasPrefix(err.Error(), "ATTAIN_CONFIG: cannot read the config file") {
		t.Errorf("want an ATTAIN_CONFIG error, got %v", err)
	}
}
