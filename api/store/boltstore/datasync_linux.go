package boltstore

import (
	"os"
	"syscall"
)

// datasync flushes a file's data (and only the metadata needed to read it
// back), which is all an append into allocated space needs.
func datasync(f *os.File) error { return syscall.Fdatasync(int(f.Fd())) }
