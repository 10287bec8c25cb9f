package fitjob

import (
	"context"
	"errors"
	"fmt"
	"os"
	"strconv"
	"strings"
	"syscall"
	"time"

	"github.com/rs/zerolog"

	"github.com/attain-dev/attain/state"
)

// ErrStoreInUse rejects `store:DIR` while a running processor holds the
// store. Pebble locks its directory (DIR/LOCK, an exclusive fcntl lock)
// for every open, its read-only mode included (pebble v2 Open calls
// LockDirectory before it looks at Options.ReadOnly;
// TestStoreSourceRefusedWhileHeld checks it across processes), so a second
// process cannot read a live store at all.
var ErrStoreInUse = errors.New("attain: store in use by another process")

// ErrNoStore rejects `store:DIR` when DIR holds no store.
var ErrNoStore = errors.New("attain: no store")

// StoreSource reads the answer histories of a processor's store
// (state.Store.ScanHistory): every (learner, skill)'s stored answers, in
// applied order, from one consistent view of committed state.
//
// Inside `attain run` give it the open store (StoreSource{Store: st}): the
// scan reads committed state alongside consumption and blocks nothing.
// From another process, OpenStoreSource needs the processor stopped (or a
// copy of the directory made while it was stopped): see ErrStoreInUse.
type StoreSource struct {
	Store *state.Store
	// Dir names the store in messages ("" → "store").
	Dir string

	owned bool // opened by OpenStoreSource: Close closes the store
}

// OpenStoreSource opens the store in dir for reading. It refuses a
// directory that holds no store (instead of creating one) and a store that
// another process holds (ErrStoreInUse).
func OpenStoreSource(dir string, log zerolog.Logger) (*StoreSource, error) {
	ents, err := os.ReadDir(dir)
	if err != nil {
		return nil, fmt.Errorf("%w in %s: %v; fix: give the processor's data directory (data_dir)", ErrNoStore, dir, err)
	}
	found := false
	for _, e := range ents {
		if strings.HasPrefix(e.Name(), "MANIFEST-") {
			found = true
			break
		}
	}
	if !found {
		return nil, fmt.Errorf("%w in %s: the directory holds no Pebble database; fix: give the processor's data directory (data_dir)", ErrNoStore, dir)
	}
	st, err := state.OpenStore(dir, state.StoreOptions{
		// A scan reads every block once: a small cache does as well as a
		// big one (our choice).
		BlockCacheBytes: 8 << 20,
		CacheRecords:    1024,
		MemTableBytes:   1 << 20,
		Logger:          log,
	})
	if err != nil {
		if errors.Is(err, syscall.EAGAIN) || errors.Is(err, syscall.EACCES) {
			return nil, fmt.Errorf("%w: %s is locked by a running processor (%s/LOCK): %v; fix: stop the processor first, "+
				"or refit inside `attain run` (refit.interval / refit.answers), or read the answers topic with --from topic:NAME",
				ErrStoreInUse, dir, dir, err)
		}
		return nil, err
	}
	return &StoreSource{Store: st, Dir: dir, owned: true}, nil
}

// Close closes the store if OpenStoreSource opened it.
func (s *StoreSource) Close() error {
	if !s.owned || s.Store == nil {
		return nil
	}
	err := s.Store.Close()
	s.Store = nil
	return err
}

// Name is "store:DIR".
func (s *StoreSource) Name() string {
	if s.Dir == "" {
		return "store"
	}
	return "store:" + s.Dir
}

// Sequences calls fn once per (learner, skill) with its stored answers in
// applied order (ScanHistory's order: partition, learner, skill). The store
// has already dropped repeated answer ids, so every entry counts.
func (s *StoreSource) Sequences(ctx context.Context, fn func(learner, skill string, h []state.HistoryEntry) error) error {
	if s.Store == nil {
		return fmt.Errorf("attain: %s: no store open", s.Name())
	}
	n := 0
	return s.Store.ScanHistory(func(learner, skill string, h []state.HistoryEntry) error {
		if n%256 == 0 {
			if err := ctx.Err(); err != nil {
				return err
			}
		}
		n++
		return fn(learner, skill, h)
	})
}

// Answers yields one single-skill answer per history entry, each learner's
// in applied order. The store keeps history per (learner, skill), so an
// answer tagged with several skills comes out once per skill; ids are made
// up ("skill#n", unique per learner) because the store keeps none.
func (s *StoreSource) Answers(ctx context.Context, fn func(state.Answer) error) error {
	var id []byte
	return s.Sequences(ctx, func(learner, skill string, h []state.HistoryEntry) error {
		skills := []string{skill}
		for i, e := range h {
			id = strconv.AppendInt(append(append(id[:0], skill...), '#'), int64(i+1), 10)
			a := state.Answer{ID: string(id), Learner: learner, Skills: skills, Correct: e.Correct, At: time.Unix(0, e.At).UTC()}
			if err := fn(a); err != nil {
				return err
			}
		}
		return nil
	})
}
