package stream

import (
	"context"
	"encoding/json"
	"io"
	"net/http"
	"path/filepath"
	"testing"
	"time"

	"github.com/attain-dev/attain/config"
	"github.com/attain-dev/attain/state"
)

// TestDaemon runs the whole of `attain run` in the test process with its
// embedded broker: answers produced to it are applied and served by the
// read API; after ctx ends every part has stopped, no goroutine is left,
// and the store holds the in-order computation.
func TestDaemon(t *testing.T) {
	before := settleGoroutines(0, 0)
	dir := t.TempDir()
	cfg := config.Default()
	cfg.DataDir = filepath.Join(dir, "data")
	cfg.EmbeddedBrokerAddr = "127.0.0.1:0"
	cfg.HTTPAddr = "127.0.0.1:0"
	cfg.ParamsFromTopic = true
	if err := cfg.Validate(); err != nil {
		t.Fatal(err)
	}
	d := NewDaemon(cfg, testLogger(t))
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- d.Run(ctx) }()
	select {
	case <-d.Ready():
	case err := <-done:
		t.Fatalf("daemon failed to start: %v", err)
	case <-time.After(30 * time.Second):
		t.Fatal("daemon not ready within 30 s")
	}
	addr := d.Brokers()[0]
	answers := cohort(11, 30, 1200)
	produce(t, addr, tAnswers, answerMessages(answers))
	want, _ := expected(answers, state.NewParamFile(), cfg.Policy())
	learner := answers[len(answers)-1].Learner
	waitFor(t, 30*time.Second, "the read API serving the last learner's answers", func() bool {
		resp, err := http.Get("http://" + d.HTTPAddr() + "/v1/learners/" + learner)
		if err != nil {
			return false
		}
		defer resp.Body.Close()
		var v struct {
			Skills map[string]struct{ Opportunities uint32 }
		}
		b, _ := io.ReadAll(resp.Body)
		if resp.StatusCode != 200 || json.Unmarshal(b, &v) != nil {
			return false
		}
		for skill, r := range want[learner] {
			if v.Skills[skill].Opportunities != r.Opportunities {
				return false
			}
		}
		return true
	})
	waitFor(t, 30*time.Second, "everything consumed", func() bool { return d.Metrics().Consumed.Load() == int64(len(answers)) })
	cancel()
	if err := <-done; err != nil {
		t.Fatalf("daemon: %v", err)
	}
	if after := settleGoroutines(before, 10*time.Second); after > before {
		t.Errorf("goroutines: %d before the daemon, %d after it stopped\n%s", before, after, goroutineDump())
	}
	st := openTestStore(t, cfg.DataDir)
	defer st.Close()
	for l, skills := range want {
		got, _, err := st.Learner(l)
		if err != nil {
			t.Fatal(err)
		}
		for s, w := range skills {
			if got[s] != w {
				t.Errorf("%s/%s: got %+v, want %+v", l, s, got[s], w)
			}
		}
	}
}
