package state

import (
	"bytes"
	"encoding/binary"
	"fmt"
)

// Key layout of the Pebble store. Every key begins with the 4-byte
// big-endian partition, then a family byte, so that one partition's data is
// one contiguous key range and each family inside it is a sub-range:
//
//	record   P 0x01 learner 0x00 skill              → appendRecordVal (the record and the tail of its history)
//	history  P 0x02 learner 0x00 skill 0x00 opp(BE4) → appendHistoryChunk (answers opp, opp+1, …; schema 1: one answer)
//	window   P 0x03 learner                         → appendWindow (schema 1 only: read, then deleted once a record carries the window)
//	state    P 0x04                                 → appendPartState (consumed offset, next outbox seq, record count)
//	outbox   P 0x05 seq(BE8)                        → appendOutbox
//	log      P 0x07 seq(BE8)                        → record log: the record, history and window keys of one commit (store_log.go)
//	meta     FFFFFFFF 0x06 name                     → store-wide metadata (schema version)
//
// Learner and skill names never contain NUL (the decoder and Apply reject
// them), so NUL is an unambiguous separator: the prefix "learner\x00" of one
// learner never matches another learner's keys, and a history key's
// "learner\x00skill\x00" prefix names exactly one learner-skill. Partitions
// are non-negative, so big-endian order is numeric order; the metadata
// pseudo-partition 0xFFFFFFFF sorts after every real one.
const (
	famRecord  byte = 0x01
	famHistory byte = 0x02
	famWindow  byte = 0x03
	famState   byte = 0x04
	famOutbox  byte = 0x05
	famMeta    byte = 0x06
	famLog     byte = 0x07
)

// metaPartition is the pseudo-partition of store-wide metadata keys.
const metaPartition = ^uint32(0)

const partPrefixLen = 5 // partition (4) + family (1)

func appendPartFamily(dst []byte, p uint32, fam byte) []byte {
	dst = binary.BigEndian.AppendUint32(dst, p)
	return append(dst, fam)
}

// recordKey appends the key of (learner, skill)'s record in partition p.
func recordKey(dst []byte, p int32, learner, skill string) []byte {
	dst = appendPartFamily(dst, uint32(p), famRecord)
	dst = append(dst, learner...)
	dst = append(dst, 0)
	return append(dst, skill...)
}

// learnerRecordPrefix is the prefix of every record key of learner in p.
func learnerRecordPrefix(dst []byte, p int32, learner string) []byte {
	dst = appendPartFamily(dst, uint32(p), famRecord)
	dst = append(dst, learner...)
	return append(dst, 0)
}

// historyPrefix is the prefix of every history key of (learner, skill) in p.
func historyPrefix(dst []byte, p int32, learner, skill string) []byte {
	dst = appendPartFamily(dst, uint32(p), famHistory)
	dst = append(dst, learner...)
	dst = append(dst, 0)
	dst = append(dst, skill...)
	return append(dst, 0)
}

// historyKey is the key of the opp-th (1-based) answer of (learner, skill).
func historyKey(dst []byte, p int32, learner, skill string, opp uint32) []byte {
	dst = historyPrefix(dst, p, learner, skill)
	return binary.BigEndian.AppendUint32(dst, opp)
}

// historyPrefixFromRecordKey is the prefix of every history key of the
// learner-skill whose record key is rk.
func historyPrefixFromRecordKey(rk []byte) []byte {
	lo := append(make([]byte, 0, len(rk)+5), rk...)
	lo[4] = famHistory
	return append(lo, 0)
}

// historyKeyFromRecordKey turns a record key into the history key of its
// opp-th answer (the record and history keys share learner\x00skill).
func historyKeyFromRecordKey(dst, rk []byte, opp uint32) []byte {
	dst = append(dst, rk...)
	dst[4] = famHistory
	dst = append(dst, 0)
	return binary.BigEndian.AppendUint32(dst, opp)
}

func windowKey(dst []byte, p int32, learner string) []byte {
	dst = appendPartFamily(dst, uint32(p), famWindow)
	return append(dst, learner...)
}

func stateKey(p int32) []byte {
	return appendPartFamily(make([]byte, 0, partPrefixLen), uint32(p), famState)
}

func outboxKey(dst []byte, p int32, seq uint64) []byte {
	dst = appendPartFamily(dst, uint32(p), famOutbox)
	return binary.BigEndian.AppendUint64(dst, seq)
}

func metaKey(name string) []byte {
	return append(appendPartFamily(nil, metaPartition, famMeta), name...)
}

// familyPrefix is the first key of family fam in partition p; familyEnd is
// the first key after it.
func familyPrefix(p uint32, fam byte) []byte { return appendPartFamily(nil, p, fam) }
func familyEnd(p uint32, fam byte) []byte    { return appendPartFamily(nil, p, fam+1) }

// prefixEnd returns the smallest key greater than every key with prefix
// (nil when there is none: the prefix is all 0xFF).
func prefixEnd(prefix []byte) []byte {
	end := bytes.Clone(prefix)
	for i := len(end) - 1; i >= 0; i-- {
		if end[i] != 0xFF {
			end[i]++
			return end[:i+1]
		}
	}
	return nil
}

// splitRecordKey returns the learner and skill of a record key.
func splitRecordKey(k []byte) (learner, skill string, err error) {
	if len(k) < partPrefixLen || k[4] != famRecord {
		return "", "", fmt.Errorf("%w: %q is not a record key", ErrCorruptStore, k)
	}
	rest := k[partPrefixLen:]
	i := bytes.IndexByte(rest, 0)
	if i < 0 {
		return "", "", fmt.Errorf("%w: record key %q has no learner/skill separator", ErrCorruptStore, k)
	}
	return string(rest[:i]), string(rest[i+1:]), nil
}

// splitHistoryKey returns the learner\x00skill\x00 group of a history key
// (a view into k) and the opportunity number.
func splitHistoryKey(k []byte) (group []byte, opp uint32, err error) {
	if len(k) < partPrefixLen+2+4 || k[4] != famHistory || k[len(k)-5] != 0 {
		return nil, 0, fmt.Errorf("%w: %q is not a history key", ErrCorruptStore, k)
	}
	return k[partPrefixLen : len(k)-4], binary.BigEndian.Uint32(k[len(k)-4:]), nil
}

// splitGroup splits a learner\x00skill\x00 group.
func splitGroup(g []byte) (learner, skill string, err error) {
	i := bytes.IndexByte(g, 0)
	if i < 0 || len(g) == 0 || g[len(g)-1] != 0 {
		return "", "", fmt.Errorf("%w: history group %q is malformed", ErrCorruptStore, g)
	}
	return string(g[:i]), string(g[i+1 : len(g)-1]), nil
}

// keyPartition returns the partition and family of a key.
func keyPartition(k []byte) (p uint32, fam byte, ok bool) {
	if len(k) < partPrefixLen {
		return 0, 0, false
	}
	return binary.BigEndian.Uint32(k), k[4], true
}
