package ui

import (
	"context"
	"encoding/json"
	"fmt"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/engine/enginetest"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
)

// TestLiveTimelinePlotsOneSampleReportedTwiceOnce is
// TestReportPlotsOneSampleReportedTwiceOnce on the live pages: the report
// left out as same-sample is plotted as left out, not as a second current
// blood gas, and the table's row is the report the values came from.
func TestLiveTimelinePlotsOneSampleReportedTwiceOnce(t *testing.T) {
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	updated := at.Add(10 * time.Minute)
	var raws []json.RawMessage
	for _, l := range faultGasWindow("ss2", "gas-sep", 40, at, updated) {
		raws = append(raws, json.RawMessage(l))
	}
	raws = append(raws, json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"gas-panel","meta":{"versionId":"1","lastUpdated":"%s"},"status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"24336-0"}]},"subject":{"reference":"Patient/ss2"},"effectiveDateTime":"%s",`+
		`"component":[{"code":{"coding":[{"system":"http://loinc.org","code":"2019-8"}]},"valueQuantity":{"value":40,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}]}`,
		updated.UTC().Format(time.RFC3339), at.UTC().Format(time.RFC3339))))
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig()})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	if _, err := eng.Ingest(ctx, "test", raws); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	cfg := derive.DefaultConfig()
	tl, err := NewLive(LiveConfig{Engine: eng, Window: cfg.Window, Fall: cfg.Fall}).Timeline(ctx, "ss2")
	if err != nil {
		t.Fatal(err)
	}
	var current, leftOut []string
	for _, p := range tl.PaCO2 {
		switch p.Status {
		case StatusFinal:
			current = append(current, p.Ref)
		case StatusLeftOut:
			leftOut = append(leftOut, p.Ref+" ("+p.Why+")")
		}
	}
	if len(current) != 1 || len(leftOut) != 1 {
		t.Errorf("current %v, left out %v; want one of each", current, leftOut)
	}
	if len(tl.Rows) != 1 || tl.Rows[0].PaCO2 == nil || tl.Rows[0].PaCO2.ExplainID == "" {
		t.Errorf("rows = %+v, want one whose blood gas links to its values' explanation", tl.Rows)
	}
}
