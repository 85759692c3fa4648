package notify_test

import (
	"os"
	"path/filepath"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// BenchmarkParse parses the IG's R4 full-resource example, the shape of
// most webhook requests, and the R4B one, with the parser this package
// had before the single-pass reader as the baseline in the same run.
func BenchmarkParse(b *testing.B) {
	for _, file := range []string{"r4-full-resource.json", "r4b-full-resource.json"} {
		body, err := os.ReadFile(filepath.Join("testdata", file))
		if err != nil {
			b.Fatal(err)
		}
		for _, p := range []struct {
			name  string
			parse func([]byte) (notify.Notification, error)
		}{{"baseline=old", notify.OldParse}, {"single-pass", notify.Parse}} {
			b.Run(file+"/"+p.name, func(b *testing.B) {
				b.ReportAllocs()
				b.SetBytes(int64(len(body)))
				for b.Loop() {
					if _, err := p.parse(body); err != nil {
						b.Fatal(err)
					}
				}
			})
		}
	}
}
