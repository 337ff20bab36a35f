//go:build !linux

package mmtrim

// dontNeed does nothing where the daemon is not built for Linux.
func dontNeed(addr uintptr, size int64) error { return nil }
