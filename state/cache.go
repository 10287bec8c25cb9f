package state

import (
	"hash/maphash"
	"sync"
	"sync/atomic"
)

// lru is the store's write-through cache of learners' state (records and
// id window), bounded by the total weight of its entries (the records they
// hold) and by their number, evicting the least recently used. A
// partition's live handle stages its changes in the values it got from the
// cache, and drops the partition's entries whenever it abandons staged
// changes (see learnerVal), so the cache serves committed state plus that
// handle's own staging, and nothing else. Entries carry their partition's
// generation; dropPartition bumps it, which invalidates every entry of the
// partition in O(1) (stale entries are removed when met or evicted as the
// oldest).
//
// Entries live in one slice linked by int32 indexes, so the cache is a few
// pointer-free arrays plus the key strings and the map.
type lru[V any] struct {
	mu      sync.Mutex
	cap     int // bound on the total weight
	maxEnts int // bound on the number of entries
	weight  int // total weight held
	m       map[string]int32
	ents    []lruEnt[V]
	head    int32 // most recently used; -1 when empty
	tail    int32 // least recently used
	free    int32 // free list through next; -1 when none
	gens    map[int32]uint32
	hits    atomic.Int64
	misses  atomic.Int64
}

type lruEnt[V any] struct {
	key        string
	val        V
	part       int32
	gen        uint32
	weight     int32
	prev, next int32
}

func newLRU[V any](capacity, maxEntries int) *lru[V] {
	return &lru[V]{cap: max(capacity, 1), maxEnts: max(maxEntries, 1), m: make(map[string]int32), head: -1, tail: -1, free: -1, gens: make(map[int32]uint32)}
}

// get returns the value under key (the key bytes are not retained).
func (c *lru[V]) get(part int32, key []byte) (V, bool) {
	v, _, ok := c.getKey(part, key)
	return v, ok
}

// getKey is get that also returns the entry's key string, so that a caller
// keeping the key needs no copy of its own.
func (c *lru[V]) getKey(part int32, key []byte) (V, string, bool) {
	c.mu.Lock()
	i, ok := c.m[string(key)]
	if ok {
		e := &c.ents[i]
		if e.gen != c.gens[part] {
			c.removeLocked(i)
		} else {
			c.moveToFrontLocked(i)
			v, k := e.val, e.key
			c.mu.Unlock()
			c.hits.Add(1)
			return v, k, true
		}
	}
	c.mu.Unlock()
	c.misses.Add(1)
	var zero V
	return zero, "", false
}

// put stores val of the given weight under key, evicting the least
// recently used entries as the bounds require. A value that alone weighs
// more than the bound is not kept.
func (c *lru[V]) put(part int32, key string, val V, weight int) {
	c.mu.Lock()
	defer c.mu.Unlock()
	i, ok := c.m[key]
	if ok && weight <= c.cap {
		e := &c.ents[i]
		c.weight += weight - int(e.weight)
		e.val, e.part, e.gen, e.weight = val, part, c.gens[part], int32(weight)
		c.moveToFrontLocked(i)
		for c.weight > c.cap && c.tail != i {
			c.removeLocked(c.tail)
		}
		return
	}
	if ok {
		c.removeLocked(i)
	}
	if weight > c.cap {
		return
	}
	for c.tail >= 0 && (len(c.m) >= c.maxEnts || c.weight+weight > c.cap) {
		c.removeLocked(c.tail)
	}
	if c.free >= 0 {
		i = c.free
		c.free = c.ents[i].next
	} else {
		c.ents = append(c.ents, lruEnt[V]{})
		i = int32(len(c.ents) - 1)
	}
	c.ents[i] = lruEnt[V]{key: key, val: val, part: part, gen: c.gens[part], weight: int32(weight), prev: -1, next: c.head}
	if c.head >= 0 {
		c.ents[c.head].prev = i
	}
	c.head = i
	if c.tail < 0 {
		c.tail = i
	}
	c.m[key] = i
	c.weight += weight
}

// dropPartition invalidates every entry of partition part.
func (c *lru[V]) dropPartition(part int32) {
	c.mu.Lock()
	c.gens[part]++
	c.mu.Unlock()
}

// size returns the number of entries held and their total weight, stale
// ones included (the bounds apply to all of them).
func (c *lru[V]) size() (entries, weight int) {
	c.mu.Lock()
	defer c.mu.Unlock()
	return len(c.m), c.weight
}

func (c *lru[V]) removeLocked(i int32) {
	c.unlinkLocked(i)
	delete(c.m, c.ents[i].key)
	c.weight -= int(c.ents[i].weight)
	c.ents[i] = lruEnt[V]{next: c.free}
	c.free = i
}

func (c *lru[V]) unlinkLocked(i int32) {
	e := &c.ents[i]
	if e.prev >= 0 {
		c.ents[e.prev].next = e.next
	} else {
		c.head = e.next
	}
	if e.next >= 0 {
		c.ents[e.next].prev = e.prev
	} else {
		c.tail = e.prev
	}
	e.prev, e.next = -1, -1
}

func (c *lru[V]) moveToFrontLocked(i int32) {
	if c.head == i {
		return
	}
	c.unlinkLocked(i)
	e := &c.ents[i]
	e.next = c.head
	if c.head >= 0 {
		c.ents[c.head].prev = i
	}
	c.head = i
	if c.tail < 0 {
		c.tail = i
	}
}

// shardedLRU spreads the cache over independent shards chosen by a hash of
// the key, so that partitions' goroutines looking up different keys seldom
// wait for each other's lock. Each shard has its share of the bounds, so
// the bounds hold for the whole; a small cache has one shard (a share
// below minShardWeight would evict too eagerly).
type shardedLRU[V any] struct {
	seed   maphash.Seed
	shards []*lru[V]
}

// maxShards and minShardWeight: our choices (16 shards make a lock wait
// rare with tens of partitions per instance; 1024 records per shard keep
// the approximation of one LRU good).
const (
	maxShards      = 16
	minShardWeight = 1024
)

func newShardedLRU[V any](capacity, maxEntries int) *shardedLRU[V] {
	n := max(1, min(maxShards, capacity/minShardWeight, maxEntries/minShardWeight))
	c := &shardedLRU[V]{seed: maphash.MakeSeed(), shards: make([]*lru[V], n)}
	for i := range c.shards {
		// Shares rounded down: the total stays within the bounds.
		c.shards[i] = newLRU[V](capacity/n, maxEntries/n)
	}
	return c
}

func (c *shardedLRU[V]) shard(key []byte) *lru[V] {
	if len(c.shards) == 1 {
		return c.shards[0]
	}
	return c.shards[maphash.Bytes(c.seed, key)%uint64(len(c.shards))]
}

func (c *shardedLRU[V]) getKey(part int32, key []byte) (V, string, bool) {
	return c.shard(key).getKey(part, key)
}

func (c *shardedLRU[V]) get(part int32, key []byte) (V, bool) {
	return c.shard(key).get(part, key)
}

func (c *shardedLRU[V]) put(part int32, key string, val V, weight int) {
	var sh *lru[V]
	if len(c.shards) == 1 {
		sh = c.shards[0]
	} else {
		sh = c.shards[maphash.String(c.seed, key)%uint64(len(c.shards))]
	}
	sh.put(part, key, val, weight)
}

func (c *shardedLRU[V]) dropPartition(part int32) {
	for _, sh := range c.shards {
		sh.dropPartition(part)
	}
}

// size is the sum over the shards of lru.size.
func (c *shardedLRU[V]) size() (entries, weight int) {
	for _, sh := range c.shards {
		e, w := sh.size()
		entries += e
		weight += w
	}
	return entries, weight
}

// counts returns the hits and misses of every shard.
func (c *shardedLRU[V]) counts() (hits, misses int64) {
	for _, sh := range c.shards {
		hits += sh.hits.Load()
		misses += sh.misses.Load()
	}
	return hits, misses
}
