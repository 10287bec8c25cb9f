package stream

import (
	"context"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/json"
	"fmt"
	"log"
	"net"
	"net/http"
	"strings"
	"time"

	"github.com/attain-dev/attain/state"
	"github.com/rs/zerolog"
)

// Server limits. None has a published source; they are common practice for
// a small internal JSON API: a slow client may hold a connection for
// seconds, never minutes.
const (
	readHeaderTimeout = 5 * time.Second
	readTimeout       = 10 * time.Second
	writeTimeout      = 30 * time.Second
	idleTimeout       = 2 * time.Minute
	maxHeaderBytes    = 64 << 10 // a learner id travels in the path; 64 KiB is ample
	shutdownTimeout   = 10 * time.Second
)

// APIOptions configures the HTTP API.
type APIOptions struct {
	// Addr is the address ListenAndServe listens on (host:port).
	Addr string
	// Token, when set, is the bearer token every /v1/ request must carry in
	// "Authorization: Bearer TOKEN". /healthz, /readyz and /metrics stay
	// open so that probes and scrapers need no secret.
	Token  string
	Logger zerolog.Logger
}

// API serves the read API (a learner's current mastery from the store's
// committed state), health, readiness and Prometheus metrics.
type API struct {
	st      *state.Store
	m       *Metrics
	opt     APIOptions
	token   [sha256.Size]byte // SHA-256 of opt.Token, compared in constant time
	handler http.Handler
}

// NewAPI returns the API over st and m. It starts nothing.
func NewAPI(st *state.Store, m *Metrics, opt APIOptions) *API {
	a := &API{st: st, m: m, opt: opt}
	if opt.Token != "" {
		a.token = sha256.Sum256([]byte(opt.Token))
	}
	mux := http.NewServeMux()
	// Each path is registered twice: with its method, and without one so
	// that any other method gets a JSON 405 instead of the mux's plain one.
	route := func(path string, h http.HandlerFunc) {
		mux.HandleFunc("GET "+path, h) // GET also serves HEAD
		mux.HandleFunc(path, methodNotAllowed)
	}
	route("/v1/learners/{learner}", a.authorized(a.learner))
	route("/healthz", a.healthz)
	route("/readyz", a.readyz)
	route("/metrics", a.metrics)
	mux.HandleFunc("/v1/", a.authorized(notFound))
	mux.HandleFunc("/", notFound)
	a.handler = mux
	return a
}

// Handler returns the API's routes, for Serve or for embedding.
func (a *API) Handler() http.Handler { return a.handler }

// ListenAndServe listens on APIOptions.Addr and calls Serve.
func (a *API) ListenAndServe(ctx context.Context) error {
	ln, err := net.Listen("tcp", a.opt.Addr)
	if err != nil {
		return fmt.Errorf("attain: listening for HTTP on %q: %w", a.opt.Addr, err)
	}
	return a.Serve(ctx, ln)
}

// Serve answers HTTP requests on ln until ctx ends, then shuts down
// gracefully: it stops accepting, waits up to 10 s for requests in flight,
// closes what remains and returns. It returns nil after a shutdown caused
// by ctx, or the error that stopped serving. ln is closed on return.
func (a *API) Serve(ctx context.Context, ln net.Listener) error {
	srv := &http.Server{
		Handler:           a.handler,
		ReadHeaderTimeout: readHeaderTimeout,
		ReadTimeout:       readTimeout,
		WriteTimeout:      writeTimeout,
		IdleTimeout:       idleTimeout,
		MaxHeaderBytes:    maxHeaderBytes,
		ErrorLog:          log.New(a.opt.Logger.With().Str("component", "http").Logger(), "", 0),
	}
	addr := ln.Addr().String()
	a.opt.Logger.Info().Str("addr", addr).Bool("token", a.opt.Token != "").Msg("HTTP API listening")
	done := make(chan error, 1)
	go func() { done <- srv.Serve(ln) }()
	select {
	case err := <-done:
		// Serve only returns early on a listener failure.
		return fmt.Errorf("attain: serving HTTP on %s: %w", addr, err)
	case <-ctx.Done():
	}
	sctx, cancel := context.WithTimeout(context.Background(), shutdownTimeout)
	defer cancel()
	err := srv.Shutdown(sctx)
	<-done // Serve returned http.ErrServerClosed as soon as Shutdown began
	if err != nil {
		srv.Close()
		a.opt.Logger.Warn().Err(err).Str("addr", addr).Msg("HTTP API: requests still running at the shutdown deadline were cut off")
		return fmt.Errorf("attain: shutting down HTTP on %s: %w", addr, err)
	}
	a.opt.Logger.Info().Str("addr", addr).Msg("HTTP API stopped")
	return nil
}

// skillView is one skill of a learner in the read API (an interface other
// programs rely on: extend, do not rename).
type skillView struct {
	Mastery       float64 `json:"mastery"`
	Mastered      bool    `json:"mastered"`
	Opportunities uint32  `json:"opportunities"`
	Correct       uint32  `json:"correct"`
	ParamsVersion int64   `json:"params_version"`
	Updated       *string `json:"updated"` // RFC 3339; null if no answer carried a time
}

type learnerView struct {
	Learner string               `json:"learner"`
	Skills  map[string]skillView `json:"skills"`
}

func (a *API) learner(w http.ResponseWriter, r *http.Request) {
	id := r.PathValue("learner") // unescaped: "a%2Fb" is learner "a/b"
	recs, ok, err := a.st.Learner(id)
	if err != nil {
		a.opt.Logger.Error().Err(err).Str("learner", id).Msg("HTTP API: reading a learner from the store")
		writeError(w, http.StatusInternalServerError, "could not read the learner's state; see the server log")
		return
	}
	if !ok {
		writeError(w, http.StatusNotFound, fmt.Sprintf("no answers recorded for learner %q", id))
		return
	}
	v := learnerView{Learner: id, Skills: make(map[string]skillView, len(recs))}
	for skill, rec := range recs {
		sv := skillView{
			Mastery:       rec.Mastery,
			Mastered:      rec.Mastered,
			Opportunities: rec.Opportunities,
			Correct:       rec.Correct,
			ParamsVersion: rec.ParamsVersion,
		}
		if rec.Updated != 0 {
			s := time.Unix(0, rec.Updated).UTC().Format(time.RFC3339Nano)
			sv.Updated = &s
		}
		v.Skills[skill] = sv
	}
	// A learner's mastery is personal data: no caching by intermediaries.
	w.Header().Set("Cache-Control", "no-store")
	writeJSON(w, http.StatusOK, v)
}

func (a *API) healthz(w http.ResponseWriter, r *http.Request) {
	writeJSON(w, http.StatusOK, map[string]string{"status": "ok"})
}

func (a *API) readyz(w http.ResponseWriter, r *http.Request) {
	if ok, reason := a.m.readiness(); !ok {
		writeJSON(w, http.StatusServiceUnavailable, map[string]string{"status": "not ready", "reason": reason})
		return
	}
	writeJSON(w, http.StatusOK, map[string]string{"status": "ready"})
}

func (a *API) metrics(w http.ResponseWriter, r *http.Request) {
	w.Header().Set("Content-Type", "text/plain; version=0.0.4; charset=utf-8")
	w.WriteHeader(http.StatusOK)
	if r.Method == http.MethodHead {
		return
	}
	a.m.WritePrometheus(w, a.st.OutboxDepth())
	WriteStoreMetrics(w, a.st.Stats())
}

// authorized requires the bearer token, when one is configured. The
// presented token is hashed first so that the constant-time comparison
// does not reveal the configured token's length either.
func (a *API) authorized(h http.HandlerFunc) http.HandlerFunc {
	if a.opt.Token == "" {
		return h
	}
	return func(w http.ResponseWriter, r *http.Request) {
		got, ok := bearer(r.Header.Get("Authorization"))
		sum := sha256.Sum256([]byte(got))
		if !ok || subtle.ConstantTimeCompare(sum[:], a.token[:]) != 1 {
			// RFC 6750 §3: a 401 names the scheme in WWW-Authenticate.
			w.Header().Set("WWW-Authenticate", `Bearer realm="attain"`)
			msg := "missing bearer token: send the header Authorization: Bearer TOKEN (the configured http_token)"
			if ok {
				msg = "wrong bearer token: send the configured http_token"
			}
			writeError(w, http.StatusUnauthorized, msg)
			return
		}
		h(w, r)
	}
}

// bearer extracts the token of an "Authorization: Bearer TOKEN" header;
// the scheme is case-insensitive (RFC 9110 §11.1).
func bearer(h string) (string, bool) {
	scheme, tok, ok := strings.Cut(h, " ")
	if !ok || !strings.EqualFold(scheme, "Bearer") {
		return "", false
	}
	tok = strings.TrimSpace(tok)
	return tok, tok != ""
}

func methodNotAllowed(w http.ResponseWriter, r *http.Request) {
	w.Header().Set("Allow", "GET, HEAD")
	writeError(w, http.StatusMethodNotAllowed, fmt.Sprintf("method %s is not allowed here; use GET", r.Method))
}

func notFound(w http.ResponseWriter, r *http.Request) {
	writeError(w, http.StatusNotFound, fmt.Sprintf("no such resource %q; the API serves GET /v1/learners/{learner}, /healthz, /readyz and /metrics", r.URL.Path))
}

func writeError(w http.ResponseWriter, status int, msg string) {
	writeJSON(w, status, map[string]string{"error": msg})
}

func writeJSON(w http.ResponseWriter, status int, v any) {
	b, err := json.Marshal(v)
	if err != nil {
		// Only the views above are marshalled; that fails only for a
		// non-finite float, which a valid record never holds.
		status = http.StatusInternalServerError
		b = []byte(`{"error":"internal error encoding the response"}`)
	}
	h := w.Header()
	h.Set("Content-Type", "application/json")
	h.Set("X-Content-Type-Options", "nosniff")
	w.WriteHeader(status)
	w.Write(append(b, '\n'))
}
