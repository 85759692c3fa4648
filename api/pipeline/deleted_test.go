package pipeline_test

import (
	"errors"
	"fmt"
	"slices"
	"strings"
	"testing"

	"github.com/deadspace-fhir/deadspace/api/pipeline"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// deleteLine is a transaction Bundle of DELETE entries, one per url, each
// with response.lastModified when at is not empty.
func deleteLine(at string, urls ...string) string {
	var entries []string
	for _, u := range urls {
		resp := ""
		if at != "" {
			resp = fmt.Sprintf(`,"response":{"status":"204","lastModified":%q}`, at)
		}
		entries = append(entries, fmt.Sprintf(`{"request":{"method":"DELETE","url":%q}%s}`, u, resp))
	}
	return `{"resourceType":"Bundle","type":"transaction","entry":[` + strings.Join(entries, ",") + `]}`
}

// collected runs lines through a Collector's AddLine, in order, and says
// which blood gases it derived ("subject ref value"), the inputs left out
// ("ref reason"), the deletions' counts and the lines' errors.
func collected(t *testing.T, lines []string) (derived, omitted []string, dels pipeline.Deletions, errs []error) {
	t.Helper()
	dec := decode.New(decode.Options{})
	col := pipeline.NewCollector()
	for _, l := range lines {
		if _, err := col.AddLine(dec, []byte(l)); err != nil {
			errs = append(errs, err)
		}
	}
	rep := finish(t, col)
	for _, r := range rep.Results {
		if r.Derivation != nil {
			derived = append(derived, fmt.Sprintf("%s %s %g", r.Subject, r.Derivation.Gas.Ref, r.Derivation.Gas.Value))
		}
	}
	for _, o := range rep.Inputs {
		omitted = append(omitted, o.Ref+" "+string(o.Reason))
	}
	slices.Sort(derived)
	slices.Sort(omitted)
	return derived, omitted, rep.Deletions, errs
}

// TestCollectorAppliesDeletions: a Bundle of DELETE entries among the
// lines withdraws what it names by the live engine's rules (Engine.Deleted,
// and backfill's placing of a deletion without a time), whatever the order
// of the lines: the later meta.lastUpdated wins, a version written after
// the deletion stands, and a deletion follows a re-filed input to the
// patient its newest version names.
func TestCollectorAppliesDeletions(t *testing.T) {
	const at, et = "2026-03-01T01:00:00Z", "2026-03-01T01:01:00Z"
	etco2 := func(subject string) string {
		return versionLine("et-"+strings.TrimPrefix(subject, "Patient/"), "1", "2026-03-01T01:02:00Z", subject, "final", "19891-1", 35, et)
	}
	gas := func(version, updated, subject string, v float64) string {
		return versionLine("gas", version, updated, subject, "final", "2019-8", v, at)
	}
	base := []string{etco2("Patient/a"), gas("1", "2026-03-01T01:10:00Z", "Patient/a", 45)}
	kept := []string{"Patient/a Observation/gas/_history/1 45"}
	for _, tc := range []struct {
		name    string
		lines   []string
		derived []string
		omitted []string // the gas's omissions
		dels    pipeline.Deletions
		// reversed is dels when the lines are read in reverse, when
		// it differs.
		reversed *pipeline.Deletions
		errHas   string
	}{
		{name: "no deletion", lines: base, derived: kept},
		{name: "deleted after its version: withdrawn",
			lines:   append(slices.Clone(base), deleteLine("2026-03-01T02:00:00Z", "Observation/gas")),
			omitted: []string{"Observation/gas deleted", "Observation/gas/_history/1 version-superseded"},
			dels:    pipeline.Deletions{Listed: 1, Applied: 1}},
		{name: "deleted by an absolute, versioned url",
			lines:   append(slices.Clone(base), deleteLine("2026-03-01T02:00:00Z", "https://ehr.example/fhir/Observation/gas/_history/1")),
			omitted: []string{"Observation/gas deleted", "Observation/gas/_history/1 version-superseded"},
			dels:    pipeline.Deletions{Listed: 1, Applied: 1}},
		{name: "written again after the deletion: the new version stands",
			lines:   append(slices.Clone(base), deleteLine("2026-03-01T02:00:00Z", "Observation/gas"), gas("3", "2026-03-01T03:00:00Z", "Patient/a", 47)),
			derived: []string{"Patient/a Observation/gas/_history/3 47"},
			omitted: []string{"Observation/gas version-superseded", "Observation/gas/_history/1 version-superseded"},
			dels:    pipeline.Deletions{Listed: 1, Older: 1}},
		{name: "deleted before its version was last updated: the version stands",
			lines:   append(slices.Clone(base), deleteLine("2026-03-01T01:05:00Z", "Observation/gas")),
			derived: kept, omitted: []string{"Observation/gas version-superseded"},
			dels: pipeline.Deletions{Listed: 1, Older: 1}},
		// fhir/ref.Compare: at the same instant the version ids decide,
		// and a deletion has none.
		{name: "deleted at the instant its version with a versionId was last updated: the version stands",
			lines:   append(slices.Clone(base), deleteLine("2026-03-01T01:10:00Z", "Observation/gas")),
			derived: kept, omitted: []string{"Observation/gas version-superseded"},
			dels: pipeline.Deletions{Listed: 1, Older: 1}},
		{name: "deleted at the instant its version without a versionId was last updated: the deletion wins",
			lines:   []string{etco2("Patient/a"), gas("", "2026-03-01T01:10:00Z", "Patient/a", 45), deleteLine("2026-03-01T01:10:00Z", "Observation/gas")},
			omitted: []string{"Observation/gas deleted", "Observation/gas version-superseded"},
			dels:    pipeline.Deletions{Listed: 1, Applied: 1}},
		{name: "no time, and the lines carry it: the version carried stands",
			lines:   append(slices.Clone(base), deleteLine("", "Observation/gas")),
			derived: kept, omitted: []string{"Observation/gas version-superseded"},
			dels: pipeline.Deletions{Listed: 1, Older: 1}},
		{name: "no time, carried without meta.lastUpdated: it stands",
			lines:   []string{etco2("Patient/a"), gas("", "", "Patient/a", 45), deleteLine("", "Observation/gas")},
			derived: []string{"Patient/a Observation/gas 45"},
			dels:    pipeline.Deletions{Listed: 1, Older: 1}},
		{name: "a resource never read, and a Patient: nothing to do",
			lines:   append(slices.Clone(base), deleteLine("2026-03-01T02:00:00Z", "Observation/other", "Patient/a"), deleteLine("", "Observation/another")),
			derived: kept, dels: pipeline.Deletions{Listed: 3, NotHeld: 3}},
		{name: "re-filed, then deleted: withdrawn under the patient its newest version names",
			lines: append(slices.Clone(base), etco2("Patient/b"), gas("2", "2026-03-01T01:20:00Z", "Patient/b", 46),
				deleteLine("2026-03-01T02:00:00Z", "Observation/gas")),
			omitted: []string{"Observation/gas deleted", "Observation/gas/_history/1 filed-under-another-patient", "Observation/gas/_history/2 version-superseded"},
			dels:    pipeline.Deletions{Listed: 1, Applied: 1}},
		{name: "listed twice, and a later deletion",
			lines: append(slices.Clone(base), deleteLine("2026-03-01T02:00:00Z", "Observation/gas"), deleteLine("2026-03-01T02:00:00Z", "Observation/gas"),
				deleteLine("2026-03-01T02:30:00Z", "Observation/gas")),
			omitted: []string{"Observation/gas deleted", "Observation/gas version-superseded", "Observation/gas/_history/1 version-superseded"},
			// Each deletion is counted against those before it, as the
			// live engine counts them one after another.
			dels: pipeline.Deletions{Listed: 3, Applied: 3}, reversed: &pipeline.Deletions{Listed: 3, Applied: 1, Older: 2}},
		{name: "an entry that cannot be applied: the line's others are",
			lines: append(slices.Clone(base), `{"resourceType":"Bundle","type":"batch","entry":[{"request":{"method":"PUT","url":"Observation/x"}},`+
				`{"request":{"method":"DELETE","url":"Observation/gas"},"response":{"lastModified":"2026-03-01T02:00:00Z"}}]}`),
			omitted: []string{"Observation/gas deleted", "Observation/gas/_history/1 version-superseded"},
			dels:    pipeline.Deletions{Listed: 1, Applied: 1}, errHas: `entry[0]: request.method is "PUT", not DELETE`},
	} {
		t.Run(tc.name, func(t *testing.T) {
			for _, order := range []string{"as listed", "reversed"} {
				lines := slices.Clone(tc.lines)
				if order == "reversed" {
					slices.Reverse(lines)
				}
				derived, omitted, dels, errs := collected(t, lines)
				if !slices.Equal(derived, tc.derived) {
					t.Errorf("%s: derived %q, want %q", order, derived, tc.derived)
				}
				var gasOmitted []string
				for _, o := range omitted {
					if strings.HasPrefix(o, "Observation/gas ") || strings.HasPrefix(o, "Observation/gas/") {
						gasOmitted = append(gasOmitted, o)
					}
				}
				if !slices.Equal(gasOmitted, tc.omitted) {
					t.Errorf("%s: the gas's omissions %q, want %q", order, gasOmitted, tc.omitted)
				}
				want := tc.dels
				if order == "reversed" && tc.reversed != nil {
					want = *tc.reversed
				}
				if dels != want {
					t.Errorf("%s: deletions %+v, want %+v", order, dels, want)
				}
				switch {
				case tc.errHas == "" && len(errs) > 0:
					t.Errorf("%s: errors %v", order, errs)
				case tc.errHas != "":
					var de *pipeline.DeletionsError
					if len(errs) != 1 || !errors.As(errs[0], &de) || !strings.Contains(errs[0].Error(), tc.errHas) {
						t.Errorf("%s: errors %v, want one DeletionsError saying %q", order, errs, tc.errHas)
					}
				}
			}
		})
	}
}

// FuzzAddLineDeletions: whatever a line holds, AddLine and Finish do not
// fail; a line read as deletions returns a Bundle item, and an error only
// as a *DeletionsError that names entries by position on one line; every
// deletion taken is counted once.
func FuzzAddLineDeletions(f *testing.F) {
	const at, et = "2026-03-01T01:00:00Z", "2026-03-01T01:01:00Z"
	gas := versionLine("gas", "1", "2026-03-01T01:10:00Z", "Patient/a", "final", "2019-8", 45, at)
	f.Add([]byte(deleteLine("2026-03-01T02:00:00Z", "Observation/gas")))
	f.Add([]byte(deleteLine("", "Observation/gas", "Patient/a")))
	f.Add([]byte(deleteLine("2026-03-01T01:10:00Z", "https://ehr.example/fhir/Observation/gas/_history/1")))
	f.Add([]byte(`{"resourceType":"Bundle","type":"batch","entry":[{"request":{"method":"PUT","url":"Observation/x"}},{"request":{"method":"DELETE","url":"Observation/gas"}}]}`))
	f.Add([]byte(`{"resourceType":"Bundle","type":"transaction","entry":[{"request":{"method":"DELETE","url":"Observation?code=1"},"response":{"lastModified":"soon"}}]}`))
	f.Add([]byte(`{"resourceType":"Bundle","type":"searchset","entry":[{"request":{"method":"DELETE","url":"Observation/gas"}}]}`))
	f.Add([]byte(gas))
	f.Fuzz(func(t *testing.T, line []byte) {
		dec := decode.New(decode.Options{})
		col := pipeline.NewCollector()
		for _, l := range []string{versionLine("et", "1", "2026-03-01T01:02:00Z", "Patient/a", "final", "19891-1", 35, et), gas} {
			if _, err := col.AddLine(dec, []byte(l)); err != nil {
				t.Fatal(err)
			}
		}
		it, err := col.AddLine(dec, line)
		var de *pipeline.DeletionsError
		if errors.As(err, &de) {
			if it.ResourceType != "Bundle" {
				t.Fatalf("deletions read from a line that returns a %q item", it.ResourceType)
			}
			if strings.ContainsAny(err.Error(), "\n\r") {
				t.Fatalf("error text %q spans lines", err)
			}
		}
		rep := finish(t, col)
		d := rep.Deletions
		if d.Applied+d.Older+d.NotHeld != d.Listed {
			t.Fatalf("deletions %+v do not add up", d)
		}
		if d.Listed > 0 && it.ResourceType != "Bundle" {
			t.Fatalf("%d deletions taken from a line read as a %q", d.Listed, it.ResourceType)
		}
	})
}
