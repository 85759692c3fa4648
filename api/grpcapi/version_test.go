package grpcapi_test

import (
	"context"
	"fmt"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest/fakefhir"
	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

func versionObs(id, version, status, code string, v float64, at, updated time.Time) []byte {
	return fmt.Appendf(nil, `{"resourceType":"Observation","id":"%s","meta":{"versionId":"%s","lastUpdated":"%s"},"status":"%s",`+
		`"code":{"coding":[{"system":"http://loinc.org","code":"%s"}]},"subject":{"reference":"Patient/v1"},"effectiveDateTime":"%s",`+
		`"valueQuantity":{"value":%g,"unit":"mm[Hg]","system":"http://unitsofmeasure.org","code":"mm[Hg]"}}`,
		id, version, updated.UTC().Format(time.RFC3339), status, code, at.UTC().Format(time.RFC3339), v)
}

// TestExplainSeriesVersion: a value the FHIR server holds in two versions
// (a blood gas amended after the value was written) is explained version by
// version: by the series and a revision, by the series and the server's
// versionId, and by the Observation's id with a /_history/ suffix. The
// earlier version is explained as it was (from the blood gas's first
// version), marked superseded with what replaced it and why; the current
// one is not marked.
func TestExplainSeriesVersion(t *testing.T) {
	fake := fakefhir.Start(t)
	st, err := boltstore.Open(filepath.Join(t.TempDir(), "x.db"), boltstore.Options{})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = st.Close() })
	enc, err := encode.New(encode.DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	cl, err := client.New(client.Config{BaseURL: fake.BaseURL, MaxRetries: -1})
	if err != nil {
		t.Fatal(err)
	}
	eng, err := engine.New(engine.Config{Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(), Client: cl})
	if err != nil {
		t.Fatal(err)
	}
	c := newClient(t, eng)
	ctx := t.Context()
	at := time.Now().Add(-time.Hour).Truncate(time.Minute)
	updated := at.Add(10 * time.Minute)
	send := func(res ...[]byte) {
		t.Helper()
		if _, err := c.Submit(ctx, &pb.SubmitRequest{Resources: res}); err != nil {
			t.Fatal(err)
		}
		if err := eng.EvaluateNow(ctx); err != nil {
			t.Fatal(err)
		}
		eng.FlushNow(ctx)
		h, err := eng.Health(ctx)
		if err != nil || h.Stats.OutboxDepth != 0 {
			t.Fatalf("outbox holds %d writes after a flush (%v)", h.Stats.OutboxDepth, err)
		}
	}
	gradient := func() *pb.Entry {
		t.Helper()
		page, err := c.ListDerivations(ctx, &pb.ListDerivationsRequest{Subject: "Patient/v1"})
		if err != nil {
			t.Fatal(err)
		}
		for _, d := range page.Derivations {
			if d.Value.GetCode() == string(derive.CodeGradient) {
				return d.Entry
			}
		}
		t.Fatalf("no gradient in %v", page.Derivations)
		return nil
	}
	first := [][]byte{versionObs("gas", "1", "final", "2019-8", 44, at, updated)}
	for m := -2; m <= 2; m++ {
		first = append(first, versionObs(fmt.Sprintf("et%d", m+2), "1", "final", "19891-1", 36, at.Add(time.Duration(m)*time.Minute), updated))
	}
	send(first...)
	before := gradient()
	send(versionObs("gas", "2", "amended", "2019-8", 47, at, updated.Add(time.Minute)))
	now := gradient()
	if now.Series != before.Series || now.Key == before.Key || now.ServerId != before.ServerId ||
		now.ServerVersion == before.ServerVersion || before.ServerVersion == "" || len(now.Revisions) != 1 {
		t.Fatalf("after the amendment the gradient is %v, before %v: want one series revised on the server", now, before)
	}

	series := func(v *pb.SeriesVersion) *pb.ExplainRequest {
		v.Series = now.Series
		return &pb.ExplainRequest{Target: &pb.ExplainRequest_SeriesVersion{SeriesVersion: v}}
	}
	byObservation := func(version string) *pb.ExplainRequest {
		return &pb.ExplainRequest{Target: &pb.ExplainRequest_Observation{Observation: &pb.ResourceId{
			Subject: "Patient/v1", Id: "Observation/" + now.ServerId + "/_history/" + version}}}
	}
	for _, tc := range []struct {
		name string
		req  *pb.ExplainRequest
		// earlier: the first version, superseded, from the gas at 44.
		earlier bool
	}{
		{"series and revision 1", series(&pb.SeriesVersion{Version: &pb.SeriesVersion_Revision{Revision: 1}}), true},
		{"series and revision 2 (current)", series(&pb.SeriesVersion{Version: &pb.SeriesVersion_Revision{Revision: 2}}), false},
		{"series and the first server version", series(&pb.SeriesVersion{Version: &pb.SeriesVersion_ServerVersion{ServerVersion: before.ServerVersion}}), true},
		{"series and the current server version", series(&pb.SeriesVersion{Version: &pb.SeriesVersion_ServerVersion{ServerVersion: now.ServerVersion}}), false},
		{"observation id with the first version", byObservation(before.ServerVersion), true},
		{"observation id with the current version", byObservation(now.ServerVersion), false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ex, err := c.Explain(ctx, tc.req)
			if err != nil {
				t.Fatal(err)
			}
			wantKey, wantGas, wantValue := now.Key, "/_history/2", 47.0
			if tc.earlier {
				wantKey, wantGas, wantValue = before.Key, "/_history/1", 44.0
			}
			if ex.Entry.GetKey() != wantKey || ex.Entry.GetSeries() != now.Series {
				t.Errorf("explained key %s of series %s, want %s of %s", ex.Entry.GetKey(), ex.Entry.GetSeries(), wantKey, now.Series)
			}
			if len(ex.Inputs) == 0 || !strings.HasSuffix(ex.Inputs[0].Reference, wantGas) || ex.Inputs[0].Value != wantValue {
				t.Errorf("explained from %v, want the blood gas %s at %v", ex.Inputs, wantGas, wantValue)
			}
			sup := ex.GetSuperseded()
			switch {
			case tc.earlier && sup == nil:
				t.Error("the earlier version is not marked superseded")
			case tc.earlier && (sup.Key != now.Key || sup.Status != now.Status || !strings.Contains(sup.Because, "corrected")):
				t.Errorf("superseded by %v, want key %s (%s) and why", sup, now.Key, now.Status)
			case !tc.earlier && sup != nil:
				t.Errorf("the current version is marked superseded: %v", sup)
			}
		})
	}

	for _, tc := range []struct {
		name string
		req  *pb.ExplainRequest
		code codes.Code
	}{
		{"revision past the last", series(&pb.SeriesVersion{Version: &pb.SeriesVersion_Revision{Revision: 3}}), codes.NotFound},
		{"revision 0", series(&pb.SeriesVersion{Version: &pb.SeriesVersion_Revision{Revision: 0}}), codes.InvalidArgument},
		{"no version", series(&pb.SeriesVersion{}), codes.InvalidArgument},
		{"empty server version", series(&pb.SeriesVersion{Version: &pb.SeriesVersion_ServerVersion{}}), codes.InvalidArgument},
		{"a server version never written", series(&pb.SeriesVersion{Version: &pb.SeriesVersion_ServerVersion{ServerVersion: "no-such-version"}}), codes.NotFound},
		{"an observation version never written", byObservation("no-such-version"), codes.NotFound},
		{"malformed series", &pb.ExplainRequest{Target: &pb.ExplainRequest_SeriesVersion{SeriesVersion: &pb.SeriesVersion{
			Series: "sha256:xyz", Version: &pb.SeriesVersion_Revision{Revision: 1}}}}, codes.InvalidArgument},
		{"unknown series", &pb.ExplainRequest{Target: &pb.ExplainRequest_SeriesVersion{SeriesVersion: &pb.SeriesVersion{
			Series: "sha256:" + strings.Repeat("0", 64), Version: &pb.SeriesVersion_Revision{Revision: 1}}}}, codes.NotFound},
	} {
		t.Run(tc.name, func(t *testing.T) {
			_, err := c.Explain(context.Background(), tc.req)
			if status.Code(err) != tc.code {
				t.Errorf("got %v, want %v", err, tc.code)
			}
		})
	}
}
