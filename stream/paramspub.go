package stream

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"sort"
	"strings"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"

	"github.com/attain-dev/attain/state"
)

// ErrParamsPublish is wrapped by every error that stops a parameter set
// from being published. When it is returned, nothing of the set is on the
// topic — except after an ambiguous failure (the connection dropped after
// the broker took the batch), when all of it may be: never part.
var ErrParamsPublish = errors.New("attain: publishing parameters")

// ParamsPublishOptions configure PublishParams.
type ParamsPublishOptions struct {
	Brokers []string
	Topic   string // the params topic (topics.params, "attain.params")
	Logger  zerolog.Logger
}

// PublishResult says where a published set landed.
type PublishResult struct {
	Version    int64
	Skills     int
	Partition  int
	BaseOffset int64 // offset of the first skill's record
	Bytes      int   // JSON bytes of all values
}

// PublishParams sends the skills of one new parameter set version to the
// compacted params topic: one record per skill, key = the skill, value =
// its state.SkillParams JSON (with "version" = version), in the order of
// the skill names.
//
// All the records go in ONE produce request to the topic's one partition,
// which the broker appends as one record batch or not at all, acknowledged
// by every in-sync replica (RequiredAcks = all) before PublishParams
// returns. So a failure or a cancelled context never leaves some skills of
// the version on the topic without the others, and ParamsFollower, which
// swaps a version in once the topic is quiet, sees each version whole. For
// this the params topic must have exactly one partition (EnsureTopics
// makes it so); with more, PublishParams refuses. The set must also fit in
// one batch: a few hundred bytes per skill, so thousands of skills within
// the broker's default 1 MB message.max.bytes; above it the broker refuses
// the whole batch and the error says so.
//
// A second publisher of the same version at the same time would interleave
// with this one; run one refit at a time (the CronJob forbids overlap).
func PublishParams(ctx context.Context, opt ParamsPublishOptions, version int64, skills map[string]state.SkillParams) (PublishResult, error) {
	res := PublishResult{Version: version, Skills: len(skills)}
	if err := checkPublish(opt, version, skills); err != nil {
		return res, err
	}
	names := make([]string, 0, len(skills))
	for k := range skills {
		names = append(names, k)
	}
	sort.Strings(names)
	records := make([]kafka.Record, len(names))
	now := time.Now()
	for i, name := range names {
		b, err := json.Marshal(skills[name])
		if err != nil {
			return res, fmt.Errorf("%w: encoding skill %q: %v", ErrParamsPublish, name, err)
		}
		res.Bytes += len(b)
		records[i] = kafka.Record{Time: now, Key: kafka.NewBytes([]byte(name)), Value: kafka.NewBytes(b)}
	}

	tr := &kafka.Transport{}
	defer tr.CloseIdleConnections()
	cl := &kafka.Client{Addr: kafka.TCP(opt.Brokers...), Transport: tr, Timeout: 30 * time.Second}
	parts, err := topicPartitions(ctx, cl, opt.Topic)
	if err != nil {
		return res, fmt.Errorf("%w: %v; fix: create the params topic (attain run creates it: 1 partition, cleanup.policy=compact) or check --brokers", ErrParamsPublish, err)
	}
	if len(parts) != 1 {
		return res, fmt.Errorf("%w: params topic %s has %d partitions: a set is published atomically only to one partition; fix: recreate %s with 1 partition and cleanup.policy=compact",
			ErrParamsPublish, opt.Topic, len(parts), opt.Topic)
	}
	res.Partition = parts[0]
	if err := ctx.Err(); err != nil {
		return res, fmt.Errorf("%w: %v (nothing sent)", ErrParamsPublish, err)
	}
	pr, err := cl.Produce(ctx, &kafka.ProduceRequest{
		Topic: opt.Topic, Partition: res.Partition, RequiredAcks: kafka.RequireAll,
		Records: kafka.NewRecordReader(records...),
	})
	if err == nil && pr.Error != nil {
		err = pr.Error
	}
	if err == nil {
		for i, rerr := range pr.RecordErrors {
			err = errors.Join(err, fmt.Errorf("record %d: %w", i, rerr))
		}
	}
	if err != nil {
		fix := "retry the refit; the set in force is unchanged"
		if errors.Is(err, kafka.MessageSizeTooLarge) {
			fix = fmt.Sprintf("raise max.message.bytes of %s above %d bytes", opt.Topic, res.Bytes)
		}
		return res, fmt.Errorf("%w: version %d (%d skills) to %s: %v; fix: %s", ErrParamsPublish, version, len(names), opt.Topic, err, fix)
	}
	res.BaseOffset = pr.BaseOffset
	opt.Logger.Info().Str("topic", opt.Topic).Int64("version", version).Int("skills", len(names)).
		Int64("base_offset", pr.BaseOffset).Strs("skill_names", names).Msg("parameter set published")
	return res, nil
}

func checkPublish(opt ParamsPublishOptions, version int64, skills map[string]state.SkillParams) error {
	var errs []error
	if len(opt.Brokers) == 0 {
		errs = append(errs, fmt.Errorf("%w: no brokers; fix: give --brokers", ErrParamsPublish))
	}
	if opt.Topic == "" {
		errs = append(errs, fmt.Errorf("%w: no topic; fix: set topics.params", ErrParamsPublish))
	}
	if version < 1 {
		errs = append(errs, fmt.Errorf("%w: version %d: must be 1 or more", ErrParamsPublish, version))
	}
	if len(skills) == 0 {
		errs = append(errs, fmt.Errorf("%w: no skills to publish", ErrParamsPublish))
	}
	for name, sp := range skills {
		if name == "" || strings.IndexByte(name, 0) >= 0 {
			errs = append(errs, fmt.Errorf("%w: skill name %q: must be non-empty, without NUL", ErrParamsPublish, name))
		}
		if sp.Version != version {
			errs = append(errs, fmt.Errorf("%w: skill %q has version %d, the set being published is %d", ErrParamsPublish, name, sp.Version, version))
		}
		if err := sp.Params.Validate(name); err != nil {
			errs = append(errs, fmt.Errorf("%w: %v", ErrParamsPublish, err))
		}
	}
	return errors.Join(errs...)
}

// ReadParams reads the params topic to its end, laid over base (nil →
// the built-in defaults), exactly as a processor starting with
// params_from_topic does (ParamsFollower), and returns the set in force.
func ReadParams(ctx context.Context, brokers []string, topic string, base *state.ParamFile, log zerolog.Logger) (*state.ParamFile, error) {
	if base == nil {
		base = state.NewParamFile()
	}
	reg := state.NewRegistry(base)
	f := NewParamsFollower(reg, NewMetrics(), ParamsFollowerOptions{Brokers: brokers, Topic: topic, Base: base, Logger: log})
	if err := f.Start(ctx); err != nil {
		return nil, err
	}
	if err := f.Stop(); err != nil {
		return nil, err
	}
	return reg.Current(), nil
}
