// Package enginetest holds the setup the engine's tests share, for tests
// in the engine package and outside it alike (it imports no engine code).
package enginetest

import (
	"path/filepath"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

// OpenStore opens an embedded store in a directory of the test's own,
// closed when the test ends (closing it earlier as well does no harm).
// Most tests pass NoSync: a test's store need not outlive a crash.
func OpenStore(tb testing.TB, opts boltstore.Options) *boltstore.Store {
	tb.Helper()
	st, err := boltstore.Open(filepath.Join(tb.TempDir(), "s.db"), opts)
	if err != nil {
		tb.Fatal(err)
	}
	tb.Cleanup(func() { _ = st.Close() })
	return st
}

// Encoder returns an encoder with the default options.
func Encoder(tb testing.TB) *encode.Encoder {
	tb.Helper()
	enc, err := encode.New(encode.DefaultOptions())
	if err != nil {
		tb.Fatal(err)
	}
	return enc
}
