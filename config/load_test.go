package config

import (
	"errors"
	"flag"
	"io"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"
	"time"
)

func writeFile(t *testing.T, name, text string) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), name)
	if err := os.WriteFile(p, []byte(text), 0o600); err != nil {
		t.Fatal(err)
	}
	return p
}

func TestLoadNothingIsDefault(t *testing.T) {
	c, err := Load("", []string{"PATH=/usr/bin", "HOME=/root"}, nil)
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(c, Default()) {
		t.Fatalf("got %+v, want Default()", c)
	}
	if err := Default().Validate(); err != nil {
		t.Fatalf("Default() is invalid: %v", err)
	}
}

const precedenceFile = `
brokers: [file-1:9092]
data_dir: from-file
http_addr: 127.0.0.1:7000
batch:
  interval: 200ms
topics:
  answers: file.answers
model:
  threshold: 0.8
`

func TestEnvOverridesFile(t *testing.T) {
	path := writeFile(t, "attain.yaml", precedenceFile)
	env := []string{
		"ATTAIN_BATCH_INTERVAL=300ms",
		"ATTAIN_TOPICS_ANSWERS=env.answers",
		"ATTAIN_BROKERS= env-1:9092 , env-2:9092,,",
		"ATTAIN_PARAMS_FROM_TOPIC=1",
		"ATTAIN_MODEL_THRESHOLD=0.97",
		"ATTAIN_CACHE_RECORDS=1000",
		"ATTAIN_HTTP_ADDR=", // set but empty: HTTP off
		"UNRELATED=1",
	}
	c, err := loadAndValidate(path, env)
	if err != nil {
		t.Fatal(err)
	}
	if c.Batch.Interval != 300*time.Millisecond {
		t.Errorf("batch.interval = %v, want the environment's 300ms", c.Batch.Interval)
	}
	if c.Topics.Answers != "env.answers" {
		t.Errorf("topics.answers = %q", c.Topics.Answers)
	}
	if !reflect.DeepEqual(c.Brokers, []string{"env-1:9092", "env-2:9092"}) {
		t.Errorf("brokers = %q", c.Brokers)
	}
	if !c.ParamsFromTopic || c.Model.Threshold != 0.97 || c.Cache.Records != 1000 || c.HTTPAddr != "" {
		t.Errorf("env values not applied: %+v", c)
	}
	if c.DataDir != "from-file" {
		t.Errorf("data_dir = %q, want the file's value (no env set)", c.DataDir)
	}
	if c.Topics.Mastery != "attain.mastery" {
		t.Errorf("topics.mastery = %q, want the default", c.Topics.Mastery)
	}
}

func TestFlagsOverrideEnv(t *testing.T) {
	path := writeFile(t, "attain.yaml", precedenceFile)
	env := []string{"ATTAIN_BROKERS=env-1:9092", "ATTAIN_DATA_DIR=from-env", "ATTAIN_HTTP_ADDR=127.0.0.1:7100"}

	fs := flag.NewFlagSet("run", flag.ContinueOnError)
	fs.SetOutput(io.Discard)
	configPath := fs.String("config", "", "config file") // the command's own flag
	verbose := fs.Bool("verbose", false, "another flag of the command")
	def := Default()
	def.RegisterFlags(fs)
	args := []string{"--config", path, "--brokers", "flag-1:9092,flag-2:9092", "-data-dir=from-flag", "--verbose", "--params", ""}
	if err := fs.Parse(args); err != nil {
		t.Fatal(err)
	}
	c, err := loadAndValidate(*configPath, env)
	if err != nil {
		t.Fatal(err)
	}
	if c.DataDir != "from-env" {
		t.Fatalf("without fs: data_dir = %q, want from-env", c.DataDir)
	}
	c, err = Load(*configPath, env, fs)
	if err != nil {
		t.Fatal(err)
	}
	if err := c.Validate(); err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(c.Brokers, []string{"flag-1:9092", "flag-2:9092"}) {
		t.Errorf("brokers = %q, want the flag's", c.Brokers)
	}
	if c.DataDir != "from-flag" {
		t.Errorf("data_dir = %q, want from-flag", c.DataDir)
	}
	// --http-addr was not given: the environment's value stands.
	if c.HTTPAddr != "127.0.0.1:7100" {
		t.Errorf("http_addr = %q, want the environment's", c.HTTPAddr)
	}
	if c.Batch.Interval != 200*time.Millisecond {
		t.Errorf("batch.interval = %v, want the file's", c.Batch.Interval)
	}
	if !*verbose {
		t.Error("the command's own flag was lost")
	}
}

func TestRegisterFlags(t *testing.T) {
	fs := flag.NewFlagSet("run", flag.ContinueOnError)
	c := Default()
	c.Brokers = []string{"a:1", "b:2"}
	c.RegisterFlags(fs)
	want := map[string]string{
		"brokers": "a:1,b:2", "data-dir": "attain-data", "http-addr": "127.0.0.1:8080",
		"params": "", "embedded-broker-addr": "127.0.0.1:9092",
	}
	n := 0
	fs.VisitAll(func(f *flag.Flag) {
		n++
		d, ok := want[f.Name]
		if !ok {
			t.Errorf("unexpected flag --%s", f.Name)
		} else if f.DefValue != d {
			t.Errorf("--%s default %q, want %q", f.Name, f.DefValue, d)
		}
		if !strings.Contains(f.Usage, "ATTAIN_") {
			t.Errorf("--%s usage does not name its variable: %q", f.Name, f.Usage)
		}
	})
	if n != len(want) || fs.Lookup("config") != nil {
		t.Errorf("%d flags registered (want %d, and no --config)", n, len(want))
	}
	// The flags do not write into c: only Load applies them.
	if err := fs.Parse([]string{"--data-dir", "x"}); err != nil {
		t.Fatal(err)
	}
	if c.DataDir != "attain-data" {
		t.Errorf("RegisterFlags bound the flag into c: data_dir = %q", c.DataDir)
	}
}

func TestConfigFileFromEnv(t *testing.T) {
	a := writeFile(t, "a.yaml", "data_dir: from-a\n")
	b := writeFile(t, "b.yaml", "data_dir: from-b\n")
	c, err := Load("", []string{"ATTAIN_CONFIG=" + a}, nil)
	if err != nil || c.DataDir != "from-a" {
		t.Errorf("ATTAIN_CONFIG: data_dir %q, err %v", c.DataDir, err)
	}
	// An explicit path (the --config flag) wins over ATTAIN_CONFIG.
	c, err = Load(b, []string{"ATTAIN_CONFIG=" + a}, nil)
	if err != nil || c.DataDir != "from-b" {
		t.Errorf("path over ATTAIN_CONFIG: data_dir %q, err %v", c.DataDir, err)
	}
}

func TestUnknownEnv(t *testing.T) {
	_, err := Load("", []string{"ATTAIN_BATCH_INTERVALL=1s", "ATTAIN_BROKER=a:1", "ATTAIN_COLOUR=1", "ATTAIN_CONFIG="}, nil)
	if !errors.Is(err, ErrInvalid) {
		t.Fatalf("want ErrInvalid, got %v", err)
	}
	for _, w := range []string{
		"ATTAIN_BATCH_INTERVALL: not a configuration variable; fix: did you mean ATTAIN_BATCH_INTERVAL? rename it, or unset it",
		"ATTAIN_BROKER: not a configuration variable; fix: did you mean ATTAIN_BROKERS?",
		"ATTAIN_COLOUR: not a configuration variable; fix: unset it",
	} {
		if !strings.Contains(err.Error(), w) {
			t.Errorf("error lacks %q:\n%v", w, err)
		}
	}
	if n := len(keyErrors(t, err)); n != 3 {
		t.Errorf("%d problems, want 3 (ATTAIN_CONFIG is not one):\n%v", n, err)
	}
}

func TestBadEnvValues(t *testing.T) {
	_, err := Load("", []string{
		"ATTAIN_BATCH_INTERVAL=fast",
		"ATTAIN_PARAMS_FROM_TOPIC=maybe",
		"ATTAIN_CACHE_RECORDS=many",
		"ATTAIN_MODEL_THRESHOLD=high",
		"ATTAIN_TOPICS_PARTITIONS=99999999999999999999",
		"ATTAIN_REFIT_INTERVAL=",
	}, nil)
	if !errors.Is(err, ErrInvalid) {
		t.Fatalf("want ErrInvalid, got %v", err)
	}
	for _, w := range []string{
		`ATTAIN_BATCH_INTERVAL: "fast" is not a duration (key batch.interval); fix: set ATTAIN_BATCH_INTERVAL to a Go duration such as 100ms, or unset it`,
		`ATTAIN_PARAMS_FROM_TOPIC: "maybe" is not true or false (key params_from_topic); fix: set ATTAIN_PARAMS_FROM_TOPIC to true or false`,
		`ATTAIN_CACHE_RECORDS: "many" is not an integer (key cache.records); fix: set ATTAIN_CACHE_RECORDS to an integer such as 200000`,
		`ATTAIN_MODEL_THRESHOLD: "high" is not a number (key model.threshold); fix: set ATTAIN_MODEL_THRESHOLD to a number such as 0.95`,
		`ATTAIN_TOPICS_PARTITIONS: "99999999999999999999" is not an integer`,
		`ATTAIN_REFIT_INTERVAL: "" is not a duration (key refit.interval); fix: set ATTAIN_REFIT_INTERVAL to a Go duration such as 1h (0 turns it off)`,
	} {
		if !strings.Contains(err.Error(), w) {
			t.Errorf("error lacks %q:\n%v", w, err)
		}
	}
	if n := len(keyErrors(t, err)); n != 6 {
		t.Errorf("%d problems, want 6:\n%v", n, err)
	}
}

func TestAllSourcesReportedTogether(t *testing.T) {
	path := writeFile(t, "attain.yaml", "batch:\n  intervl: 1s\n")
	_, err := Load(path, []string{"ATTAIN_LOG_LEVL=debug"}, nil)
	for _, w := range []string{"batch.intervl: unknown key", "ATTAIN_LOG_LEVL: not a configuration variable; fix: did you mean ATTAIN_LOG_LEVEL?"} {
		if err == nil || !strings.Contains(err.Error(), w) {
			t.Errorf("error lacks %q: %v", w, err)
		}
	}
}

func TestEveryKeyHasAnEnvVar(t *testing.T) {
	// Set every key through the environment to the value it has in
	// full.good.yml and compare: proves each variable reaches its field.
	want, err := Load(filepath.Join(fixtures, "full.good.yml"), nil, nil)
	if err != nil {
		t.Fatal(err)
	}
	var env []string
	for _, k := range allKeys {
		env = append(env, k.env+"="+format(k.field(&want)))
	}
	got, err := Load("", env, nil)
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(got, want) {
		t.Errorf("via environment\n%+v\nwant\n%+v", got, want)
	}
}
