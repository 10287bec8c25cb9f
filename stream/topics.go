package stream

import (
	"context"
	"errors"
	"fmt"
	"strconv"
	"strings"
	"time"

	"github.com/rs/zerolog"
	"github.com/segmentio/kafka-go"
)

// ErrTopics is wrapped by every error about a topic attain needs that is
// missing and could not be created, or could not be inspected.
var ErrTopics = errors.New("attain: topics")

// TopicSpec describes a topic attain creates when it is missing.
type TopicSpec struct {
	Name       string
	Partitions int
	// Compacted sets cleanup.policy=compact (the params topic: the latest
	// value per key is what counts).
	Compacted bool
}

// Topics returns the four topics of a configuration: the answers topic,
// the mastery and dead-letter topics with partitions partitions each, and
// the compacted params topic with one partition (parameter sets are small
// and read whole, so one partition keeps their order total).
func Topics(answers, mastery, deadLetter, params string, partitions int) []TopicSpec {
	return []TopicSpec{
		{Name: answers, Partitions: partitions},
		{Name: mastery, Partitions: partitions},
		{Name: deadLetter, Partitions: partitions},
		{Name: params, Partitions: 1, Compacted: true},
	}
}

// EnsureTopics creates every topic of specs that does not exist yet. A
// topic that exists is left as it is (its partition count is logged). When
// a topic is missing and the cluster refuses to create it, the error names
// the topic, the broker's reason and the fix.
func EnsureTopics(ctx context.Context, brokers []string, specs []TopicSpec, log zerolog.Logger) error {
	tr := &kafka.Transport{}
	defer tr.CloseIdleConnections()
	cl := &kafka.Client{Addr: kafka.TCP(brokers...), Transport: tr, Timeout: 10 * time.Second}

	names := make([]string, len(specs))
	for i, s := range specs {
		names[i] = s.Name
	}
	meta, err := cl.Metadata(ctx, &kafka.MetadataRequest{Topics: names})
	if err != nil {
		return fmt.Errorf("%w: reading metadata from %s: %v", ErrTopics, strings.Join(brokers, ","), err)
	}
	exists := map[string]int{}
	for _, t := range meta.Topics {
		if t.Error == nil {
			exists[t.Name] = len(t.Partitions)
		}
	}
	var create []kafka.TopicConfig
	for _, s := range specs {
		if n, ok := exists[s.Name]; ok {
			log.Debug().Str("topic", s.Name).Int("partitions", n).Msg("topic exists")
			continue
		}
		tc := kafka.TopicConfig{Topic: s.Name, NumPartitions: s.Partitions, ReplicationFactor: -1}
		if s.Compacted {
			tc.ConfigEntries = []kafka.ConfigEntry{{ConfigName: "cleanup.policy", ConfigValue: "compact"}}
		}
		create = append(create, tc)
	}
	if len(create) == 0 {
		return nil
	}
	res, err := cl.CreateTopics(ctx, &kafka.CreateTopicsRequest{Topics: create})
	if err != nil {
		return fmt.Errorf("%w: creating missing topics %s: %v; fix: create them on the cluster", ErrTopics, topicList(create), err)
	}
	var errs []error
	for _, tc := range create {
		err := res.Errors[tc.Topic]
		switch {
		case err == nil:
			log.Info().Str("topic", tc.Topic).Int("partitions", tc.NumPartitions).Bool("compacted", len(tc.ConfigEntries) > 0).Msg("created topic")
		case errors.Is(err, kafka.TopicAlreadyExists):
			// Created concurrently by another instance.
		default:
			fix := "create it on the cluster"
			if tc.NumPartitions > 0 {
				fix += " with " + strconv.Itoa(tc.NumPartitions) + " partitions"
			}
			if len(tc.ConfigEntries) > 0 {
				fix += " and cleanup.policy=compact"
			}
			fix += ", or let attain's principal create topics"
			errs = append(errs, fmt.Errorf("%w: topic %q does not exist and could not be created: %v; fix: %s", ErrTopics, tc.Topic, err, fix))
		}
	}
	return errors.Join(errs...)
}

func topicList(tcs []kafka.TopicConfig) string {
	names := make([]string, len(tcs))
	for i, tc := range tcs {
		names[i] = strconv.Quote(tc.Topic)
	}
	return strings.Join(names, ", ")
}

// partitionBounds returns the first and the last (next to be written)
// offset of one partition.
func partitionBounds(ctx context.Context, cl *kafka.Client, topic string, p int) (first, last int64, err error) {
	res, err := cl.ListOffsets(ctx, &kafka.ListOffsetsRequest{
		Topics: map[string][]kafka.OffsetRequest{topic: {kafka.FirstOffsetOf(p), kafka.LastOffsetOf(p)}},
	})
	if err != nil {
		return 0, 0, fmt.Errorf("listing offsets of %s/%d: %w", topic, p, err)
	}
	for _, po := range res.Topics[topic] {
		if po.Partition != p {
			continue
		}
		if po.Error != nil {
			return 0, 0, fmt.Errorf("listing offsets of %s/%d: %w", topic, p, po.Error)
		}
		return po.FirstOffset, po.LastOffset, nil
	}
	return 0, 0, fmt.Errorf("listing offsets of %s/%d: no answer for the partition", topic, p)
}

// topicPartitions returns the partition ids of topic.
func topicPartitions(ctx context.Context, cl *kafka.Client, topic string) ([]int, error) {
	meta, err := cl.Metadata(ctx, &kafka.MetadataRequest{Topics: []string{topic}})
	if err != nil {
		return nil, fmt.Errorf("reading metadata of %s: %w", topic, err)
	}
	for _, t := range meta.Topics {
		if t.Name != topic {
			continue
		}
		if t.Error != nil {
			return nil, fmt.Errorf("reading metadata of %s: %w", topic, t.Error)
		}
		ps := make([]int, len(t.Partitions))
		for i, p := range t.Partitions {
			ps[i] = p.ID
		}
		return ps, nil
	}
	return nil, fmt.Errorf("reading metadata of %s: topic not in the answer", topic)
}
