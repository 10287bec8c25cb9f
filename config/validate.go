package config

import (
	"errors"
	"fmt"
	"math"
	"net"
	"os"
	"slices"
	"strconv"
	"strings"
	"time"
)

// Bounds of the checks in Validate.
const (
	// Kafka refuses topic names longer than 249 characters, "." and "..",
	// and characters outside [a-zA-Z0-9._-] (Apache Kafka,
	// org.apache.kafka.common.internals.Topic.validate; from memory).
	maxTopicLen = 249
	// Partition count and dedupe window: the ranges given in attain's
	// design (no outside source; an upper bound that catches a typo).
	maxPartitions   = 10_000
	maxDedupeWindow = 10_000
	// Smallest and largest accepted answer event. 16 MiB is well above
	// Kafka's default message.max.bytes of about 1 MiB (Apache Kafka
	// broker configuration reference; from memory), so the broker, not
	// attain, is the limit in practice; 256 B fits one native event.
	minEventBytes = 256
	maxEventBytes = 16 << 20
	// Micro-batch interval: at least 1 ms (a shorter one commits per
	// answer) and at most 10 s (state durability is promised within the
	// interval; ARCHITECTURE.md says 100 ms).
	minBatchInterval = time.Millisecond
	maxBatchInterval = 10 * time.Second
	// Block cache upper bound in MiB (1 TiB): catches a value given in
	// bytes by mistake and keeps MiB→bytes from overflowing.
	maxBlockCacheMB = 1 << 20
	// Consumer-group timings. Brokers accept session timeouts between
	// group.min.session.timeout.ms (6 s) and group.max.session.timeout.ms
	// (30 min) by default (Apache Kafka broker configuration reference;
	// from memory); the lower bound here is lower, 1 s, since a broker may
	// be configured so (the embedded one is). Heartbeats at least every
	// 10 ms: more often only loads the coordinator (our choice).
	minSessionTimeout    = time.Second
	maxSessionTimeout    = 30 * time.Minute
	minHeartbeatInterval = 10 * time.Millisecond
)

var (
	starts    = []string{"earliest", "latest"}
	balancers = []string{"murmur2", "crc32"}
	formats   = []string{"auto", "json", "console"}
	// Level names of zerolog (zerolog.ParseLevel); numeric levels and ""
	// are refused here although zerolog accepts them, to keep configs
	// readable.
	levels = []string{"trace", "debug", "info", "warn", "error", "fatal", "panic", "disabled"}
)

// Validate checks every key and returns every problem at once (errors.Join
// of *KeyError, each "key: problem; fix: ..."), or nil. The result matches
// ErrInvalid. It reads the file system only to check that params and
// items_file exist.
func (c Config) Validate() error {
	var v validation
	def := Default()

	for i, b := range c.Brokers {
		if p := hostPortProblem(b, false); p != "" {
			v.add("brokers", fmt.Sprintf("item %d %s %s", i+1, quote(b), p),
				"list brokers as host:port, e.g. kafka-1:9092")
		}
	}
	if c.DataDir == "" {
		v.add("data_dir", "must not be empty", "set data_dir to a directory, e.g. "+def.DataDir)
	}
	if c.HTTPAddr != "" {
		if p := hostPortProblem(c.HTTPAddr, true); p != "" {
			v.add("http_addr", fmt.Sprintf("%s %s", quote(c.HTTPAddr), p),
				`set http_addr to host:port, e.g. 127.0.0.1:8080 or :8080 for every interface, or "" to turn HTTP off`)
		}
	}
	v.file("params", c.Params, "a parameter file written by attain refit")
	v.file("items_file", c.ItemsFile, `a JSON file {"item": ["skill", ...]}`)
	switch {
	case c.EmbeddedBrokerAddr != "":
		if p := hostPortProblem(c.EmbeddedBrokerAddr, true); p != "" {
			v.add("embedded_broker_addr", fmt.Sprintf("%s %s", quote(c.EmbeddedBrokerAddr), p),
				"set embedded_broker_addr to host:port, e.g. "+def.EmbeddedBrokerAddr)
		}
	case len(c.Brokers) == 0:
		v.add("embedded_broker_addr", "must be set when brokers is empty (the embedded broker listens there)",
			"set embedded_broker_addr to e.g. "+def.EmbeddedBrokerAddr+", or list your Kafka brokers in brokers")
	}

	v.topics(c.Topics, def.Topics)
	if !(c.Topics.Partitions >= 1 && c.Topics.Partitions <= maxPartitions) {
		v.add("topics.partitions", fmt.Sprintf("must be between 1 and %d (got %d)", maxPartitions, c.Topics.Partitions),
			"set topics.partitions to e.g. "+strconv.Itoa(def.Topics.Partitions))
	}

	if strings.TrimSpace(c.Consumer.Group) == "" {
		v.add("consumer.group", "must not be empty", "set consumer.group to e.g. "+def.Consumer.Group)
	}
	v.oneOf("consumer.start", c.Consumer.Start, starts)
	if !(c.Consumer.MaxEventBytes >= minEventBytes && c.Consumer.MaxEventBytes <= maxEventBytes) {
		v.add("consumer.max_event_bytes", fmt.Sprintf("must be between %d and %d (16 MiB) (got %d)", minEventBytes, maxEventBytes, c.Consumer.MaxEventBytes),
			"set consumer.max_event_bytes to e.g. "+strconv.Itoa(def.Consumer.MaxEventBytes))
	}
	if !(c.Consumer.DedupeWindow >= 1 && c.Consumer.DedupeWindow <= maxDedupeWindow) {
		v.add("consumer.dedupe_window", fmt.Sprintf("must be between 1 and %d (got %d)", maxDedupeWindow, c.Consumer.DedupeWindow),
			"set consumer.dedupe_window to e.g. "+strconv.Itoa(def.Consumer.DedupeWindow))
	}

	st, hb := c.Consumer.SessionTimeout, c.Consumer.HeartbeatInterval
	if !(st >= minSessionTimeout && st <= maxSessionTimeout) {
		v.add("consumer.session_timeout", fmt.Sprintf("must be between %v and %v (got %v)", minSessionTimeout, maxSessionTimeout, st),
			"set consumer.session_timeout to e.g. "+def.Consumer.SessionTimeout.String())
	}
	switch {
	case hb < minHeartbeatInterval:
		v.add("consumer.heartbeat_interval", fmt.Sprintf("must be at least %v (got %v)", minHeartbeatInterval, hb),
			"set consumer.heartbeat_interval to e.g. "+def.Consumer.HeartbeatInterval.String())
	case hb >= st:
		v.add("consumer.heartbeat_interval", fmt.Sprintf("must be less than consumer.session_timeout (got %v, session timeout %v): a member would be declared dead between two heartbeats", hb, st),
			fmt.Sprintf("set consumer.heartbeat_interval to a third of consumer.session_timeout or less, e.g. %v", st/3))
	}

	if !(c.Batch.Interval >= minBatchInterval && c.Batch.Interval <= maxBatchInterval) {
		v.add("batch.interval", fmt.Sprintf("must be between %v and %v (got %v)", minBatchInterval, maxBatchInterval, c.Batch.Interval),
			"set batch.interval to e.g. "+def.Batch.Interval.String())
	}
	if c.Batch.MaxAnswers < 1 {
		v.add("batch.max_answers", fmt.Sprintf("must be at least 1 (got %d)", c.Batch.MaxAnswers),
			"set batch.max_answers to e.g. "+strconv.Itoa(def.Batch.MaxAnswers))
	}

	// At least 1, not 0: state.StoreOptions reads 0 as "the default", so a
	// 0 here would silently mean 200000 records, not "no cache".
	if c.Cache.Records < 1 {
		v.add("cache.records", fmt.Sprintf("must be at least 1 (got %d); the store has no setting without a record cache", c.Cache.Records),
			"set cache.records to e.g. "+strconv.Itoa(def.Cache.Records)+", or to a small number such as 1000 to keep the cache small")
	}
	if !(c.Cache.BlockCacheMB >= 1 && c.Cache.BlockCacheMB <= maxBlockCacheMB) {
		v.add("cache.block_cache_mb", fmt.Sprintf("must be between 1 and %d MiB (got %d)", maxBlockCacheMB, c.Cache.BlockCacheMB),
			"set cache.block_cache_mb to e.g. "+strconv.Itoa(def.Cache.BlockCacheMB))
	}

	if !(c.Model.Threshold > 0 && c.Model.Threshold < 1) {
		v.add("model.threshold", fmt.Sprintf("must be strictly between 0 and 1 (got %v)", c.Model.Threshold),
			"set model.threshold to e.g. "+strconv.FormatFloat(def.Model.Threshold, 'g', -1, 64))
	}
	if !(c.Model.StuckAfter >= 1 && c.Model.StuckAfter <= math.MaxUint32) {
		v.add("model.stuck_after", fmt.Sprintf("must be between 1 and %d (got %d)", uint32(math.MaxUint32), c.Model.StuckAfter),
			"set model.stuck_after to e.g. "+strconv.Itoa(def.Model.StuckAfter))
	}

	v.oneOf("producer.balancer", c.Producer.Balancer, balancers)

	r, dr := c.Refit, def.Refit
	if r.Interval < 0 {
		v.add("refit.interval", fmt.Sprintf("must not be negative (got %v)", r.Interval),
			"set refit.interval to e.g. 1h, or 0 to turn timed refits off")
	}
	if r.Answers < 0 {
		v.add("refit.answers", fmt.Sprintf("must not be negative (got %d)", r.Answers),
			"set refit.answers to e.g. 100000, or 0 to turn answer-count refits off")
	}
	if r.MinLearners < 0 {
		v.add("refit.min_learners", fmt.Sprintf("must not be negative (got %d)", r.MinLearners),
			"set refit.min_learners to e.g. "+strconv.Itoa(dr.MinLearners))
	}
	if r.MinAnswers < 0 {
		v.add("refit.min_answers", fmt.Sprintf("must not be negative (got %d)", r.MinAnswers),
			"set refit.min_answers to e.g. "+strconv.Itoa(dr.MinAnswers))
	}
	if !(r.Margin >= 0 && !math.IsInf(r.Margin, 1)) {
		v.add("refit.margin", fmt.Sprintf("must be a finite number of at least 0 (got %v)", r.Margin),
			"set refit.margin to e.g. 0.001, or 0 to accept any improvement")
	}
	if r.Folds < 2 {
		v.add("refit.folds", fmt.Sprintf("must be at least 2 (got %d): cross-validation needs a fold to hold out", r.Folds),
			"set refit.folds to e.g. "+strconv.Itoa(dr.Folds))
	} else if r.MinLearners >= 0 && r.MinLearners < r.Folds {
		v.add("refit.min_learners", fmt.Sprintf("must be at least refit.folds (%d) so that every fold holds out a learner (got %d)", r.Folds, r.MinLearners),
			fmt.Sprintf("set refit.min_learners to at least %d, e.g. %d", r.Folds, max(dr.MinLearners, r.Folds)))
	}

	v.oneOf("log.level", c.Log.Level, levels)
	v.oneOf("log.format", c.Log.Format, formats)

	return v.err()
}

type validation struct{ errs []error }

func (v *validation) add(key, problem, fix string) {
	v.errs = append(v.errs, keyError(key, problem, fix))
}

func (v *validation) err() error {
	if len(v.errs) == 0 {
		return nil
	}
	return errors.Join(v.errs...)
}

func (v *validation) oneOf(key, got string, allowed []string) {
	if slices.Contains(allowed, got) {
		return
	}
	fix := "set " + key + " to one of " + strings.Join(allowed, ", ")
	if s, ok := closest(got, allowed); ok && got != "" {
		fix = "did you mean " + s + "? " + fix
	}
	v.add(key, fmt.Sprintf("must be one of %s (got %s)", strings.Join(allowed, ", "), quote(got)), fix)
}

// file checks that a path, when set, names an existing regular file.
func (v *validation) file(key, path, what string) {
	if path == "" {
		return
	}
	st, err := os.Stat(path)
	switch {
	case err != nil:
		v.errs = append(v.errs, &KeyError{Key: key, Problem: fmt.Sprintf("cannot use %s: %v", quote(path), errors.Unwrap(err)),
			Fix: "set " + key + " to the path of " + what + ", or leave it empty", cause: err})
	case !st.Mode().IsRegular():
		v.add(key, fmt.Sprintf("%s is not a regular file", quote(path)),
			"set "+key+" to the path of "+what+", or leave it empty")
	}
}

// topics checks the four topic names: valid for Kafka, and distinct, also
// after Kafka's folding of '.' into '_' in metric names (Kafka refuses to
// create two topics that collide that way; Topic.hasCollision, from
// memory).
func (v *validation) topics(t, def Topics) {
	names := []struct{ key, name, def string }{
		{"topics.answers", t.Answers, def.Answers},
		{"topics.mastery", t.Mastery, def.Mastery},
		{"topics.params", t.Params, def.Params},
		{"topics.deadletter", t.DeadLetter, def.DeadLetter},
	}
	for _, n := range names {
		if p := topicProblem(n.name); p != "" {
			v.add(n.key, p, "set "+n.key+" to a name of letters, digits, '.', '_' and '-', e.g. "+n.def)
		}
	}
	for i, a := range names {
		for _, b := range names[:i] {
			if a.name == "" || topicProblem(a.name) != "" || topicProblem(b.name) != "" {
				continue
			}
			switch {
			case a.name == b.name:
				v.add(a.key, fmt.Sprintf("is the same topic as %s (%s)", b.key, quote(a.name)),
					"give each topic its own name, e.g. "+a.key+": "+a.def)
			case strings.ReplaceAll(a.name, ".", "_") == strings.ReplaceAll(b.name, ".", "_"):
				v.add(a.key, fmt.Sprintf("%s collides with %s (%s) in Kafka's metric names, where '.' and '_' are the same", quote(a.name), b.key, quote(b.name)),
					"give the two topics names that differ in more than '.' and '_'")
			}
		}
	}
}

func topicProblem(name string) string {
	switch {
	case name == "":
		return "must not be empty"
	case name == "." || name == "..":
		return fmt.Sprintf("%s is not a valid Kafka topic name", quote(name))
	case len(name) > maxTopicLen:
		return fmt.Sprintf("is %d characters long; Kafka allows at most %d", len(name), maxTopicLen)
	}
	for _, r := range name {
		if !(r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '.' || r == '_' || r == '-') {
			return fmt.Sprintf("%s contains %q, which Kafka does not allow in a topic name", quote(name), r)
		}
	}
	return ""
}

// hostPortProblem says what is wrong with a host:port address, or "". A
// listen address may leave the host empty (every interface) and use port 0
// (any free port); a broker address may not.
func hostPortProblem(addr string, listen bool) string {
	host, port, err := net.SplitHostPort(addr)
	if err != nil {
		return "is not host:port"
	}
	if host == "" && !listen {
		return "has no host"
	}
	if strings.ContainsFunc(host, func(r rune) bool { return r <= ' ' }) {
		return "has blanks or control characters in the host"
	}
	n, err := strconv.Atoi(port)
	lo := 1
	if listen {
		lo = 0
	}
	if err != nil || n < lo || n > 65535 {
		return fmt.Sprintf("has port %s; a port is a number from %d to 65535", quote(port), lo)
	}
	return ""
}
