//go:build !linux

package fitjob

import "os"

// startWriteback does nothing here: the fsync of commit writes everything.
func startWriteback(f *os.File, off, n int64) {}
