// Package config owns attain's configuration: the Config struct and its
// defaults, loading it from a YAML file, ATTAIN_* environment variables and
// flags, and validation. It promises that a setting it does not know, or a
// value it cannot read, is an error naming the key and the fix — never
// silently ignored — and that Validate reports every problem at once.
//
// # Sources and precedence
//
// Load starts from Default() and applies, each overriding the one before:
//
//  1. the YAML file given by the command's --config flag, or by
//     ATTAIN_CONFIG when the flag is not given;
//  2. environment variables: ATTAIN_ followed by the key path upper-cased
//     with '.' turned into '_' (batch.interval → ATTAIN_BATCH_INTERVAL);
//     lists are comma-separated (ATTAIN_BROKERS=kafka-1:9092,kafka-2:9092)
//     and booleans follow strconv.ParseBool;
//  3. the flags registered by Config.RegisterFlags that were set on the
//     command line.
//
// Durations are Go duration strings ("100ms", "1h") in all three. The file
// is decoded strictly with go.yaml.in/yaml/v3: an unknown key (with the
// nearest known key as a suggestion), a value of the wrong type, a key set
// twice or a second document is an error. An ATTAIN_ variable that is not a
// key (other than ATTAIN_CONFIG), or whose value does not parse, is an
// error too. Relative paths are relative to the working directory.
//
// # Keys
//
// Every key, its environment variable, flag ("-": none) and default.
// Reference returns the same table with each key's meaning, as Markdown;
// deploy/attain.yaml is an example file with every key explained.
//
//	key                         environment                        flag                   default
//	brokers                     ATTAIN_BROKERS                     --brokers              []
//	data_dir                    ATTAIN_DATA_DIR                    --data-dir             attain-data
//	http_addr                   ATTAIN_HTTP_ADDR                   --http-addr            127.0.0.1:8080
//	http_token                  ATTAIN_HTTP_TOKEN                  -                      ""
//	params                      ATTAIN_PARAMS                      --params               ""
//	params_from_topic           ATTAIN_PARAMS_FROM_TOPIC           -                      false
//	items_file                  ATTAIN_ITEMS_FILE                  -                      ""
//	embedded_broker_addr        ATTAIN_EMBEDDED_BROKER_ADDR        --embedded-broker-addr 127.0.0.1:9092
//	topics.answers              ATTAIN_TOPICS_ANSWERS              -                      answers
//	topics.mastery              ATTAIN_TOPICS_MASTERY              -                      attain.mastery
//	topics.params               ATTAIN_TOPICS_PARAMS               -                      attain.params
//	topics.deadletter           ATTAIN_TOPICS_DEADLETTER           -                      attain.deadletter
//	topics.partitions           ATTAIN_TOPICS_PARTITIONS           -                      4
//	consumer.group              ATTAIN_CONSUMER_GROUP              -                      attain
//	consumer.start              ATTAIN_CONSUMER_START              -                      earliest
//	consumer.max_event_bytes    ATTAIN_CONSUMER_MAX_EVENT_BYTES    -                      65536
//	consumer.dedupe_window      ATTAIN_CONSUMER_DEDUPE_WINDOW      -                      32
//	consumer.session_timeout    ATTAIN_CONSUMER_SESSION_TIMEOUT    -                      10s
//	consumer.heartbeat_interval ATTAIN_CONSUMER_HEARTBEAT_INTERVAL -                      3s
//	batch.interval              ATTAIN_BATCH_INTERVAL              -                      100ms
//	batch.max_answers           ATTAIN_BATCH_MAX_ANSWERS           -                      10000
//	cache.records               ATTAIN_CACHE_RECORDS               -                      200000
//	cache.block_cache_mb        ATTAIN_CACHE_BLOCK_CACHE_MB        -                      144
//	model.threshold             ATTAIN_MODEL_THRESHOLD             -                      0.95
//	model.stuck_after           ATTAIN_MODEL_STUCK_AFTER           -                      10
//	producer.balancer           ATTAIN_PRODUCER_BALANCER           -                      murmur2
//	refit.interval              ATTAIN_REFIT_INTERVAL              -                      0s
//	refit.answers               ATTAIN_REFIT_ANSWERS               -                      0
//	refit.min_learners          ATTAIN_REFIT_MIN_LEARNERS          -                      50
//	refit.min_answers           ATTAIN_REFIT_MIN_ANSWERS           -                      500
//	refit.margin                ATTAIN_REFIT_MARGIN                -                      0
//	refit.folds                 ATTAIN_REFIT_FOLDS                 -                      5
//	log.level                   ATTAIN_LOG_LEVEL                   -                      info
//	log.format                  ATTAIN_LOG_FORMAT                  -                      auto
//
// # Validation
//
// Config.Validate checks ranges, names and addresses (broker and listen
// addresses are host:port; topics are valid, distinct Kafka topic names;
// params and items_file exist when set; consumer.heartbeat_interval is less
// than consumer.session_timeout) and returns all problems joined,
// each a *KeyError printed as "key: problem; fix: ...". Every error of Load
// and Validate matches ErrInvalid with errors.Is.
//
// # Derived settings
//
// Config.Policy and Config.StoreOptions give the thresholds and the store
// options for the state package; Config.Logger gives a zerolog.Logger for
// the log section.
package config
