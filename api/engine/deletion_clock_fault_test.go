package engine_test

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
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
)

// TestDeletionLearnedWithAClockAheadDoesNotHideTheRecreatedGas: the host
// deadspace runs on keeps a clock two minutes ahead of the FHIR server's
// (NTP broken on one of them: common enough that the README promises
// versions are ordered by the server's meta.lastUpdated, not by when the
// service learned of them). A laboratory deletes a blood gas filed in
// error and writes it again a few seconds later under the same id (FHIR
// R4 allows an update to re-create a deleted resource; the server gives
// it a new version and a lastUpdated after the deletion). The service
// learns of each by an id-only notification: the first read answers 410
// Gone, the second the re-created version.
//
// An operator expects the re-created gas to be derived from again, as the
// README says: "a later re-creation with a newer meta.lastUpdated is used
// again". Today the deletion learned by the read is stamped with the
// service's own clock (engine.Deleted: "now"), two minutes into the
// server's future, so the re-created version, whose lastUpdated is the
// server's, looks older than the deletion and is refused: the gas's values
// stay entered-in-error while the gas stands on the server, and nothing
// reports it. The deletion's time must come from the server's clock (the
// 410 answer's Date header, or no later than just after the version held),
// never from the service's.
func TestDeletionLearnedWithAClockAheadDoesNotHideTheRecreatedGas(t *testing.T) {
	const ahead = 2 * time.Minute
	f := fakefhir.Start(t)
	cl, err := client.New(client.Config{BaseURL: f.BaseURL, MaxRetries: -1})
	if err != nil {
		t.Fatal(err)
	}
	st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Client: cl,
		// The service's clock: the server's (the fake's, the real one) plus two minutes.
		Now: func() time.Time { return time.Now().Add(ahead) },
	})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()

	// One invented bed on the server, sampled half an hour ago by the
	// server's clock; the service takes every resource in as a
	// full-resource notification carries it (with the server's meta).
	sample := time.Now().Add(-30 * time.Minute).UTC().Truncate(time.Minute)
	put := func(raw json.RawMessage) json.RawMessage {
		t.Helper()
		body, err := f.Put(raw)
		if err != nil {
			t.Fatal(err)
		}
		return body
	}
	var bed []json.RawMessage
	bed = append(bed, put(json.RawMessage(`{"resourceType":"Patient","id":"skew1","gender":"male","birthDate":"1958-09-14"}`)))
	bed = append(bed, put(skewObs("skew-ht", "8302-2", "cm", 176, sample.Add(-20*time.Hour))))
	for m := -20; m <= 20; m++ {
		at := sample.Add(time.Duration(m) * time.Minute)
		bed = append(bed,
			put(skewObs(fmt.Sprintf("skew-et%d", m+20), "19891-1", "mm[Hg]", 35+float64(m%3)/2, at)),
			put(skewObs(fmt.Sprintf("skew-vt%d", m+20), "75958-9", "mL", 470, at)),
			put(skewObs(fmt.Sprintf("skew-rr%d", m+20), "19840-8", "/min", 17, at)),
			put(skewObs(fmt.Sprintf("skew-mv%d", m+20), "76008-2", "L/min", 8.0, at)),
			put(skewObs(fmt.Sprintf("skew-vco2%d", m+20), "60825-7", "mL/min", 215, at)))
	}
	gas := skewObs("skewgas", "2019-8", "mm[Hg]", 46, sample)
	bed = append(bed, put(gas))
	if _, err := eng.Ingest(ctx, "test", bed); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	if liveAt(t, eng, "Patient/skew1", sample) == 0 {
		t.Fatal("nothing derived from the blood gas")
	}

	// The laboratory deletes it; the id-only notification's read answers 410.
	if !f.Delete("Observation", "skewgas") {
		t.Fatal("nothing deleted on the server")
	}
	if _, err := eng.Fetch(ctx, []string{"Observation/skewgas"}); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	if n := liveAt(t, eng, "Patient/skew1", sample); n != 0 {
		t.Fatalf("%d values still live after the deletion; the deletion was not applied at all", n)
	}

	// A few seconds later (server time) it is written again under its id.
	time.Sleep(20 * time.Millisecond)
	put(gas)
	if _, err := eng.Fetch(ctx, []string{"Observation/skewgas"}); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(ctx); err != nil {
		t.Fatal(err)
	}
	if n := liveAt(t, eng, "Patient/skew1", sample); n == 0 {
		t.Errorf("the blood gas written again after its deletion derives nothing: the deletion, dated by the service's clock %v ahead of the server's, "+
			"outranks the server's newer version", ahead)
	}
}

// skewObs is a final Observation of Patient/skew1 without meta: the fake
// server gives it its version and lastUpdated.
func skewObs(id, code, unit string, v float64, at time.Time) json.RawMessage {
	return json.RawMessage(fmt.Sprintf(`{"resourceType":"Observation","id":"%s","status":"final",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"Patient/skew1"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"%s","system":"http://unitsofmeasure.org","code":"%s"}}`,
		id, code, at.UTC().Format(time.RFC3339), v, unit, unit))
}
