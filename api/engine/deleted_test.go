package engine_test

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
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

// TestDeletedObservationIsWithdrawn: a blood gas values were derived from
// is deleted on the server. An id-only notification names it and the
// engine's read of it answers 410 Gone (or 404 Not Found); a Bundle's
// DELETE entry names it, with or without the time of the deletion. The
// read is not an error (or the sender would retry the notification for
// ever), and nothing derived from the gas stays live, unless the gas was
// written again after the deletion. An Observation the engine never held
// is left alone.
func TestDeletedObservationIsWithdrawn(t *testing.T) {
	gasUpdated := orderAt(80)
	for _, tc := range []struct {
		name     string
		deleteIt func(t *testing.T, eng *engine.Engine, f *fakefhir.Server) error
		wantLive bool
	}{
		{"read answers 410 Gone", func(t *testing.T, eng *engine.Engine, f *fakefhir.Server) error {
			if !f.Delete("Observation", "gasdel") {
				t.Fatal("nothing to delete on the server")
			}
			_, err := eng.Fetch(context.Background(), []string{"Observation/gasdel"})
			return err
		}, false},
		{"read answers 404 Not Found", func(t *testing.T, eng *engine.Engine, f *fakefhir.Server) error {
			f.Fail(http.MethodGet, "Observation/gasdel", http.StatusNotFound, "", 0)
			_, err := eng.Fetch(context.Background(), []string{"Observation/gasdel"})
			return err
		}, false},
		{"Bundle DELETE entry, no time", func(t *testing.T, eng *engine.Engine, f *fakefhir.Server) error {
			return deletedOnce(eng, engine.Deletion{Ref: "Observation/gasdel"}, engine.DeletionReceipt{Applied: 1})
		}, false},
		{"Bundle DELETE entry after the version held", func(t *testing.T, eng *engine.Engine, f *fakefhir.Server) error {
			return deletedOnce(eng, engine.Deletion{Ref: "https://ehr.example/fhir/Observation/gasdel", At: gasUpdated.Add(time.Minute)}, engine.DeletionReceipt{Applied: 1})
		}, false},
		{"Bundle DELETE entry before the version held", func(t *testing.T, eng *engine.Engine, f *fakefhir.Server) error {
			return deletedOnce(eng, engine.Deletion{Ref: "Observation/gasdel", At: gasUpdated.Add(-time.Minute)}, engine.DeletionReceipt{Older: 1})
		}, true},
		{"deleted, then written again", func(t *testing.T, eng *engine.Engine, f *fakefhir.Server) error {
			f.Delete("Observation", "gasdel")
			if _, err := eng.Fetch(context.Background(), []string{"Observation/gasdel"}); err != nil {
				return err
			}
			// Written again later by the server's clock, which dates the
			// deletion learned from the read (its answer's Date): the
			// fake's clock is the real one.
			_, err := eng.Ingest(context.Background(), "test", []json.RawMessage{
				orderObs("Patient/o1", "gasdel", "3", time.Now().UTC().Add(time.Second), "final", "2019-8", "mm[Hg]", 45, orderAt(60))})
			return err
		}, true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			f := fakefhir.Start(t)
			cl, err := client.New(client.Config{BaseURL: f.BaseURL, MaxRetries: -1})
			if err != nil {
				t.Fatal(err)
			}
			st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
			eng, err := engine.New(engine.Config{
				Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Client: cl,
				Now: func() time.Time { return orderNight.Add(6 * time.Hour) },
			})
			if err != nil {
				t.Fatal(err)
			}
			ctx := context.Background()
			gas := orderObs("Patient/o1", "gasdel", "1", gasUpdated, "final", "2019-8", "mm[Hg]", 45, orderAt(60))
			if _, err := f.Put(gas); err != nil {
				t.Fatal(err)
			}
			feedInChunks(t, eng, append(orderBed("Patient/o1", "o1"), gas), 500)
			before := liveAt(t, eng, "Patient/o1", orderAt(60))
			if before == 0 {
				t.Fatal("nothing derived from the blood gas")
			}
			if err := tc.deleteIt(t, eng, f); err != nil {
				t.Fatalf("the deletion failed: %v", err)
			}
			if err := eng.EvaluateNow(ctx); err != nil {
				t.Fatal(err)
			}
			if n := liveAt(t, eng, "Patient/o1", orderAt(60)); (n > 0) != tc.wantLive {
				t.Errorf("%d values live from the blood gas after its deletion, want live = %v", n, tc.wantLive)
			}
		})
	}
	t.Run("never held", func(t *testing.T) {
		f := fakefhir.Start(t)
		cl, err := client.New(client.Config{BaseURL: f.BaseURL, MaxRetries: -1})
		if err != nil {
			t.Fatal(err)
		}
		st := enginetest.OpenStore(t, boltstore.Options{NoSync: true})
		eng, err := engine.New(engine.Config{
			Store: st, Decoder: decode.New(decode.Options{}), Encoder: enginetest.Encoder(t), Derive: derive.DefaultConfig(), Client: cl,
		})
		if err != nil {
			t.Fatal(err)
		}
		if _, err := eng.Fetch(context.Background(), []string{"Observation/never", "Patient/never"}); err != nil {
			t.Fatalf("Fetch of resources the server and the engine never had: %v, want none", err)
		}
		rec, err := eng.Deleted(context.Background(), []engine.Deletion{{Ref: "Observation/never"}, {Ref: "Patient/never"}, {Ref: "Observation?identifier=x"}})
		if err != nil {
			t.Fatal(err)
		}
		if want := (engine.DeletionReceipt{NotHeld: 3}); rec != want {
			t.Errorf("receipt %+v, want %+v", rec, want)
		}
		if ds, err := st.DirtyPatients(context.Background()); err != nil || len(ds) != 0 {
			t.Errorf("dirty patients %v, %v; want none", ds, err)
		}
		if _, err := st.Owner(context.Background(), "Observation/never"); err == nil {
			t.Error("an Observation never held was stored")
		}
	})
}

// deletedOnce applies one deletion and checks what the engine says became
// of it.
func deletedOnce(eng *engine.Engine, d engine.Deletion, want engine.DeletionReceipt) error {
	rec, err := eng.Deleted(context.Background(), []engine.Deletion{d})
	if err != nil {
		return err
	}
	if rec != want {
		return fmt.Errorf("receipt %+v, want %+v", rec, want)
	}
	return nil
}
