package config

import (
	"errors"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/state"
)

// ErrInvalid is matched (errors.Is) by every error Load and Validate return
// about the configuration's content.
var ErrInvalid = errors.New("attain: invalid configuration")

// Config is the whole configuration of the attain commands. The yaml tags
// are the config-file keys; see the package documentation for each key's
// environment variable, flag, default and meaning.
type Config struct {
	// Brokers are the Kafka bootstrap addresses (host:port). Empty means
	// start the embedded broker at EmbeddedBrokerAddr.
	Brokers []string `yaml:"brokers"`
	// DataDir is the directory of the Pebble store.
	DataDir string `yaml:"data_dir"`
	// HTTPAddr is the listen address of the HTTP API; "" disables it.
	HTTPAddr string `yaml:"http_addr"`
	// HTTPToken, when set, is the bearer token required on /v1/*.
	HTTPToken string `yaml:"http_token"`
	// Params is a parameter file (JSON) to start from.
	Params string `yaml:"params"`
	// ParamsFromTopic: read the params topic to its end at start and
	// follow it.
	ParamsFromTopic bool `yaml:"params_from_topic"`
	// ItemsFile is an optional JSON item→skills map (Q-matrix),
	// {"item": ["skill", ...]}.
	ItemsFile string `yaml:"items_file"`
	// EmbeddedBrokerAddr is where the embedded broker listens when Brokers
	// is empty.
	EmbeddedBrokerAddr string `yaml:"embedded_broker_addr"`

	Topics   Topics   `yaml:"topics"`
	Consumer Consumer `yaml:"consumer"`
	Batch    Batch    `yaml:"batch"`
	Cache    Cache    `yaml:"cache"`
	Model    Model    `yaml:"model"`
	Producer Producer `yaml:"producer"`
	Refit    Refit    `yaml:"refit"`
	Log      Log      `yaml:"log"`
}

// Topics names the Kafka topics.
type Topics struct {
	Answers    string `yaml:"answers"`
	Mastery    string `yaml:"mastery"`
	Params     string `yaml:"params"`
	DeadLetter string `yaml:"deadletter"`
	// Partitions is the partition count used when attain creates the
	// topics itself (embedded broker).
	Partitions int `yaml:"partitions"`
}

// Consumer configures reading the answers topic.
type Consumer struct {
	Group string `yaml:"group"`
	// Start is where a partition with no stored offset begins: "earliest"
	// or "latest".
	Start         string `yaml:"start"`
	MaxEventBytes int    `yaml:"max_event_bytes"`
	// DedupeWindow is the number of applied answer ids remembered per
	// learner.
	DedupeWindow int `yaml:"dedupe_window"`
	// SessionTimeout is how long the group coordinator waits for a
	// member's heartbeat before it declares the member dead and gives its
	// partitions to the others; HeartbeatInterval is how often a member
	// sends one (less than SessionTimeout).
	SessionTimeout    time.Duration `yaml:"session_timeout"`
	HeartbeatInterval time.Duration `yaml:"heartbeat_interval"`
}

// Batch bounds a micro-batch: it is committed after Interval or MaxAnswers
// answers, whichever comes first.
type Batch struct {
	Interval   time.Duration `yaml:"interval"`
	MaxAnswers int           `yaml:"max_answers"`
}

// Cache sizes the store's memory.
type Cache struct {
	// Records bounds the write-through cache, in learner-skill records.
	Records int `yaml:"records"`
	// BlockCacheMB is Pebble's cache in MiB: the block cache, with the
	// memtables (a third of it, up to 64 MiB) reserved inside it. Outside
	// the Go heap when built with cgo.
	BlockCacheMB int `yaml:"block_cache_mb"`
}

// Model holds the thresholds that turn estimates into events.
type Model struct {
	Threshold  float64 `yaml:"threshold"`
	StuckAfter int     `yaml:"stuck_after"`
}

// Producer configures writing the output topics.
type Producer struct {
	// Balancer maps a key to a partition: "murmur2" or "crc32".
	Balancer string `yaml:"balancer"`
}

// Refit configures the periodic refit inside `attain run` and the gate a
// new parameter set must pass.
type Refit struct {
	// Interval between refits; 0 = no timed refit.
	Interval time.Duration `yaml:"interval"`
	// Answers applied since the last refit that trigger one; 0 = off.
	Answers     int `yaml:"answers"`
	MinLearners int `yaml:"min_learners"`
	MinAnswers  int `yaml:"min_answers"`
	// Margin by which a new set must beat the current one on held-out
	// log-loss to replace it.
	Margin float64 `yaml:"margin"`
	// Folds of learner-wise cross-validation.
	Folds int `yaml:"folds"`
}

// Log configures the logger (see Config.Logger).
type Log struct {
	Level  string `yaml:"level"`
	Format string `yaml:"format"`
}

// Default returns the configuration used when nothing is set. Every value
// is valid, so Default().Validate() is nil.
func Default() Config {
	pol := state.DefaultPolicy()
	return Config{
		DataDir:            "attain-data",
		HTTPAddr:           "127.0.0.1:8080",
		EmbeddedBrokerAddr: "127.0.0.1:9092",
		Topics: Topics{
			Answers:    "answers",
			Mastery:    "attain.mastery",
			Params:     "attain.params",
			DeadLetter: "attain.deadletter",
			Partitions: 4,
		},
		Consumer: Consumer{
			Group:         "attain",
			Start:         "earliest",
			MaxEventBytes: 64 << 10,
			DedupeWindow:  32,
			// The Java client's defaults of session.timeout.ms (before
			// Kafka 3.0) and heartbeat.interval.ms (Apache Kafka consumer
			// configuration reference; from memory).
			SessionTimeout:    10 * time.Second,
			HeartbeatInterval: 3 * time.Second,
		},
		// Commit at least every 100 ms or 10000 answers (ARCHITECTURE.md,
		// Durability).
		Batch: Batch{Interval: 100 * time.Millisecond, MaxAnswers: 10000},
		Cache: Cache{Records: 200_000, BlockCacheMB: 144},
		// Sources of the thresholds are on state.Policy's fields.
		Model:    Model{Threshold: pol.Threshold, StuckAfter: int(pol.StuckAfter)},
		Producer: Producer{Balancer: "murmur2"},
		Refit:    Refit{MinLearners: 50, MinAnswers: 500, Margin: 0, Folds: 5},
		Log:      Log{Level: "info", Format: "auto"},
	}
}

// Policy returns the model thresholds as the state package uses them.
// Validate first: a stuck_after beyond uint32 is not representable.
func (c Config) Policy() state.Policy {
	return state.Policy{Threshold: c.Model.Threshold, StuckAfter: uint32(c.Model.StuckAfter)}
}

// StoreOptions returns the options of state.OpenStore that the config
// sets: the cache sizes, the dedupe window and the thresholds. The store's
// other options (CacheLearners, MemTableBytes) keep their defaults (the
// memtable's follows the block cache).
// Validate first: every value here is then one the store accepts.
func (c Config) StoreOptions(logger zerolog.Logger) state.StoreOptions {
	return state.StoreOptions{
		CacheRecords:    c.Cache.Records,
		BlockCacheBytes: int64(c.Cache.BlockCacheMB) << 20,
		DedupeWindow:    c.Consumer.DedupeWindow,
		Policy:          c.Policy(),
		Logger:          logger,
	}
}

// KeyError is one problem with one setting. Key names the setting as the
// user wrote it: a key path (batch.interval), an environment variable
// (ATTAIN_BATCH_INTERVAL), a flag (--brokers) or the config file.
type KeyError struct {
	Key     string
	Problem string
	Fix     string
	cause   error
}

func (e *KeyError) Error() string {
	s := e.Key + ": " + e.Problem
	if e.Fix != "" {
		s += "; fix: " + e.Fix
	}
	return s
}

// Unwrap returns ErrInvalid and, when there is one, the underlying error
// (for instance an fs.ErrNotExist from reading the file).
func (e *KeyError) Unwrap() []error {
	if e.cause != nil {
		return []error{ErrInvalid, e.cause}
	}
	return []error{ErrInvalid}
}
