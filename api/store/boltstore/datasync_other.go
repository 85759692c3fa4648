//go:build !linux

package boltstore

import "os"

func datasync(f *os.File) error { return f.Sync() }
