package stream

import (
	"context"
	"encoding/json"
	"errors"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/twmb/franz-go/pkg/kmsg"

	"github.com/attain-dev/attain/state"
)

func skillSet(version int64, prior float64, names ...string) map[string]state.SkillParams {
	m := map[string]state.SkillParams{}
	for i, n := range names {
		m[n] = state.SkillParams{
			Params:  state.Params{Prior: prior + 0.01*float64(i), Learn: 0.1, Guess: 0.2, Slip: 0.1},
			Version: version,
			Fit:     &state.FitInfo{Learners: 100 + i, Answers: 1000, LogLik: -500, Iterations: 7, Converged: true, Heldout: &state.Metrics{AUC: 0.7, RMSE: 0.4, LogLoss: 0.5}},
		}
	}
	return m
}

// Publish two versions, then read the compacted topic back: one record per
// skill and version, key = skill, value = the skill's parameters with
// "version"; read as a processor starting reads it, the latest entry of
// each skill wins and the set's version is the latest. A follower running
// meanwhile swaps once per version, each time to the whole version.
func TestPublishParamsReadBack(t *testing.T) {
	b := startTestBroker(t, 2)
	ctx := context.Background()
	opt := ParamsPublishOptions{Brokers: []string{b.Addr()}, Topic: tParams, Logger: testLogger(t)}

	reg := state.NewRegistry(nil)
	m := NewMetrics()
	f := NewParamsFollower(reg, m, ParamsFollowerOptions{Brokers: []string{b.Addr()}, Topic: tParams, Quiet: 100 * time.Millisecond, Logger: testLogger(t)})
	if err := f.Start(ctx); err != nil {
		t.Fatal(err)
	}
	defer f.Stop()

	v2 := skillSet(2, 0.3, "journal-entries", "trial-balance", "payroll-deductions")
	r, err := PublishParams(ctx, opt, 2, v2)
	if err != nil {
		t.Fatal(err)
	}
	if r.Skills != 3 || r.BaseOffset != 0 || r.Partition != 0 {
		t.Errorf("result %+v", r)
	}
	waitFor(t, 10*time.Second, "version 2 swapped in", func() bool { return reg.Current().Version == 2 })
	if cur := reg.Current(); len(cur.Skills) != 3 {
		t.Errorf("follower swapped in %d skills of version 2, want all 3", len(cur.Skills))
	}
	v3 := skillSet(3, 0.4, "trial-balance", "bank-reconciliation")
	if _, err := PublishParams(ctx, opt, 3, v3); err != nil {
		t.Fatal(err)
	}
	waitFor(t, 10*time.Second, "version 3 swapped in", func() bool { return reg.Current().Version == 3 })
	if reg.Swaps() != 2 {
		t.Errorf("%d swaps, want one per version", reg.Swaps())
	}

	msgs := readAll(t, b.Addr(), tParams)
	if len(msgs) != 5 {
		t.Fatalf("%d records on the params topic, want 5", len(msgs))
	}
	for i, want := range []string{"journal-entries", "payroll-deductions", "trial-balance", "bank-reconciliation", "trial-balance"} {
		if string(msgs[i].Key) != want {
			t.Errorf("record %d key %q, want %q", i, msgs[i].Key, want)
		}
		var raw map[string]any
		if err := json.Unmarshal(msgs[i].Value, &raw); err != nil {
			t.Fatal(err)
		}
		for _, k := range []string{"prior", "learn", "guess", "slip", "forget", "version", "fit"} {
			if _, ok := raw[k]; !ok {
				t.Errorf("record %d lacks %q: %s", i, k, msgs[i].Value)
			}
		}
	}

	pf, err := ReadParams(ctx, []string{b.Addr()}, tParams, nil, testLogger(t))
	if err != nil {
		t.Fatal(err)
	}
	if pf.Version != 3 || len(pf.Skills) != 4 {
		t.Fatalf("read back version %d with %d skills, want 3 with 4", pf.Version, len(pf.Skills))
	}
	for name, want := range map[string]state.SkillParams{
		"journal-entries": v2["journal-entries"], "payroll-deductions": v2["payroll-deductions"],
		"trial-balance": v3["trial-balance"], "bank-reconciliation": v3["bank-reconciliation"],
	} {
		got := pf.Skills[name]
		if got.Params != want.Params || got.Version != want.Version || got.Fit == nil || *got.Fit.Heldout != *want.Fit.Heldout {
			t.Errorf("%s: read back %+v, want %+v", name, got, want)
		}
		if p, v := pf.For(name); p != want.Params || v != want.Version {
			t.Errorf("%s: For = %v, %d", name, p, v)
		}
	}
}

// A failed or cancelled publish leaves nothing of the version on the
// topic, and a publish interrupted after the broker took it leaves all of
// it: the set is one record batch. Failures are injected at the broker
// (kfake's control of Produce requests).
func TestPublishParamsAllOrNothing(t *testing.T) {
	b := startTestBroker(t, 1)
	ctx := context.Background()
	opt := ParamsPublishOptions{Brokers: []string{b.Addr()}, Topic: tParams, Logger: testLogger(t)}
	set := skillSet(2, 0.3, "journal-entries", "trial-balance", "bank-reconciliation", "payroll-deductions")

	// 1. The broker drops every produce connection.
	var failing atomic.Bool
	failing.Store(true)
	var produces atomic.Int64
	b.c.ControlKey(int16(kmsg.Produce), func(kmsg.Request) (kmsg.Response, error, bool) {
		b.c.KeepControl()
		if !failing.Load() {
			return nil, nil, false
		}
		produces.Add(1)
		return nil, errors.New("connection dropped by the test"), true
	})
	_, err := PublishParams(ctx, opt, 2, set)
	if !errors.Is(err, ErrParamsPublish) || !strings.Contains(err.Error(), "fix:") {
		t.Errorf("publish while the broker fails: %v", err)
	}
	if produces.Load() == 0 {
		t.Fatal("no produce request reached the broker; the failure was not exercised")
	}
	if ends := logEnds(t, b.Addr(), tParams); ends[0] != 0 {
		t.Errorf("%d records on the topic after a failed publish, want 0", ends[0])
	}

	// 2. A context cancelled before the send.
	cctx, cancel := context.WithCancel(ctx)
	cancel()
	if _, err := PublishParams(cctx, opt, 2, set); !errors.Is(err, ErrParamsPublish) && !errors.Is(err, context.Canceled) {
		t.Errorf("cancelled publish: %v", err)
	}
	if ends := logEnds(t, b.Addr(), tParams); ends[0] != 0 {
		t.Errorf("%d records after a cancelled publish, want 0", ends[0])
	}

	// 3. The client gives up while the broker holds the request, and the
	// broker then appends it: the whole set is there, or nothing.
	failing.Store(false)
	release := make(chan struct{})
	held := make(chan struct{})
	var once atomic.Bool
	b.c.ControlKey(int16(kmsg.Produce), func(kmsg.Request) (kmsg.Response, error, bool) {
		if once.CompareAndSwap(false, true) {
			close(held)
			b.c.SleepControl(func() { <-release })
		}
		return nil, nil, false
	})
	tctx, tcancel := context.WithCancel(ctx)
	done := make(chan error, 1)
	go func() {
		_, err := PublishParams(tctx, opt, 2, set)
		done <- err
	}()
	<-held
	tcancel()
	err = <-done
	close(release)
	if err == nil {
		t.Error("a publish cancelled in flight reported success")
	}
	time.Sleep(200 * time.Millisecond) // let the broker finish the request it held
	n := logEnds(t, b.Addr(), tParams)[0]
	if n != 0 && n != int64(len(set)) {
		t.Fatalf("%d records after an interrupted publish: part of the set", n)
	}
	t.Logf("interrupted publish left %d of %d records (all or nothing)", n, len(set))

	// 4. Retried, it lands whole; read back, every skill is at version 2.
	if _, err := PublishParams(ctx, opt, 2, set); err != nil {
		t.Fatal(err)
	}
	pf, err := ReadParams(ctx, []string{b.Addr()}, tParams, nil, testLogger(t))
	if err != nil {
		t.Fatal(err)
	}
	if pf.Version != 2 || len(pf.Skills) != len(set) {
		t.Errorf("after the retry: version %d, %d skills", pf.Version, len(pf.Skills))
	}
}

// Sets that must not go out are refused before anything is sent, every
// problem named; a params topic of several partitions is refused.
func TestPublishParamsRefuses(t *testing.T) {
	b := startTestBroker(t, 3)
	ctx := context.Background()
	opt := ParamsPublishOptions{Brokers: []string{b.Addr()}, Topic: tParams, Logger: testLogger(t)}
	bad := skillSet(2, 0.3, "a", "b")
	bad["a"] = state.SkillParams{Params: state.Params{Prior: 0.3, Learn: 0.1, Guess: 0.6, Slip: 0.5}, Version: 2}
	bad["b"] = state.SkillParams{Params: state.Params{Prior: 0.3, Learn: 0.1, Guess: 0.2, Slip: 0.1}, Version: 1}
	_, err := PublishParams(ctx, opt, 2, bad)
	if !errors.Is(err, ErrParamsPublish) || !strings.Contains(err.Error(), "guess+slip") || !strings.Contains(err.Error(), `skill "b" has version 1`) {
		t.Errorf("bad set: %v", err)
	}
	if _, err := PublishParams(ctx, opt, 2, nil); !errors.Is(err, ErrParamsPublish) {
		t.Errorf("empty set: %v", err)
	}
	if err := EnsureTopics(ctx, []string{b.Addr()}, []TopicSpec{{Name: "params-wide", Partitions: 3, Compacted: true}}, testLogger(t)); err != nil {
		t.Fatal(err)
	}
	opt.Topic = "params-wide"
	if _, err := PublishParams(ctx, opt, 2, skillSet(2, 0.3, "a")); !errors.Is(err, ErrParamsPublish) || !strings.Contains(err.Error(), "3 partitions") {
		t.Errorf("3-partition topic: %v", err)
	}
	if ends := logEnds(t, b.Addr(), tParams); ends[0] != 0 {
		t.Errorf("%d records after refused publishes", ends[0])
	}
}
