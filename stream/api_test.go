package stream

import (
	"context"
	"encoding/json"
	"errors"
	"io"
	"math"
	"net"
	"net/http"
	"net/url"
	"runtime"
	"strings"
	"testing"
	"time"

	"github.com/attain-dev/attain/state"
	"github.com/rs/zerolog"
)

var t0 = time.Date(2025, 3, 4, 18, 30, 0, 250_000_000, time.UTC)

// apiFixture is a real Pebble store with a few committed answers.
type apiFixture struct {
	st      *state.Store
	m       *Metrics
	outputs int // outbox entries staged by the answers
}

func newAPIFixture(t *testing.T) *apiFixture {
	t.Helper()
	st, err := state.OpenStore(t.TempDir(), state.StoreOptions{Policy: state.DefaultPolicy(), Logger: zerolog.Nop()})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		if err := st.Close(); err != nil {
			t.Errorf("closing the store: %v", err)
		}
	})
	f := &apiFixture{st: st, m: NewMetrics()}
	params := state.NewParamFile() // version 1, default set
	ans := func(id, learner string, correct bool, at time.Time, skills ...string) state.Answer {
		return state.Answer{ID: id, Learner: learner, Skills: skills, Correct: correct, At: at}
	}
	batches := map[int32][]state.Answer{
		0: {
			ans("i1", "ines", true, t0, "journal-entries"),
			ans("i2", "ines", true, t0.Add(time.Minute), "journal-entries", "trial-balance"),
			ans("i3", "ines", false, t0.Add(2*time.Minute), "journal-entries"),
			ans("i4", "ines", true, t0.Add(3*time.Minute), "journal-entries"),
			ans("i2", "ines", true, t0.Add(4*time.Minute), "journal-entries", "trial-balance"), // duplicate id
		},
		1: {
			ans("s1", "learner 7", true, t0, "bank-reconciliation"),
			ans("s2", "learner 7", true, t0.Add(time.Minute), "bank-reconciliation"),
			ans("s3", "learner 7", true, t0.Add(2*time.Minute), "bank-reconciliation"),
			ans("s4", "learner 7", true, t0.Add(3*time.Minute), "bank-reconciliation"),
			ans("s5", "learner 7", true, t0.Add(4*time.Minute), "bank-reconciliation"),
			ans("s6", "learner 7", true, t0.Add(5*time.Minute), "bank-reconciliation"),
		},
		2: {ans("n1", "north/17", false, t0, "payroll-deductions")},
	}
	for p, as := range batches {
		pt, err := st.Partition(p)
		if err != nil {
			t.Fatal(err)
		}
		for i, a := range as {
			res, err := pt.Apply(a, int64(i), params)
			if err != nil {
				t.Fatalf("partition %d: applying %s: %v", p, a.ID, err)
			}
			f.outputs += len(res.Outputs)
		}
		if err := pt.Commit(true); err != nil {
			t.Fatal(err)
		}
		pt.Release()
	}
	// Staged but never committed: the read API must not see it.
	pt, err := st.Partition(3)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := pt.Apply(ans("p1", "pending", true, t0, "sales-tax-invoices"), 0, params); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(pt.Release)
	return f
}

// serve runs api on a real listener on 127.0.0.1 and returns its base URL;
// the test's cleanup stops it and checks that Serve returned nil.
func serve(t *testing.T, api *API) string {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- api.Serve(ctx, ln) }()
	t.Cleanup(func() {
		cancel()
		if err := <-done; err != nil {
			t.Errorf("Serve: %v", err)
		}
	})
	return "http://" + ln.Addr().String()
}

type reply struct {
	status int
	header http.Header
	body   []byte
}

func do(t *testing.T, method, u string, hdr map[string]string) reply {
	t.Helper()
	req, err := http.NewRequest(method, u, nil)
	if err != nil {
		t.Fatal(err)
	}
	for k, v := range hdr {
		req.Header.Set(k, v)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	return reply{resp.StatusCode, resp.Header, b}
}

// wantJSONError checks a JSON body {"error": "..."} with a non-empty message.
func wantJSONError(t *testing.T, what string, r reply, status int) string {
	t.Helper()
	if r.status != status {
		t.Fatalf("%s: status %d, want %d; body %s", what, r.status, status, r.body)
	}
	if ct := r.header.Get("Content-Type"); ct != "application/json" {
		t.Errorf("%s: Content-Type %q", what, ct)
	}
	var e map[string]string
	if err := json.Unmarshal(r.body, &e); err != nil || e["error"] == "" || len(e) != 1 {
		t.Fatalf("%s: body %s is not {\"error\": \"...\"} (%v)", what, r.body, err)
	}
	return e["error"]
}

type learnerJSON struct {
	Learner string `json:"learner"`
	Skills  map[string]struct {
		Mastery       *float64 `json:"mastery"`
		Mastered      *bool    `json:"mastered"`
		Opportunities *uint32  `json:"opportunities"`
		Correct       *uint32  `json:"correct"`
		ParamsVersion *int64   `json:"params_version"`
		Updated       *string  `json:"updated"`
	} `json:"skills"`
}

func TestAPILearner(t *testing.T) {
	f := newAPIFixture(t)
	base := serve(t, NewAPI(f.st, f.m, APIOptions{Logger: zerolog.Nop()}))

	// Expected masteries computed by hand from the BKT equations of
	// ARCHITECTURE.md (Corbett & Anderson, 1995) with the default set
	// prior 0.3, learn 0.1, guess 0.2, slip 0.1, forget 0, in double
	// precision outside this code base (a few lines of Python arithmetic).
	type want struct {
		mastery       float64
		mastered      bool
		opportunities uint32
		correct       uint32
		updated       string
	}
	cases := []struct {
		learner string
		path    string // as sent on the wire
		skills  map[string]want
	}{
		{"ines", "ines", map[string]want{
			// correct, correct, wrong, correct; the repeated id i2 is skipped
			"journal-entries": {0.8955079474775399, false, 4, 3, "2025-03-04T18:33:00.25Z"},
			"trial-balance":   {0.6926829268292684, false, 1, 1, "2025-03-04T18:31:00.25Z"},
		}},
		{"learner 7", url.PathEscape("learner 7"), map[string]want{
			// six correct; crosses 0.95 at the third (0.98276...)
			"bank-reconciliation": {0.9998597756410257, true, 6, 6, "2025-03-04T18:35:00.25Z"},
		}},
		{"north/17", url.PathEscape("north/17"), map[string]want{
			"payroll-deductions": {0.14576271186440679, false, 1, 0, "2025-03-04T18:30:00.25Z"},
		}},
	}
	if got := url.PathEscape("north/17"); got != "north%2F17" {
		t.Fatalf("PathEscape gave %q: the slash case is not exercised", got)
	}
	if got := url.PathEscape("learner 7"); got != "learner%207" {
		t.Fatalf("PathEscape gave %q: the space case is not exercised", got)
	}
	for _, c := range cases {
		r := do(t, "GET", base+"/v1/learners/"+c.path, nil)
		if r.status != http.StatusOK {
			t.Fatalf("%s: status %d: %s", c.learner, r.status, r.body)
		}
		if ct := r.header.Get("Content-Type"); ct != "application/json" {
			t.Errorf("%s: Content-Type %q", c.learner, ct)
		}
		if cc := r.header.Get("Cache-Control"); cc != "no-store" {
			t.Errorf("%s: Cache-Control %q, want no-store", c.learner, cc)
		}
		var got learnerJSON
		dec := json.NewDecoder(strings.NewReader(string(r.body)))
		dec.DisallowUnknownFields()
		if err := dec.Decode(&got); err != nil {
			t.Fatalf("%s: %v in %s", c.learner, err, r.body)
		}
		if got.Learner != c.learner {
			t.Errorf("learner = %q, want %q", got.Learner, c.learner)
		}
		if len(got.Skills) != len(c.skills) {
			t.Errorf("%s: %d skills, want %d: %s", c.learner, len(got.Skills), len(c.skills), r.body)
		}
		for skill, w := range c.skills {
			g, ok := got.Skills[skill]
			if !ok {
				t.Errorf("%s: no skill %s", c.learner, skill)
				continue
			}
			if g.Mastery == nil || g.Mastered == nil || g.Opportunities == nil || g.Correct == nil || g.ParamsVersion == nil || g.Updated == nil {
				t.Errorf("%s/%s: a field is missing: %s", c.learner, skill, r.body)
				continue
			}
			if math.Abs(*g.Mastery-w.mastery) > 1e-12 {
				t.Errorf("%s/%s: mastery %v, want %v", c.learner, skill, *g.Mastery, w.mastery)
			}
			if *g.Mastered != w.mastered || *g.Opportunities != w.opportunities || *g.Correct != w.correct || *g.ParamsVersion != 1 {
				t.Errorf("%s/%s: mastered %v opportunities %d correct %d params_version %d; want %v %d %d 1",
					c.learner, skill, *g.Mastered, *g.Opportunities, *g.Correct, *g.ParamsVersion, w.mastered, w.opportunities, w.correct)
			}
			if *g.Updated != w.updated {
				t.Errorf("%s/%s: updated %q, want %q", c.learner, skill, *g.Updated, w.updated)
			}
			if _, err := time.Parse(time.RFC3339, *g.Updated); err != nil {
				t.Errorf("%s/%s: updated is not RFC 3339: %v", c.learner, skill, err)
			}
		}
	}

	// An unescaped slash is another path, not the learner "north/17".
	wantJSONError(t, "unescaped slash", do(t, "GET", base+"/v1/learners/north/17", nil), http.StatusNotFound)
	msg := wantJSONError(t, "unknown learner", do(t, "GET", base+"/v1/learners/nobody", nil), http.StatusNotFound)
	if !strings.Contains(msg, "nobody") {
		t.Errorf("404 message %q does not name the learner", msg)
	}
	wantJSONError(t, "uncommitted learner", do(t, "GET", base+"/v1/learners/pending", nil), http.StatusNotFound)
	wantJSONError(t, "empty learner", do(t, "GET", base+"/v1/learners/", nil), http.StatusNotFound)
	wantJSONError(t, "unknown path", do(t, "GET", base+"/v2/things", nil), http.StatusNotFound)

	if r := do(t, "HEAD", base+"/v1/learners/ines", nil); r.status != http.StatusOK || len(r.body) != 0 {
		t.Errorf("HEAD: status %d, %d body bytes", r.status, len(r.body))
	}
	for _, c := range []struct{ method, path string }{
		{"POST", "/v1/learners/ines"}, {"DELETE", "/v1/learners/ines"}, {"PUT", "/healthz"},
		{"POST", "/readyz"}, {"POST", "/metrics"},
	} {
		r := do(t, c.method, base+c.path, nil)
		wantJSONError(t, c.method+" "+c.path, r, http.StatusMethodNotAllowed)
		if a := r.header.Get("Allow"); a != "GET, HEAD" {
			t.Errorf("%s %s: Allow %q", c.method, c.path, a)
		}
	}
}

func TestAPIToken(t *testing.T) {
	f := newAPIFixture(t)
	const token = "harbour-lane-7f3c"
	base := serve(t, NewAPI(f.st, f.m, APIOptions{Token: token, Logger: zerolog.Nop()}))
	u := base + "/v1/learners/ines"

	r := do(t, "GET", u, nil)
	wantJSONError(t, "no header", r, http.StatusUnauthorized)
	if !strings.HasPrefix(r.header.Get("WWW-Authenticate"), "Bearer") {
		t.Errorf("401 without WWW-Authenticate: Bearer (got %q)", r.header.Get("WWW-Authenticate"))
	}
	for _, h := range []string{
		"Bearer wrong",
		"Bearer " + token + "x",
		"Bearer " + token[:len(token)-1],
		"Basic " + token,
		token,
		"Bearer ",
	} {
		wantJSONError(t, "Authorization: "+h, do(t, "GET", u, map[string]string{"Authorization": h}), http.StatusUnauthorized)
	}
	// Unknown learners and paths under /v1/ are not revealed without it.
	wantJSONError(t, "unknown learner without token", do(t, "GET", base+"/v1/learners/nobody", nil), http.StatusUnauthorized)
	wantJSONError(t, "unknown /v1 path without token", do(t, "GET", base+"/v1/other", nil), http.StatusUnauthorized)

	for _, h := range []string{"Bearer " + token, "bearer " + token} {
		if r := do(t, "GET", u, map[string]string{"Authorization": h}); r.status != http.StatusOK {
			t.Errorf("Authorization %q: status %d: %s", h, r.status, r.body)
		}
	}
	wantJSONError(t, "unknown learner with token", do(t, "GET", base+"/v1/learners/nobody", map[string]string{"Authorization": "Bearer " + token}), http.StatusNotFound)
	// Probes and scrapers need no token.
	for _, p := range []string{"/healthz", "/metrics"} {
		if r := do(t, "GET", base+p, nil); r.status != http.StatusOK {
			t.Errorf("%s without a token: status %d", p, r.status)
		}
	}
}

func TestAPIHealthReadyMetrics(t *testing.T) {
	f := newAPIFixture(t)
	base := serve(t, NewAPI(f.st, f.m, APIOptions{Logger: zerolog.Nop()}))

	r := do(t, "GET", base+"/healthz", nil)
	if r.status != http.StatusOK || !strings.Contains(string(r.body), `"ok"`) {
		t.Errorf("/healthz: %d %s", r.status, r.body)
	}
	if r := do(t, "HEAD", base+"/healthz", nil); r.status != http.StatusOK {
		t.Errorf("HEAD /healthz: %d", r.status)
	}

	ready := func(what string, want int) map[string]string {
		t.Helper()
		r := do(t, "GET", base+"/readyz", nil)
		var v map[string]string
		if err := json.Unmarshal(r.body, &v); err != nil {
			t.Fatalf("/readyz %s: body %s: %v", what, r.body, err)
		}
		if r.status != want {
			t.Fatalf("/readyz %s: status %d, want %d: %s", what, r.status, want, r.body)
		}
		return v
	}
	if v := ready("before joining", http.StatusServiceUnavailable); v["reason"] == "" {
		t.Errorf("503 without a reason: %v", v)
	}
	f.m.SetAssigned([]int32{0, 1, 2})
	f.m.SetResumed(0)
	f.m.SetResumed(2)
	if v := ready("partition 1 not resumed", http.StatusServiceUnavailable); !strings.Contains(v["reason"], "1") {
		t.Errorf("reason %q does not name partition 1", v["reason"])
	}
	f.m.SetResumed(1)
	ready("all resumed", http.StatusOK)

	f.m.Applied.Add(13)
	f.m.SetLag(1, 4)
	r = do(t, "GET", base+"/metrics", nil)
	if r.status != http.StatusOK {
		t.Fatalf("/metrics: %d", r.status)
	}
	if ct := r.header.Get("Content-Type"); !strings.HasPrefix(ct, "text/plain; version=0.0.4") {
		t.Errorf("/metrics Content-Type %q", ct)
	}
	fams, err := parseExposition(string(r.body))
	if err != nil {
		t.Fatalf("/metrics does not parse: %v\n%s", err, r.body)
	}
	if f.outputs == 0 {
		t.Fatal("fixture staged no outbox entries; the outbox depth check would be empty")
	}
	if got := findSample(t, fams, "attain_outbox_depth", nil); got != float64(f.outputs) || got != float64(f.st.OutboxDepth()) {
		t.Errorf("attain_outbox_depth %v; staged %d, store says %d", got, f.outputs, f.st.OutboxDepth())
	}
	if got := findSample(t, fams, "attain_answers_applied_total", nil); got != 13 {
		t.Errorf("applied %v, want 13", got)
	}
	// The store's figures come with the processor's.
	stats := f.st.Stats()
	if stats.CacheHits+stats.CacheMisses == 0 || stats.Records == 0 {
		t.Fatalf("fixture store stats %+v: no cache lookups or records to check", stats)
	}
	for name, want := range map[string]int64{
		"attain_store_cache_hits_total":   stats.CacheHits,
		"attain_store_cache_misses_total": stats.CacheMisses,
		"attain_store_records":            stats.Records,
		"attain_store_cached_records":     stats.CachedRecords,
	} {
		if got := findSample(t, fams, name, nil); got != float64(want) {
			t.Errorf("%s = %v, want %d", name, got, want)
		}
	}
	if got := findSample(t, fams, "attain_consumer_lag", map[string]string{"partition": "1"}); got != 4 {
		t.Errorf("lag %v, want 4", got)
	}
	if r := do(t, "HEAD", base+"/metrics", nil); r.status != http.StatusOK || len(r.body) != 0 {
		t.Errorf("HEAD /metrics: %d, %d bytes", r.status, len(r.body))
	}
}

// Serve finishes a request in flight when ctx ends, then returns nil and
// leaves no goroutine behind.
func TestAPIServeGracefulShutdown(t *testing.T) {
	f := newAPIFixture(t)
	api := NewAPI(f.st, f.m, APIOptions{Logger: zerolog.Nop()})
	inHandler, release := make(chan struct{}), make(chan struct{})
	routes := api.handler
	api.handler = http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if r.URL.Path == "/slow" {
			close(inHandler)
			<-release
			r.URL.Path = "/healthz"
		}
		routes.ServeHTTP(w, r)
	})
	before := runtime.NumGoroutine()

	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	base := "http://" + ln.Addr().String()
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	served := make(chan error, 1)
	go func() { served <- api.Serve(ctx, ln) }()

	client := &http.Client{Transport: &http.Transport{}}
	type result struct {
		status int
		err    error
	}
	slow := make(chan result, 1)
	go func() {
		resp, err := client.Get(base + "/slow")
		if err != nil {
			slow <- result{err: err}
			return
		}
		io.Copy(io.Discard, resp.Body)
		resp.Body.Close()
		slow <- result{status: resp.StatusCode}
	}()
	<-inHandler
	cancel() // shutdown begins with the request in flight

	select {
	case err := <-served:
		t.Fatalf("Serve returned (%v) while a request was in flight", err)
	case <-time.After(100 * time.Millisecond):
	}
	close(release)
	if res := <-slow; res.err != nil || res.status != http.StatusOK {
		t.Fatalf("in-flight request: status %d, err %v", res.status, res.err)
	}
	if err := <-served; err != nil {
		t.Fatalf("Serve after shutdown: %v", err)
	}
	if _, err := client.Get(base + "/healthz"); err == nil {
		t.Error("a request succeeded after Serve returned")
	}
	client.CloseIdleConnections()

	// Every goroutine Serve started has ended (polling: they exit
	// asynchronously after the connection closes).
	deadline := time.Now().Add(5 * time.Second)
	for runtime.NumGoroutine() > before && time.Now().Before(deadline) {
		time.Sleep(10 * time.Millisecond)
	}
	if n := runtime.NumGoroutine(); n > before {
		buf := make([]byte, 1<<16)
		t.Errorf("%d goroutines after Serve returned, %d before:\n%s", n, before, buf[:runtime.Stack(buf, true)])
	}
}

// A listener that fails makes Serve return its error instead of hanging.
func TestAPIServeListenerError(t *testing.T) {
	f := newAPIFixture(t)
	api := NewAPI(f.st, f.m, APIOptions{Logger: zerolog.Nop()})
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	ln.Close()
	err = api.Serve(context.Background(), ln)
	if err == nil || !errors.Is(err, net.ErrClosed) {
		t.Fatalf("Serve on a closed listener: %v, want an error wrapping net.ErrClosed", err)
	}
}
