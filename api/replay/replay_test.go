package replay_test

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/replay"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
)

func observation(id, subject, code string, v float64, at, updated time.Time) string {
	return fmt.Sprintf(`{"resourceType":"Observation","id":%q,"meta":{"versionId":"1","lastUpdated":%q},"status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":%q}]},"subject":{"reference":%q},"effectiveDateTime":%q,`+
		`"valueQuantity":{"value":%g,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`,
		id, updated.Format(time.RFC3339), code, subject, at.Format(time.RFC3339), v)
}

// TestRunAppliesDeletions: replay applies the Bundles of DELETE entries
// among its files after reading them all, whichever file they are in,
// counts what they did in the summary, and reports an entry it cannot
// apply by file, line and position (never the resource's id) while
// applying the line's other entries.
func TestRunAppliesDeletions(t *testing.T) {
	base := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	var obs []string
	for _, p := range []string{"rd1", "rd2"} {
		for m := range 30 {
			at := base.Add(time.Duration(m) * time.Minute)
			obs = append(obs, observation(p+"-et"+fmt.Sprint(m), "Patient/"+p, "19891-1", 36, at, at.Add(time.Minute)))
		}
		at := base.Add(15 * time.Minute)
		obs = append(obs, observation(p+"-gas", "Patient/"+p, "2019-8", 44, at, at.Add(10*time.Minute)))
	}
	deleted := base.Add(time.Hour).Format(time.RFC3339)
	dels := []string{
		// Deleted after its only version: rd1's blood gas derives nothing.
		`{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"DELETE","url":"Observation/rd1-gas"},"response":{"lastModified":"` + deleted + `"}}]}`,
		// A conditional delete without a fullUrl names nothing; the
		// line's other entry, a resource never read, is still taken.
		`{"resourceType":"Bundle","type":"batch","entry":[{"request":{"method":"DELETE","url":"Observation?identifier=secret-id-1"}},` +
			`{"request":{"method":"DELETE","url":"Observation/secret-id-2"},"response":{"lastModified":"` + deleted + `"}}]}`,
	}
	dir := t.TempDir()
	write := func(name string, lines []string) string {
		path := filepath.Join(dir, name)
		if err := os.WriteFile(path, []byte(strings.Join(lines, "\n")+"\n"), 0o600); err != nil {
			t.Fatal(err)
		}
		return path
	}
	// The deletions come first: they are applied after every file is read.
	files := []string{write("deleted.ndjson", dels), write("Observation.ndjson", obs)}
	opts := replay.Options{Derive: derive.DefaultConfig(), Encode: encode.DefaultOptions()}
	opts.Encode.Issued = base.Add(2 * time.Hour)
	out, err := replay.Run(context.Background(), opts, files)
	if err != nil {
		t.Fatal(err)
	}
	for _, r := range out.Report.Results {
		if r.Subject == "Patient/rd1" && r.Derivation != nil {
			t.Errorf("the deleted blood gas was derived: %s", r.Derivation.Gas.Ref)
		}
	}
	if len(out.Report.Results) == 0 {
		t.Fatal("nothing derived for the patient whose blood gas stands")
	}
	if got := out.Report.Deletions; got.Listed != 2 || got.Applied != 1 || got.NotHeld != 1 {
		t.Errorf("deletions %+v, want 2 listed, 1 applied, 1 never read", got)
	}
	if len(out.Skipped) != 1 || out.Skipped[0].Line != 2 || !strings.Contains(out.Skipped[0].String(), "deleted.ndjson:2: a Bundle of DELETE entries: 1 applied, these were not: entry[0]") {
		t.Errorf("skipped %v, want line 2 of deleted.ndjson, entry[0]", out.Skipped)
	}
	var sum bytes.Buffer
	if err := replay.WriteSummary(&sum, out); err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{
		"deleted: 2 listed in Bundles of DELETE entries; 1 applied (the resource is left out), 0 older than a version read (kept), 1 never read (nothing to do)",
		"deleted                    1",
	} {
		if !strings.Contains(sum.String(), want) {
			t.Errorf("summary does not say %q:\n%s", want, sum.String())
		}
	}
	if strings.Contains(sum.String(), "secret-id") {
		t.Errorf("summary quotes a resource's id:\n%s", sum.String())
	}
}
