package state

import (
	"fmt"
	"testing"
)

func TestLRUBoundOrderAndDrop(t *testing.T) {
	c := newLRU[int](3)
	for i := 0; i < 3; i++ {
		c.put(0, fmt.Sprint(i), i)
	}
	if _, ok := c.get(0, []byte("0")); !ok { // 0 becomes most recent; 1 is now oldest
		t.Fatal("0 missing")
	}
	c.put(0, "3", 3)
	if _, ok := c.get(0, []byte("1")); ok {
		t.Fatal("1 should have been evicted as least recently used")
	}
	for _, k := range []string{"0", "2", "3"} {
		if v, ok := c.get(0, []byte(k)); !ok || fmt.Sprint(v) != k {
			t.Fatalf("%s: %v %v", k, v, ok)
		}
	}
	if c.len() != 3 {
		t.Fatalf("len %d", c.len())
	}
	c.put(1, "p1", 9)
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
		c.put(int32(i%3), fmt.Sprint("k", i), i)
		if i%7 == 0 {
			c.dropPartition(int32(i % 3))
		}
		if c.len() > 3 || len(c.ents) > 3 {
			t.Fatalf("bound broken: len %d, slots %d", c.len(), len(c.ents))
		}
	}
	if c.hits.Load() == 0 || c.misses.Load() == 0 {
		t.Fatal("hit/miss counters not kept")
	}
}
