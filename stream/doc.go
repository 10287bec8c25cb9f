// Package stream owns attain's side of Kafka: the consumer-group loop over
// the answers topic, input decoders, the outbox publisher of mastery events
// and dead letters, the params-topic follower, topic creation, the embedded
// broker, and the daemon that wires them with the store for `attain run`.
// It promises that every input offset ends applied or dead-lettered exactly
// once in the store, and that every committed output is published at least
// once, with its deterministic id, by the partition's current owner only.
//
// # Consuming
//
// Processor joins the consumer group with kafka-go's ConsumerGroup and
// Generation API. Each assigned partition gets one goroutine (started with
// Generation.Start) and a group-less Reader seeked to the store's next
// offset (stored offset + 1), or, when none is stored, to the start that
// consumer.start names (earliest, or latest = the partition's last offset
// at assignment). A stored offset below the log start (retention deleted
// unread answers) is logged as an error and counted (Processor.Skipped,
// Metrics.SkippedOffsets); reading continues from the log start.
//
// Messages are decoded (Decoder; state.NativeDecoder for the native JSON
// event), applied with state.Partition.Apply, and committed with
// Partition.Commit at least every batch.interval after a batch's first
// message and every batch.max_answers messages. Rejected input — an empty
// value or tombstone, a value over consumer.max_event_bytes, an unsupported
// version, JSON that does not parse, a field missing or of the wrong type —
// is staged with Partition.DeadLetter in the same batch, so its offset is
// committed like any other. A partition never stops on bad input.
//
// Rebalances are eager: on revocation a partition finishes the message in
// hand, commits its batch (synced), releases its store handle and stops;
// the store stays open. Kafka group offsets (stored offset + 1) are
// committed after store commits, at most once per GroupCommitInterval, for
// lag monitoring only: the store's offset is the one consumption resumes
// from.
//
// # Fencing
//
// Effects outside the process — publishing and group-offset commits — are
// made only while the partition's generation is current: its context is
// checked before each, and a write in flight is abandoned when it ends.
// The local store commit of the batch in hand is always made, since it
// records only work already done and replay from the stored offset
// reproduces it exactly.
//
// # Outbox publishing
//
// After each commit with outputs, the partition's publishing goroutine
// (owned by the partition's goroutine, which waits for it before it
// finishes) sends the committed outbox entries in order, in chunks, with
// synchronous writes acknowledged by all in-sync replicas (RequiredAcks =
// RequireAll) and an explicit balancer (producer.balancer: murmur2 as the
// Java client, crc32 as librdkafka; Balancer), then deletes them from the
// store; consumption of the next batch goes on meanwhile. A crash between
// the two re-sends the chunk on restart; an assigned partition drains its
// outbox before it consumes. A failed send is retried with a growing
// backoff while consumption goes on.
//
// Mastery events are CloudEvents 1.0 in structured JSON mode
// (content-type application/cloudevents+json): specversion "1.0", id =
// the output's state.EventID, source "urn:attain:" + consumer group, type
// attain.mastery.reached.v1 or attain.mastery.stuck.v1, subject = the
// learner, time = the answer's `at`, datacontenttype application/json, and
// data {"learner", "skill", "mastery", "opportunities", "params_version",
// "answer_id"}; the Kafka key is the learner.
//
// A dead letter keeps the input's key; its value is a JSON DeadLetterBody
// {"reason", "field", "source": {"topic", "partition", "offset"}, "time",
// "original"} where "original" is the input value as a JSON string (or
// "original_base64" when the input is not valid UTF-8), so the input is
// kept byte for byte either way. The reason starts with a code (empty,
// oversized, unsupported-version, malformed, invalid, unprocessable), then
// ": " and the detail. The headers repeat it: attain-reason,
// attain-reason-code, attain-field, attain-source-topic,
// attain-source-partition, attain-source-offset, and attain-value = "body";
// when the body would exceed 900 KiB the value is the input itself and
// attain-value = "original".
//
// # Parameters
//
// ParamsFollower reads the compacted params topic (key = skill, value = a
// state.SkillParams JSON object with its "version") to its end at start,
// lays it over the base parameter file, swaps the result into the
// state.Registry, and keeps following the topic, swapping each new version
// in once the topic has been quiet for a moment.
//
// # Embedded broker
//
// Broker is a single-node kfake cluster listening on a TCP address, its
// topics, offsets and groups persisted under a directory (kfake.DataDir).
// `attain run` with no brokers configured starts it under data_dir/broker;
// EnsureTopics creates the answers, mastery and dead-letter topics
// (topics.partitions partitions) and the compacted params topic, on the
// embedded broker and on a real cluster alike.
package stream
