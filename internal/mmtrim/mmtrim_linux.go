package mmtrim

import (
	"syscall"
	"unsafe"
)

// dontNeed applies MADV_DONTNEED to size bytes from addr, the start of a
// file mapping made by bbolt (outside the Go heap, never moved).
func dontNeed(addr uintptr, size int64) error {
	if addr == 0 || size <= 0 {
		return nil
	}
	p := *(*unsafe.Pointer)(unsafe.Pointer(&addr))
	return syscall.Madvise(unsafe.Slice((*byte)(p), size), syscall.MADV_DONTNEED)
}
