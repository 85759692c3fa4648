package notify_test

import (
	"os"
	"path/filepath"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// BenchmarkParse parses the IG's R4 full-resource example, the shape of
// most webhook requests.
func BenchmarkParse(b *testing.B) {
	body, err := os.ReadFile(filepath.Join("testdata", "r4-full-resource.json"))
	if err != nil {
		b.Fatal(err)
	}
	b.ReportAllocs()
	b.SetBytes(int64(len(body)))
	for b.Loop() {
		if _, err := notify.Parse(body); err != nil {
			b.Fatal(err)
		}
	}
}
