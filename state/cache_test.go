package state

import (
	"fmt"
	"testing"
)

func TestLRUBoundOrderAndDrop(t *testing.T) {
	c := newLRU[int](3, 3)
	for i := 0; i < 3; i++ {
		c.put(0, fmt.Sprint(i), i, 1)
	}
	if _, ok := c.get(0, []byte("0")); !ok { // 0 becomes most recent; 1 is now oldest
		t.Fatal("0 missing")
	}
	c.put(0, "3", 3, 1)
	if _, ok := c.get(0, []byte("1")); ok {
		t.Fatal("1 should have been evicted as least recently used")
	}
	for _, k := range []string{"0", "2", "3"} {
		if v, ok := c.get(0, []byte(k)); !ok || fmt.Sprint(v) != k {
			t.Fatalf("%s: %v %v", k, v, ok)
		}
	}
	if n, w := c.size(); n != 3 || w != 3 {
		t.Fatalf("size %d, weight %d", n, w)
	}
	c.put(1, "p1", 9, 1)
	c.dropPartition(0)
	for _, k := range []string{"0", "2", "3"} {
		if _, ok := c.get(0, []byte(k)); ok {
			t.Fatalf("%s survived dropPartition", k)
		}
	}
	if v, ok := c.get(1, []byte("p1")); !ok || v != 9 {
		t.Fatal("another partition's entry was dropped")
	}
	// Freed slots are reused; the bound holds through churn.
	for i := 0; i < 1000; i++ {
		c.put(int32(i%3), fmt.Sprint("k", i), i, 1)
		if i%7 == 0 {
			c.dropPartition(int32(i % 3))
		}
		if n, _ := c.size(); n > 3 || len(c.ents) > 3 {
			t.Fatalf("bound broken: len %d, slots %d", n, len(c.ents))
		}
	}
	if c.hits.Load() == 0 || c.misses.Load() == 0 {
		t.Fatal("hit/miss counters not kept")
	}
}

// TestLRUWeightBound: entries weigh what they hold (a learner's records);
// the total weight and the number of entries are both bounded.
func TestLRUWeightBound(t *testing.T) {
	c := newLRU[string](10, 4)
	c.put(0, "a", "a", 4)
	c.put(0, "b", "b", 4)
	c.put(0, "c", "c", 4) // 12 > 10: a, the oldest, goes
	if _, ok := c.get(0, []byte("a")); ok {
		t.Fatal("a kept beyond the weight bound")
	}
	if n, w := c.size(); n != 2 || w != 8 {
		t.Fatalf("size %d, weight %d; want 2, 8", n, w)
	}
	c.put(0, "b", "b2", 6) // b grows: 6 + 4 = 10 fits
	if v, ok := c.get(0, []byte("b")); !ok || v != "b2" {
		t.Fatalf("b = %q, %v", v, ok)
	}
	if n, w := c.size(); n != 2 || w != 10 {
		t.Fatalf("size %d, weight %d; want 2, 10", n, w)
	}
	c.put(0, "huge", "h", 11) // heavier than the bound: not kept, nothing evicted
	if _, ok := c.get(0, []byte("huge")); ok {
		t.Fatal("an entry heavier than the bound was kept")
	}
	if n, _ := c.size(); n != 2 {
		t.Fatalf("size %d after a too heavy put, want 2", n)
	}
	for i := range 6 { // the entry bound: at most 4 entries of weight 0
		c.put(1, fmt.Sprint("z", i), "z", 0)
	}
	if n, w := c.size(); n != 4 || w > 10 {
		t.Fatalf("size %d, weight %d; want 4 entries", n, w)
	}
}

// TestShardedLRUBounds: the shards' shares add up to no more than the
// bounds, dropPartition reaches every shard, and a small cache is one
// shard (exact LRU order).
func TestShardedLRUBounds(t *testing.T) {
	if n := len(newShardedLRU[int](10, 1024).shards); n != 1 {
		t.Fatalf("a 10-record cache has %d shards, want 1", n)
	}
	c := newShardedLRU[int](20_000, 5_000)
	if len(c.shards) < 2 {
		t.Fatalf("%d shards; the test needs several", len(c.shards))
	}
	for i := range 50_000 {
		c.put(int32(i%2), fmt.Sprint("learner-", i), i, 1+i%4)
		if i%9973 == 0 {
			if n, w := c.size(); n > 5_000 || w > 20_000 {
				t.Fatalf("after %d puts: %d entries weighing %d, bounds 5000 and 20000", i+1, n, w)
			}
		}
	}
	if v, ok := c.get(1, []byte("learner-49999")); !ok || v != 49999 {
		t.Fatalf("the latest entry: %v, %v", v, ok)
	}
	c.dropPartition(1)
	if _, ok := c.get(1, []byte("learner-49999")); ok {
		t.Fatal("an entry of a dropped partition was returned")
	}
	if _, ok := c.get(0, []byte("learner-49998")); !ok {
		t.Fatal("another partition's entry was dropped")
	}
	if h, m := c.counts(); h != 2 || m != 1 {
		t.Fatalf("hits %d, misses %d; want 2, 1", h, m)
	}
}
