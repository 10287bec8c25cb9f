package config

import (
	"errors"
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/state"
)

// TestValidateBounds changes one key of Default() at a time, on both sides
// of each bound: "" in want means valid, otherwise the one problem's text
// must contain it.
func TestValidateBounds(t *testing.T) {
	long := strings.Repeat("a", 249)
	cases := []struct {
		name string
		set  func(*Config)
		want string
	}{
		{"brokers ok", func(c *Config) { c.Brokers = []string{"kafka-1:9092", "10.0.0.7:9093", "[fd00::1]:9092"} }, ""},
		{"broker port 0", func(c *Config) { c.Brokers = []string{"kafka:0"} }, `brokers: item 1 "kafka:0" has port "0"`},
		{"broker port 65536", func(c *Config) { c.Brokers = []string{"kafka:65536"} }, "a port is a number from 1 to 65535"},
		{"broker with blank", func(c *Config) { c.Brokers = []string{" kafka:9092"} }, "has blanks or control characters in the host"},
		{"http_addr off", func(c *Config) { c.HTTPAddr = "" }, ""},
		{"http_addr any interface", func(c *Config) { c.HTTPAddr = ":8080" }, ""},
		{"http_addr port 0", func(c *Config) { c.HTTPAddr = "127.0.0.1:0" }, ""},
		{"http_addr no port", func(c *Config) { c.HTTPAddr = "127.0.0.1" }, `http_addr: "127.0.0.1" is not host:port`},
		{"embedded addr bad", func(c *Config) { c.EmbeddedBrokerAddr = "nowhere" }, "embedded_broker_addr: \"nowhere\" is not host:port"},
		{"embedded addr empty, no brokers", func(c *Config) { c.EmbeddedBrokerAddr = "" }, "embedded_broker_addr: must be set when brokers is empty"},
		{"embedded addr empty, brokers set", func(c *Config) { c.EmbeddedBrokerAddr = ""; c.Brokers = []string{"k:9092"} }, ""},
		{"topic 249 chars", func(c *Config) { c.Topics.Answers = long }, ""},
		{"topic 250 chars", func(c *Config) { c.Topics.Answers = long + "a" }, "topics.answers: is 250 characters long; Kafka allows at most 249"},
		{"topic .", func(c *Config) { c.Topics.Params = "." }, `topics.params: "." is not a valid Kafka topic name`},
		{"topic with slash", func(c *Config) { c.Topics.DeadLetter = "a/b" }, `contains '/'`},
		{"topic non-ASCII", func(c *Config) { c.Topics.Mastery = "maîtrise" }, `contains 'î'`},
		{"topic legal chars", func(c *Config) { c.Topics.Mastery = "A-z_0.9" }, ""},
		{"partitions 1", func(c *Config) { c.Topics.Partitions = 1 }, ""},
		{"partitions 10000", func(c *Config) { c.Topics.Partitions = 10000 }, ""},
		{"partitions 10001", func(c *Config) { c.Topics.Partitions = 10001 }, "topics.partitions: must be between 1 and 10000 (got 10001)"},
		{"group blank", func(c *Config) { c.Consumer.Group = "  " }, "consumer.group: must not be empty"},
		{"start latest", func(c *Config) { c.Consumer.Start = "latest" }, ""},
		{"start typo", func(c *Config) { c.Consumer.Start = "earlist" }, "fix: did you mean earliest?"},
		{"event bytes 256", func(c *Config) { c.Consumer.MaxEventBytes = 256 }, ""},
		{"event bytes 255", func(c *Config) { c.Consumer.MaxEventBytes = 255 }, "consumer.max_event_bytes: must be between 256 and 16777216"},
		{"event bytes 16 MiB", func(c *Config) { c.Consumer.MaxEventBytes = 16 << 20 }, ""},
		{"event bytes 16 MiB + 1", func(c *Config) { c.Consumer.MaxEventBytes = 16<<20 + 1 }, "(got 16777217)"},
		{"dedupe 1", func(c *Config) { c.Consumer.DedupeWindow = 1 }, ""},
		{"dedupe 10000", func(c *Config) { c.Consumer.DedupeWindow = 10000 }, ""},
		{"dedupe 10001", func(c *Config) { c.Consumer.DedupeWindow = 10001 }, "consumer.dedupe_window: must be between 1 and 10000 (got 10001)"},
		{"session 1s, heartbeat 300ms", func(c *Config) {
			c.Consumer.SessionTimeout = time.Second
			c.Consumer.HeartbeatInterval = 300 * time.Millisecond
		}, ""},
		{"session 30m", func(c *Config) { c.Consumer.SessionTimeout = 30 * time.Minute }, ""},
		{"session 999ms", func(c *Config) {
			c.Consumer.SessionTimeout = 999 * time.Millisecond
			c.Consumer.HeartbeatInterval = 100 * time.Millisecond
		}, "consumer.session_timeout: must be between 1s and 30m0s (got 999ms)"},
		{"session 31m", func(c *Config) { c.Consumer.SessionTimeout = 31 * time.Minute }, "(got 31m0s)"},
		{"heartbeat 10ms", func(c *Config) { c.Consumer.HeartbeatInterval = 10 * time.Millisecond }, ""},
		{"heartbeat 9ms", func(c *Config) { c.Consumer.HeartbeatInterval = 9 * time.Millisecond }, "consumer.heartbeat_interval: must be at least 10ms (got 9ms)"},
		{"heartbeat = session", func(c *Config) { c.Consumer.HeartbeatInterval = 10 * time.Second }, "consumer.heartbeat_interval: must be less than consumer.session_timeout (got 10s, session timeout 10s)"},
		{"heartbeat > session", func(c *Config) {
			c.Consumer.SessionTimeout = 6 * time.Second
			c.Consumer.HeartbeatInterval = 8 * time.Second
		}, "fix: set consumer.heartbeat_interval to a third of consumer.session_timeout or less, e.g. 2s"},
		{"interval 1ms", func(c *Config) { c.Batch.Interval = time.Millisecond }, ""},
		{"interval 10s", func(c *Config) { c.Batch.Interval = 10 * time.Second }, ""},
		{"interval 999µs", func(c *Config) { c.Batch.Interval = 999 * time.Microsecond }, "batch.interval: must be between 1ms and 10s (got 999µs)"},
		{"interval 10.001s", func(c *Config) { c.Batch.Interval = 10*time.Second + time.Millisecond }, "(got 10.001s)"},
		{"max answers 1", func(c *Config) { c.Batch.MaxAnswers = 1 }, ""},
		{"records 1", func(c *Config) { c.Cache.Records = 1 }, ""},
		{"records 0", func(c *Config) { c.Cache.Records = 0 }, "cache.records: must be at least 1 (got 0)"},
		{"block cache 1", func(c *Config) { c.Cache.BlockCacheMB = 1 }, ""},
		{"block cache in bytes by mistake", func(c *Config) { c.Cache.BlockCacheMB = 64 << 20 }, "cache.block_cache_mb: must be between 1 and 1048576 MiB"},
		{"threshold 0", func(c *Config) { c.Model.Threshold = 0 }, "model.threshold: must be strictly between 0 and 1 (got 0)"},
		{"threshold 1", func(c *Config) { c.Model.Threshold = 1 }, "(got 1)"},
		{"threshold NaN", func(c *Config) { c.Model.Threshold = math.NaN() }, "(got NaN)"},
		{"threshold 0.999", func(c *Config) { c.Model.Threshold = 0.999 }, ""},
		{"stuck after 1", func(c *Config) { c.Model.StuckAfter = 1 }, ""},
		{"stuck after too big", func(c *Config) { c.Model.StuckAfter = math.MaxUint32 + 1 }, "model.stuck_after: must be between 1 and 4294967295"},
		{"balancer crc32", func(c *Config) { c.Producer.Balancer = "crc32" }, ""},
		{"balancer empty", func(c *Config) { c.Producer.Balancer = "" }, `producer.balancer: must be one of murmur2, crc32 (got "")`},
		{"refit on", func(c *Config) { c.Refit.Interval = time.Hour; c.Refit.Answers = 1000 }, ""},
		{"margin +Inf", func(c *Config) { c.Refit.Margin = math.Inf(1) }, "refit.margin: must be a finite number of at least 0 (got +Inf)"},
		{"margin NaN", func(c *Config) { c.Refit.Margin = math.NaN() }, "refit.margin"},
		{"folds 2", func(c *Config) { c.Refit.Folds = 2 }, ""},
		{"fewer learners than folds", func(c *Config) { c.Refit.MinLearners = 3 }, "refit.min_learners: must be at least refit.folds (5) so that every fold holds out a learner (got 3); fix: set refit.min_learners to at least 5, e.g. 50"},
		{"min learners = folds", func(c *Config) { c.Refit.MinLearners = 5 }, ""},
		{"level warn", func(c *Config) { c.Log.Level = "warn" }, ""},
		{"level empty", func(c *Config) { c.Log.Level = "" }, `log.level: must be one of`},
		{"level numeric", func(c *Config) { c.Log.Level = "1" }, `log.level: must be one of`},
		{"level typo", func(c *Config) { c.Log.Level = "debgu" }, "did you mean debug?"},
		{"format console", func(c *Config) { c.Log.Format = "console" }, ""},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			c := Default()
			tc.set(&c)
			err := c.Validate()
			if tc.want == "" {
				if err != nil {
					t.Fatalf("want valid, got %v", err)
				}
				return
			}
			if err == nil {
				t.Fatalf("want an error containing %q, got none", tc.want)
			}
			if !errors.Is(err, ErrInvalid) {
				t.Errorf("not ErrInvalid: %v", err)
			}
			if kes := keyErrors(t, err); len(kes) != 1 {
				t.Errorf("want exactly one problem, got %d:\n%v", len(kes), err)
			}
			if !strings.Contains(err.Error(), tc.want) {
				t.Errorf("error lacks %q:\n%v", tc.want, err)
			}
		})
	}
}

func TestValidateFiles(t *testing.T) {
	dir := t.TempDir()
	params := filepath.Join(dir, "params.json")
	if err := os.WriteFile(params, []byte(`{}`), 0o600); err != nil {
		t.Fatal(err)
	}
	c := Default()
	c.Params, c.ItemsFile = params, params
	if err := c.Validate(); err != nil {
		t.Fatalf("existing files: %v", err)
	}
	c.Params = dir
	err := c.Validate()
	if err == nil || !strings.Contains(err.Error(), "params: "+quote(dir)+" is not a regular file") {
		t.Fatalf("directory as params: %v", err)
	}
	c.Params = filepath.Join(dir, "missing.json")
	if err := c.Validate(); !errors.Is(err, os.ErrNotExist) {
		t.Fatalf("missing params: want ErrNotExist, got %v", err)
	}
	// Through the environment, the way a deployment sets it.
	if _, err := loadAndValidate("", []string{"ATTAIN_PARAMS=" + params, "ATTAIN_ITEMS_FILE=" + params}); err != nil {
		t.Fatal(err)
	}
}

func TestPolicy(t *testing.T) {
	if got := Default().Policy(); got != state.DefaultPolicy() {
		t.Errorf("Default().Policy() = %+v, want state.DefaultPolicy() %+v", got, state.DefaultPolicy())
	}
	c := Default()
	c.Model = Model{Threshold: 0.9, StuckAfter: 15}
	if got := c.Policy(); got != (state.Policy{Threshold: 0.9, StuckAfter: 15}) {
		t.Errorf("Policy() = %+v", got)
	}
}

// TestStoreOptions opens a real store with the options of the default and
// of a customised config: the store accepts what Validate accepts.
func TestStoreOptions(t *testing.T) {
	c := Default()
	got := c.StoreOptions(zerolog.Nop())
	if got.CacheRecords != 200_000 || got.BlockCacheBytes != state.DefaultBlockCacheBytes || got.DedupeWindow != 32 || got.Policy != state.DefaultPolicy() {
		t.Errorf("Default().StoreOptions() = %+v", got)
	}
	c.Cache = Cache{Records: 1, BlockCacheMB: 1}
	c.Consumer.DedupeWindow = 10000
	c.Model = Model{Threshold: 0.5, StuckAfter: 1}
	if err := c.Validate(); err != nil {
		t.Fatal(err)
	}
	for _, cfg := range []Config{Default(), c} {
		st, err := state.OpenStore(t.TempDir(), cfg.StoreOptions(zerolog.Nop()))
		if err != nil {
			t.Fatalf("OpenStore with %+v: %v", cfg.StoreOptions(zerolog.Nop()), err)
		}
		if err := st.Close(); err != nil {
			t.Fatal(err)
		}
	}
}
