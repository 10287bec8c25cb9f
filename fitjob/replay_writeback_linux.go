package fitjob

import (
	"os"
	"syscall"
)

// syncFileRangeWrite is SYNC_FILE_RANGE_WRITE of sync_file_range(2): start
// writing the dirty pages of the range, without waiting for them.
const syncFileRangeWrite = 2

// startWriteback asks the kernel to start writing bytes [off, off+n) of f
// to disk. It is only a head start for the fsync that follows, which is
// what makes the data durable; an error is therefore ignored.
func startWriteback(f *os.File, off, n int64) {
	if rc, err := f.SyscallConn(); err == nil {
		rc.Control(func(fd uintptr) {
			syscall.SyncFileRange(int(fd), off, n, syncFileRangeWrite)
		})
	}
}
