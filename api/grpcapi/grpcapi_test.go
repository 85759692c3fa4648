package grpcapi_test

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"io"
	"math"
	"net"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/metadata"
	reflectionpb "google.golang.org/grpc/reflection/grpc_reflection_v1"
	"google.golang.org/grpc/status"
	"google.golang.org/grpc/test/bufconn"
	"google.golang.org/protobuf/types/known/timestamppb"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/grpcapi"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	pb "github.com/deadspace-fhir/deadspace/proto/deadspace/v1"
)

// newEngine returns a standalone engine on a fresh store. The demo data is
// from March 2026, so retention is long enough that none of it counts as
// frozen history.
func newEngine(t *testing.T) *engine.Engine {
	t.Helper()
	st, err := boltstore.Open(filepath.Join(t.TempDir(), "x.db"), boltstore.Options{})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = st.Close() })
	enc, err := encode.New(encode.DefaultOptions())
	if err != nil {
		t.Fatal(err)
	}
	eng, err := engine.New(engine.Config{
		Store: st, Decoder: decode.New(decode.Options{}), Encoder: enc, Derive: derive.DefaultConfig(),
		Retention: 10 * 365 * 24 * time.Hour,
	})
	if err != nil {
		t.Fatal(err)
	}
	return eng
}

// dial serves srv over an in-memory connection and returns a client.
func dial(t *testing.T, srv *grpcapi.Server) *grpc.ClientConn {
	t.Helper()
	lis := bufconn.Listen(1 << 20)
	g := srv.NewGRPCServer(nil)
	go func() { _ = g.Serve(lis) }()
	t.Cleanup(g.Stop)
	conn, err := grpc.NewClient("passthrough:///bufconn",
		grpc.WithContextDialer(func(ctx context.Context, _ string) (net.Conn, error) { return lis.DialContext(ctx) }),
		grpc.WithTransportCredentials(insecure.NewCredentials()),
		grpc.WithDefaultCallOptions(grpc.MaxCallRecvMsgSize(64<<20)))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = conn.Close() })
	return conn
}

func newClient(t *testing.T, eng *engine.Engine) pb.DeadSpaceClient {
	t.Helper()
	srv := grpcapi.New(grpcapi.Config{Engine: eng, WatchPoll: 5 * time.Millisecond})
	return pb.NewDeadSpaceClient(dial(t, srv))
}

// demoLines returns every line of the demo export, the files in name order
// as `deadspace replay testdata/demo/*.ndjson` reads them.
func demoLines(t *testing.T) [][]byte {
	t.Helper()
	files, err := filepath.Glob(filepath.Join("..", "..", "testdata", "demo", "*.ndjson"))
	if err != nil || len(files) == 0 {
		t.Fatalf("demo files: %v (found %d)", err, len(files))
	}
	var lines [][]byte
	for _, name := range files {
		f, err := os.Open(name)
		if err != nil {
			t.Fatal(err)
		}
		sc := bufio.NewScanner(f)
		sc.Buffer(make([]byte, 1<<20), 16<<20)
		for sc.Scan() {
			if len(bytes.TrimSpace(sc.Bytes())) > 0 {
				lines = append(lines, bytes.Clone(sc.Bytes()))
			}
		}
		f.Close()
		if err := sc.Err(); err != nil {
			t.Fatal(err)
		}
	}
	return lines
}

// linesOf keeps the demo lines of one patient: its Patient resource and
// everything whose subject it is.
func linesOf(lines [][]byte, patient string) [][]byte {
	var out [][]byte
	for _, l := range lines {
		if bytes.Contains(l, []byte(`"Patient/`+patient+`"`)) || bytes.Contains(l, []byte(`"id":"`+patient+`"`)) {
			out = append(out, l)
		}
	}
	return out
}

// goldenValue is one derived Observation of the replay golden file.
type goldenValue struct {
	Key, Series, ID, Code, Decimal, Subject string
	Effective                               time.Time
}

// readGolden reads testdata/replay/demo.ndjson.golden, the output of
// `deadspace replay` on the demo export (TestReplayDemoGolden in the root
// package keeps it current). The API must agree with the replay command on
// the same resources: one derivation, two front ends. The values themselves
// are checked against published sources in package derive's tests.
func readGolden(t *testing.T) map[string]goldenValue {
	t.Helper()
	raw, err := os.ReadFile(filepath.Join("..", "..", "testdata", "replay", "demo.ndjson.golden"))
	if err != nil {
		t.Fatal(err)
	}
	out := make(map[string]goldenValue)
	for _, line := range bytes.Split(raw, []byte{'\n'}) {
		var o struct {
			ResourceType string `json:"resourceType"`
			ID           string `json:"id"`
			Identifier   []struct {
				Value string `json:"value"`
			} `json:"identifier"`
			Code struct {
				Coding []struct {
					Code string `json:"code"`
				} `json:"coding"`
			} `json:"code"`
			Subject struct {
				Reference string `json:"reference"`
			} `json:"subject"`
			EffectiveDateTime string `json:"effectiveDateTime"`
			EffectivePeriod   struct {
				Start string `json:"start"`
			} `json:"effectivePeriod"`
			ValueQuantity struct {
				Value json.Number `json:"value"`
			} `json:"valueQuantity"`
		}
		if len(line) == 0 {
			continue
		}
		if err := json.Unmarshal(line, &o); err != nil {
			t.Fatal(err)
		}
		if o.ResourceType != "Observation" {
			continue
		}
		eff := o.EffectiveDateTime
		if eff == "" {
			eff = o.EffectivePeriod.Start
		}
		at, err := time.Parse(time.RFC3339, eff)
		if err != nil {
			t.Fatal(err)
		}
		g := goldenValue{
			Key: o.Identifier[0].Value, Series: o.Identifier[1].Value, ID: o.ID, Code: o.Code.Coding[0].Code,
			Decimal: o.ValueQuantity.Value.String(), Subject: o.Subject.Reference, Effective: at,
		}
		out[g.Key] = g
	}
	if len(out) != 111 {
		// demo.summary.golden: "wrote 111 Observations".
		t.Fatalf("golden file has %d derived Observations, want 111", len(out))
	}
	return out
}

func valueOf(v *pb.DerivedValue, subject string, at time.Time) goldenValue {
	return goldenValue{Key: v.Key, Series: v.Series, Code: v.Code, Decimal: v.Decimal, Subject: subject, Effective: at}
}

func withoutID(m map[string]goldenValue) map[string]goldenValue {
	out := make(map[string]goldenValue, len(m))
	for k, v := range m {
		v.ID = ""
		out[k] = v
	}
	return out
}

func diffValues(t *testing.T, got, want map[string]goldenValue) {
	t.Helper()
	for k, w := range want {
		g, ok := got[k]
		switch {
		case !ok:
			t.Errorf("missing %s %s of %s at %s (key %s)", w.Code, w.Decimal, w.Subject, w.Effective, k)
		case g != w:
			t.Errorf("key %s: got %+v, want %+v", k, g, w)
		}
	}
	for k, g := range got {
		if _, ok := want[k]; !ok {
			t.Errorf("unexpected %s %s of %s (key %s)", g.Code, g.Decimal, g.Subject, k)
		}
	}
}

func TestComputeMatchesReplay(t *testing.T) {
	c := newClient(t, newEngine(t))
	lines := demoLines(t)
	resp, err := c.Compute(t.Context(), &pb.ComputeRequest{Ndjson: bytes.Join(lines, []byte{'\n'})})
	if err != nil {
		t.Fatal(err)
	}
	got := make(map[string]goldenValue)
	for _, r := range resp.Results {
		for _, v := range r.Values {
			got[v.Key] = valueOf(v, r.Subject, r.Effective.AsTime())
		}
	}
	diffValues(t, got, withoutID(readGolden(t)))

	// demo.summary.golden: 17 blood gases, 2 falls and 1 rise (a rise is
	// a result of kind ETCO2_FALL with the code etco2-rise-above-baseline);
	// inputs left out: status-not-usable 1, specimen-not-arterial 1,
	// version-superseded 1, value-in-another-unit 1, etco2-artefact 2,
	// no-blood-gas-nearby 11535 and 465 code-not-recognised (counted only);
	// values not emitted: input-missing 30, not-applicable 11,
	// patient-not-adult 4.
	kinds := map[pb.ResultKind]int{}
	for _, r := range resp.Results {
		kinds[r.Kind]++
	}
	if kinds[pb.ResultKind_RESULT_KIND_BLOOD_GAS] != 17 || kinds[pb.ResultKind_RESULT_KIND_ETCO2_FALL] != 3 {
		t.Errorf("results by kind = %v, want 17 blood gases and 3 end-tidal findings", kinds)
	}
	count := func(om []*pb.Omission) map[string]int {
		m := map[string]int{}
		for _, o := range om {
			m[o.Reason]++
		}
		return m
	}
	wantInputs := map[string]int{"status-not-usable": 1, "specimen-not-arterial": 1, "version-superseded": 1, "no-blood-gas-nearby": 11535,
		"value-in-another-unit": 1, "etco2-artefact": 2}
	if got := count(resp.InputsLeftOut); !mapsEqual(got, wantInputs) {
		t.Errorf("inputs left out = %v, want %v", got, wantInputs)
	}
	if resp.Unrecognised != 465 {
		t.Errorf("unrecognised = %d, want 465", resp.Unrecognised)
	}
	wantValues := map[string]int{"input-missing": 30, "not-applicable": 11, "patient-not-adult": 4}
	if got := count(resp.ValuesNotEmitted); !mapsEqual(got, wantValues) {
		t.Errorf("values not emitted = %v, want %v", got, wantValues)
	}
	var device struct{ ID string }
	if err := json.Unmarshal(resp.Device, &device); err != nil || device.ID != "deadspace-dev" {
		t.Errorf("device = %s (%v), want the golden's Device deadspace-dev", resp.Device, err)
	}

	t.Run("resources give the same as ndjson", func(t *testing.T) {
		bed3 := linesOf(lines, "bed3-kpa")
		a, err := c.Compute(t.Context(), &pb.ComputeRequest{Resources: bed3})
		if err != nil {
			t.Fatal(err)
		}
		b, err := c.Compute(t.Context(), &pb.ComputeRequest{Ndjson: bytes.Join(bed3, []byte("\r\n\n"))})
		if err != nil {
			t.Fatal(err)
		}
		if len(a.Results) != 2 || len(a.Results) != len(b.Results) {
			t.Fatalf("got %d and %d results, want 2 each (demo.table.golden: two bed3-kpa blood gases)", len(a.Results), len(b.Results))
		}
		for i := range a.Results {
			for j := range a.Results[i].Values {
				if a.Results[i].Values[j].Key != b.Results[i].Values[j].Key {
					t.Errorf("result %d value %d differs", i, j)
				}
			}
		}
	})
	t.Run("nothing stored", func(t *testing.T) {
		list, err := c.ListDerivations(t.Context(), &pb.ListDerivationsRequest{Subject: "Patient/bed1-stable"})
		if err != nil {
			t.Fatal(err)
		}
		if len(list.Derivations) != 0 {
			t.Errorf("Compute stored %d derivations", len(list.Derivations))
		}
	})
}

func mapsEqual(a, b map[string]int) bool {
	if len(a) != len(b) {
		return false
	}
	for k, v := range a {
		if b[k] != v {
			return false
		}
	}
	return true
}

// submitDemo submits the whole demo export and derives.
func submitDemo(t *testing.T, eng *engine.Engine, c pb.DeadSpaceClient) *pb.SubmitResponse {
	t.Helper()
	resp, err := c.Submit(t.Context(), &pb.SubmitRequest{Resources: demoLines(t)})
	if err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(t.Context()); err != nil {
		t.Fatal(err)
	}
	return resp
}

var demoPatients = []string{"bed1-stable", "bed2-ards", "bed3-kpa", "bed4-percent", "bed5-fall", "bed6-cooled", "bed7-child"}

func TestSubmitListExplain(t *testing.T) {
	eng := newEngine(t)
	c := newClient(t, eng)
	golden := readGolden(t)
	sub := submitDemo(t, eng, c)

	// demo.summary.golden reads 12852 lines: 7 Encounters and 465
	// Observations of codes this service does not use are ignored; the
	// non-final gas, the venous gas and the kPa gas labelled mm[Hg] are
	// rejected with their reasons.
	if sub.Ignored != 7+465 {
		t.Errorf("ignored = %d, want 472", sub.Ignored)
	}
	var reasons []string
	for _, r := range sub.Rejected {
		reasons = append(reasons, r.Reason)
	}
	slices.Sort(reasons)
	if want := []string{"specimen-not-arterial", "status-not-usable", "value-in-another-unit"}; !slices.Equal(reasons, want) {
		t.Errorf("rejected reasons = %v, want %v", reasons, want)
	}
	if n := int(sub.Accepted) + int(sub.Ignored) + len(sub.Rejected); n != 12852 {
		t.Errorf("accepted+ignored+rejected = %d, want all 12852 resources", n)
	}

	t.Run("list pages through every patient", func(t *testing.T) {
		got := make(map[string]goldenValue)
		for _, p := range demoPatients {
			var prev time.Time
			token := ""
			pages := 0
			for {
				page, err := c.ListDerivations(t.Context(), &pb.ListDerivationsRequest{
					Subject: p, From: timestamppb.New(time.Date(2026, 3, 14, 0, 0, 0, 0, time.UTC)),
					To: timestamppb.New(time.Date(2026, 3, 16, 0, 0, 0, 0, time.UTC)), PageSize: 3, PageToken: token,
				})
				if err != nil {
					t.Fatal(err)
				}
				pages++
				for _, d := range page.Derivations {
					at := d.Entry.Effective.AsTime()
					if at.Before(prev) {
						t.Errorf("%s: %s listed after %s", p, at, prev)
					}
					prev = at
					if _, dup := got[d.Entry.Key]; dup {
						t.Errorf("%s listed twice", d.Entry.Key)
					}
					if d.Entry.Status != "final" || d.Value.Key != d.Entry.Key {
						t.Errorf("entry %s: status %q, value key %s", d.Entry.Key, d.Entry.Status, d.Value.Key)
					}
					got[d.Entry.Key] = valueOf(d.Value, d.Entry.Subject, at)
				}
				if token = page.NextPageToken; token == "" {
					break
				}
				if len(page.Derivations) != 3 {
					t.Errorf("a page before the last has %d derivations, want 3", len(page.Derivations))
				}
			}
			if pages < 2 {
				t.Errorf("%s: %d page(s); the test wants paging", p, pages)
			}
		}
		diffValues(t, got, withoutID(golden))
	})

	t.Run("list honours the range", func(t *testing.T) {
		// demo.table.golden: bed3-kpa's gases are at 00:00 and 04:00 on
		// 15 March, four values each.
		page, err := c.ListDerivations(t.Context(), &pb.ListDerivationsRequest{
			Subject: "Patient/bed3-kpa", From: timestamppb.New(time.Date(2026, 3, 15, 0, 0, 0, 0, time.UTC)),
			To: timestamppb.New(time.Date(2026, 3, 15, 4, 0, 0, 0, time.UTC)),
		})
		if err != nil {
			t.Fatal(err)
		}
		if len(page.Derivations) != 4 || page.NextPageToken != "" {
			t.Errorf("got %d derivations (next %q), want the 4 of the 00:00 gas", len(page.Derivations), page.NextPageToken)
		}
	})

	// The bed3-kpa blood gas at 00:00 reports PaCO2 5.99 kPa.
	var gradient goldenValue
	for _, g := range golden {
		if g.Subject == "Patient/bed3-kpa" && g.Code == "paco2-etco2-gradient" && g.Effective.Hour() == 0 {
			gradient = g
		}
	}
	checkKPa := func(t *testing.T, ex *pb.ExplainResponse) {
		t.Helper()
		if len(ex.Inputs) == 0 || ex.Inputs[0].Role != "blood-gas" {
			t.Fatalf("inputs = %v, want the blood gas first", ex.Inputs)
		}
		gas := ex.Inputs[0]
		if gas.Reference != "Observation/bed3-kpa-abg-1/_history/1" || gas.Version != "1" || !gas.OriginalAvailable {
			t.Errorf("blood gas input = %+v", gas)
		}
		if gas.OriginalValue != "5.99" || gas.OriginalUnit != "kPa" || gas.OriginalCode != "kPa" {
			t.Errorf("original = %q %q (code %q), want 5.99 kPa as the resource wrote it", gas.OriginalValue, gas.OriginalUnit, gas.OriginalCode)
		}
		// UCUM (Schadow and McDonald, The Unified Code for Units of
		// Measure) defines m[Hg] as 133.3220 kPa, so 1 kPa =
		// 1000/133.3220 = 7.50064 mm[Hg] (UCUM defines m[Hg] as 133.3220 kPa).
		if !strings.Contains(gas.Conversion, "5.99 kPa × 7.50064") || !strings.Contains(gas.Conversion, "mm[Hg]") {
			t.Errorf("conversion = %q, want the kPa to mm[Hg] factor 7.50064", gas.Conversion)
		}
		if want := 5.99 * 1000 / 133.3220; math.Abs(gas.Value-want) > 1e-9 || gas.Unit != "mm[Hg]" {
			t.Errorf("blood gas value = %v %s, want %v mm[Hg]", gas.Value, gas.Unit, want)
		}
		if ex.AlgorithmVersion != derive.AlgorithmVersion {
			t.Errorf("algorithm version = %q, want %q", ex.AlgorithmVersion, derive.AlgorithmVersion)
		}
		if len(ex.Pairings) == 0 || ex.Pairings[0].Rule == "" || ex.Pairings[0].Kind != "etco2" {
			t.Errorf("pairings = %v, want the end-tidal CO2 summary with its rule", ex.Pairings)
		}
		for _, in := range ex.Inputs[1:] {
			if in.Role != "paired" || !in.OriginalAvailable || in.Conversion == "" || in.Version == "" {
				t.Errorf("paired input %+v lacks its original, conversion or version", in)
			}
		}
		// demo.table.golden: five values of this gas are input-missing.
		missing := 0
		for _, o := range ex.ValuesNotEmitted {
			if o.Reason == "input-missing" && o.Ref == gas.Reference {
				missing++
			}
		}
		if missing != 5 {
			t.Errorf("values not emitted = %v, want 5 input-missing", ex.ValuesNotEmitted)
		}
	}

	for _, tc := range []struct {
		name string
		req  *pb.ExplainRequest
	}{
		{"by key", &pb.ExplainRequest{Target: &pb.ExplainRequest_Identifier{Identifier: gradient.Key}}},
		{"by series", &pb.ExplainRequest{Target: &pb.ExplainRequest_Identifier{Identifier: gradient.Series}}},
		{"by observation id", &pb.ExplainRequest{Target: &pb.ExplainRequest_Observation{Observation: &pb.ResourceId{Subject: "bed3-kpa", Id: gradient.ID}}}},
	} {
		t.Run("explain "+tc.name, func(t *testing.T) {
			ex, err := c.Explain(t.Context(), tc.req)
			if err != nil {
				t.Fatal(err)
			}
			if len(ex.Values) != 1 {
				t.Fatalf("got %d values, want 1", len(ex.Values))
			}
			v := ex.Values[0]
			if got := valueOf(v, ex.Subject, ex.Effective.AsTime()); got != withoutID(map[string]goldenValue{"": gradient})[""] {
				t.Errorf("explained %+v, want the golden %+v", got, gradient)
			}
			if ex.Recomputed || ex.Entry == nil || ex.Entry.Series != gradient.Series {
				t.Errorf("entry = %v, recomputed %v", ex.Entry, ex.Recomputed)
			}
			if v.Equation == "" || len(v.Terms) == 0 {
				t.Errorf("value lacks its equation or terms: %+v", v)
			}
			checkKPa(t, ex)
		})
	}

	t.Run("explain a blood gas recomputes", func(t *testing.T) {
		ex, err := c.Explain(t.Context(), &pb.ExplainRequest{Target: &pb.ExplainRequest_BloodGas{BloodGas: &pb.ResourceId{Subject: "Patient/bed3-kpa", Id: "Observation/bed3-kpa-abg-1"}}})
		if err != nil {
			t.Fatal(err)
		}
		if !ex.Recomputed {
			t.Error("not marked recomputed")
		}
		got := make(map[string]goldenValue)
		for _, v := range ex.Values {
			got[v.Key] = valueOf(v, ex.Subject, ex.Effective.AsTime())
		}
		want := make(map[string]goldenValue)
		for k, g := range withoutID(golden) {
			if g.Subject == "Patient/bed3-kpa" && g.Effective.Equal(gradient.Effective) {
				want[k] = g
			}
		}
		diffValues(t, got, want)
		checkKPa(t, ex)
	})

	// Issue 8, rules 3 and 5, in the live path: the cooled patient's first
	// blood gas (demo night, bed6-cooled at 23:00, 33 °C, set tidal volume
	// only) explains which PaCO2 was used and which substitute source.
	t.Run("explain shows temperature and substitute source", func(t *testing.T) {
		ex, err := c.Explain(t.Context(), &pb.ExplainRequest{Target: &pb.ExplainRequest_BloodGas{BloodGas: &pb.ResourceId{Subject: "Patient/bed6-cooled", Id: "Observation/bed6-cooled-abg-1"}}})
		if err != nil {
			t.Fatal(err)
		}
		var temp, substitute, noted bool
		for _, p := range ex.Pairings {
			temp = temp || (p.Kind == "body-temperature" && p.Median == 33)
			substitute = substitute || (p.Kind == "tidal-volume" && strings.Contains(p.Rule, "set tidal volume"))
		}
		for _, v := range ex.Values {
			for _, n := range v.Notes {
				noted = noted || strings.Contains(n, "adjusted from 37 °C")
			}
			if v.Code == "paco2-etco2-gradient" && !slices.ContainsFunc(v.Terms, func(t *pb.Term) bool { return t.Name == "PaCO2 at 37 °C" }) {
				t.Errorf("gradient terms %v lack the 37 °C value", v.Terms)
			}
		}
		if !temp || !substitute || !noted {
			t.Errorf("temperature pairing %v, substitute rule %v, adjustment note %v; pairings %v", temp, substitute, noted, ex.Pairings)
		}
	})

	t.Run("explain a fall", func(t *testing.T) {
		var fall goldenValue
		for _, g := range golden {
			if g.Code == "etco2-drop-from-baseline" && g.Subject == "Patient/bed5-fall" {
				fall = g
			}
		}
		ex, err := c.Explain(t.Context(), &pb.ExplainRequest{Target: &pb.ExplainRequest_Identifier{Identifier: fall.Key}})
		if err != nil {
			t.Fatal(err)
		}
		// demo.table.golden: fall of -14.0 from baseline 36.0 to 22.0.
		if ex.Kind != pb.ResultKind_RESULT_KIND_ETCO2_FALL || ex.Fall == nil || ex.Values[0].Decimal != "-14.0" {
			t.Fatalf("explanation = %v", ex)
		}
		if ex.Fall.Baseline != 36 || ex.Fall.Level != 22 || ex.AlgorithmVersion != derive.AlgorithmVersion {
			t.Errorf("fall = %v, algorithm %q", ex.Fall, ex.AlgorithmVersion)
		}
		if n := len(ex.Fall.BaselineReadings) + len(ex.Fall.EpisodeReadings); len(ex.Inputs) != n {
			t.Errorf("%d inputs for %d cited readings", len(ex.Inputs), n)
		}
	})
}

func TestWatchResume(t *testing.T) {
	eng := newEngine(t)
	c := newClient(t, eng)
	lines := demoLines(t)
	submit := func(patient string) {
		t.Helper()
		if _, err := c.Submit(t.Context(), &pb.SubmitRequest{Resources: linesOf(lines, patient)}); err != nil {
			t.Fatal(err)
		}
		if err := eng.EvaluateNow(t.Context()); err != nil {
			t.Fatal(err)
		}
	}
	type seen struct {
		series, key, status string
	}
	tokens := map[string]bool{}
	var got []seen
	// recv reads n events, checkpoints aside, and returns the last token.
	recv := func(stream pb.DeadSpace_WatchDerivationsClient, n int) string {
		t.Helper()
		token := ""
		for n > 0 {
			m, err := stream.Recv()
			if err != nil {
				t.Fatal(err)
			}
			token = m.ResumeToken
			if m.Event == nil {
				continue
			}
			if m.Event.Derivation == nil || m.Event.Derivation.Value == nil || m.Event.Superseded {
				t.Errorf("event %s lacks its derivation", m.ResumeToken)
			}
			if tokens[m.ResumeToken] {
				t.Errorf("token %s given twice", m.ResumeToken)
			}
			tokens[m.ResumeToken] = true
			got = append(got, seen{m.Event.Series, m.Event.Key, m.Event.Status})
			n--
		}
		return token
	}

	// How many derived Observations each patient has in the replay golden.
	perPatient := map[string]int{}
	for _, g := range readGolden(t) {
		perPatient[g.Subject]++
	}
	bed1, bed2, bed5 := perPatient["Patient/bed1-stable"], perPatient["Patient/bed2-ards"], perPatient["Patient/bed5-fall"]

	submit("bed1-stable")
	ctx, cancel := context.WithTimeout(t.Context(), time.Minute)
	stream, err := c.WatchDerivations(ctx, &pb.WatchDerivationsRequest{FromStart: true})
	if err != nil {
		t.Fatal(err)
	}
	first, err := stream.Recv()
	if err != nil || first.Event != nil || first.ResumeToken != "0" {
		t.Fatalf("first response = %v, %v; want a checkpoint at the start", first, err)
	}
	token := recv(stream, 10)
	cancel() // the client goes away mid-backlog

	submit("bed2-ards") // missed while disconnected

	ctx, cancel = context.WithTimeout(t.Context(), time.Minute)
	defer cancel()
	stream, err = c.WatchDerivations(ctx, &pb.WatchDerivationsRequest{ResumeToken: token})
	if err != nil {
		t.Fatal(err)
	}
	token = recv(stream, bed1-10+bed2)
	submit("bed5-fall") // live
	recv(stream, bed5)

	feed, err := eng.Events(t.Context(), 0, 1000)
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != len(feed) {
		t.Fatalf("received %d events, the feed has %d", len(got), len(feed))
	}
	for i, ev := range feed {
		if want := (seen{ev.Series, ev.Key, ev.Status}); got[i] != want {
			t.Errorf("event %d = %v, want %v", i, got[i], want)
		}
	}

	t.Run("subject filter", func(t *testing.T) {
		ctx, cancel := context.WithTimeout(t.Context(), time.Minute)
		defer cancel()
		stream, err := c.WatchDerivations(ctx, &pb.WatchDerivationsRequest{FromStart: true, Subject: "bed2-ards"})
		if err != nil {
			t.Fatal(err)
		}
		n, last := 0, ""
		for last != token || n < bed2 {
			m, err := stream.Recv()
			if err != nil {
				t.Fatal(err)
			}
			last = m.ResumeToken
			if m.Event != nil {
				n++
				if m.Event.Subject != "Patient/bed2-ards" {
					t.Errorf("event of %s", m.Event.Subject)
				}
			}
			if n > bed2 {
				t.Fatalf("%d events for bed2-ards, want %d", n, bed2)
			}
		}
	})
}

func TestErrorCodes(t *testing.T) {
	eng := newEngine(t)
	c := newClient(t, eng)
	lines := demoLines(t)
	bed1 := linesOf(lines, "bed1-stable")
	// A usable blood gas of a patient not yet submitted.
	obsLine := lines[slices.IndexFunc(lines, func(l []byte) bool { return bytes.Contains(l, []byte(`"id":"bed2-ards-abg-1"`)) })]
	if _, err := c.Submit(t.Context(), &pb.SubmitRequest{Resources: bed1}); err != nil {
		t.Fatal(err)
	}
	if err := eng.EvaluateNow(t.Context()); err != nil {
		t.Fatal(err)
	}
	zero := "sha256:" + strings.Repeat("0", 64)
	for _, tc := range []struct {
		name string
		call func(ctx context.Context) error
		code codes.Code
		msg  string
	}{
		{"compute bad JSON", func(ctx context.Context) error {
			_, err := c.Compute(ctx, &pb.ComputeRequest{Ndjson: append(append(bytes.Clone(obsLine), '\n'), []byte(`{"resourceType":`)...)})
			return err
		}, codes.InvalidArgument, "ndjson line 2"},
		{"compute not a resource", func(ctx context.Context) error {
			_, err := c.Compute(ctx, &pb.ComputeRequest{Resources: [][]byte{[]byte(`[1,2]`)}})
			return err
		}, codes.InvalidArgument, "resource 0"},
		{"compute nothing", func(ctx context.Context) error {
			_, err := c.Compute(ctx, &pb.ComputeRequest{})
			return err
		}, codes.InvalidArgument, "no resources"},
		{"compute both forms", func(ctx context.Context) error {
			_, err := c.Compute(ctx, &pb.ComputeRequest{Resources: [][]byte{obsLine}, Ndjson: obsLine})
			return err
		}, codes.InvalidArgument, "not both"},
		{"submit bad JSON", func(ctx context.Context) error {
			_, err := c.Submit(ctx, &pb.SubmitRequest{Resources: [][]byte{obsLine, []byte(`{not json`)}})
			return err
		}, codes.InvalidArgument, "resource 1"},
		{"explain unknown key", func(ctx context.Context) error {
			_, err := c.Explain(ctx, &pb.ExplainRequest{Target: &pb.ExplainRequest_Identifier{Identifier: zero}})
			return err
		}, codes.NotFound, ""},
		{"explain malformed identifier", func(ctx context.Context) error {
			_, err := c.Explain(ctx, &pb.ExplainRequest{Target: &pb.ExplainRequest_Identifier{Identifier: "sha256:xyz"}})
			return err
		}, codes.InvalidArgument, "identifier"},
		{"explain unknown observation", func(ctx context.Context) error {
			_, err := c.Explain(ctx, &pb.ExplainRequest{Target: &pb.ExplainRequest_Observation{Observation: &pb.ResourceId{Subject: "bed1-stable", Id: "ds-0"}}})
			return err
		}, codes.NotFound, ""},
		{"explain unknown blood gas", func(ctx context.Context) error {
			_, err := c.Explain(ctx, &pb.ExplainRequest{Target: &pb.ExplainRequest_BloodGas{BloodGas: &pb.ResourceId{Subject: "bed1-stable", Id: "nope"}}})
			return err
		}, codes.NotFound, ""},
		{"explain without target", func(ctx context.Context) error {
			_, err := c.Explain(ctx, &pb.ExplainRequest{})
			return err
		}, codes.InvalidArgument, "target"},
		{"explain a reading that is no blood gas", func(ctx context.Context) error {
			_, err := c.Explain(ctx, &pb.ExplainRequest{Target: &pb.ExplainRequest_BloodGas{BloodGas: &pb.ResourceId{Subject: "bed1-stable", Id: "bed1-stable-height"}}})
			return err
		}, codes.InvalidArgument, "not an arterial blood gas"},
		{"list without subject", func(ctx context.Context) error {
			_, err := c.ListDerivations(ctx, &pb.ListDerivationsRequest{})
			return err
		}, codes.InvalidArgument, "subject"},
		{"list bad subject", func(ctx context.Context) error {
			_, err := c.ListDerivations(ctx, &pb.ListDerivationsRequest{Subject: "Patient/a b"})
			return err
		}, codes.InvalidArgument, "subject"},
		{"list reversed range", func(ctx context.Context) error {
			_, err := c.ListDerivations(ctx, &pb.ListDerivationsRequest{Subject: "x", From: timestamppb.New(time.Unix(10, 0)), To: timestamppb.New(time.Unix(5, 0))})
			return err
		}, codes.InvalidArgument, "before"},
		{"list forged page token", func(ctx context.Context) error {
			_, err := c.ListDerivations(ctx, &pb.ListDerivationsRequest{Subject: "x", PageToken: "forged"})
			return err
		}, codes.InvalidArgument, "page_token"},
		{"watch bad token", func(ctx context.Context) error {
			s, err := c.WatchDerivations(ctx, &pb.WatchDerivationsRequest{ResumeToken: "abc"})
			if err != nil {
				return err
			}
			_, err = s.Recv()
			return err
		}, codes.InvalidArgument, "resume_token"},
		{"watch token ahead of the feed", func(ctx context.Context) error {
			s, err := c.WatchDerivations(ctx, &pb.WatchDerivationsRequest{ResumeToken: "99"})
			if err != nil {
				return err
			}
			_, err = s.Recv()
			return err
		}, codes.InvalidArgument, "ahead"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			err := tc.call(t.Context())
			st, _ := status.FromError(err)
			if st.Code() != tc.code || !strings.Contains(st.Message(), tc.msg) {
				t.Errorf("got %v %q, want %v containing %q", st.Code(), st.Message(), tc.code, tc.msg)
			}
		})
	}
	t.Run("a refused submission stores nothing", func(t *testing.T) {
		h, err := eng.Health(t.Context())
		if err != nil {
			t.Fatal(err)
		}
		if h.Stats.DirtyPatients != 0 {
			t.Errorf("%d patients marked for evaluation after refused submissions", h.Stats.DirtyPatients)
		}
	})
	t.Run("list page token of another patient", func(t *testing.T) {
		submitDemo(t, eng, c)
		page, err := c.ListDerivations(t.Context(), &pb.ListDerivationsRequest{Subject: "bed1-stable", PageSize: 1})
		if err != nil {
			t.Fatal(err)
		}
		_, err = c.ListDerivations(t.Context(), &pb.ListDerivationsRequest{Subject: "bed2-ards", PageSize: 1, PageToken: page.NextPageToken})
		if status.Code(err) != codes.InvalidArgument {
			t.Errorf("got %v, want InvalidArgument", err)
		}
	})
}

func TestRequestID(t *testing.T) {
	c := newClient(t, newEngine(t))
	for _, tc := range []struct {
		name, sent string
		kept       bool
	}{
		{"client's id kept", "abc-123", true},
		{"unsafe id replaced", "no spaces; please", false},
		{"none sent", "", false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ctx := t.Context()
			if tc.sent != "" {
				ctx = metadata.AppendToOutgoingContext(ctx, "x-request-id", tc.sent)
			}
			var hdr metadata.MD
			_, _ = c.ListDerivations(ctx, &pb.ListDerivationsRequest{Subject: "x"}, grpc.Header(&hdr))
			got := hdr.Get("x-request-id")
			if len(got) != 1 || got[0] == "" || (got[0] == tc.sent) != tc.kept {
				t.Errorf("x-request-id = %q, sent %q", got, tc.sent)
			}
		})
	}
}

func TestHealthAndReflection(t *testing.T) {
	srv := grpcapi.New(grpcapi.Config{Engine: newEngine(t)})
	conn := dial(t, srv)
	for _, service := range []string{"", "deadspace.v1.DeadSpace"} {
		t.Run("health "+service, func(t *testing.T) {
			resp, err := healthpb.NewHealthClient(conn).Check(t.Context(), &healthpb.HealthCheckRequest{Service: service})
			if err != nil {
				t.Fatal(err)
			}
			if resp.Status != healthpb.HealthCheckResponse_SERVING {
				t.Errorf("status = %v, want SERVING", resp.Status)
			}
		})
	}
	t.Run("reflection", func(t *testing.T) {
		stream, err := reflectionpb.NewServerReflectionClient(conn).ServerReflectionInfo(t.Context())
		if err != nil {
			t.Fatal(err)
		}
		if err := stream.Send(&reflectionpb.ServerReflectionRequest{MessageRequest: &reflectionpb.ServerReflectionRequest_ListServices{}}); err != nil {
			t.Fatal(err)
		}
		resp, err := stream.Recv()
		if err != nil {
			t.Fatal(err)
		}
		var names []string
		for _, s := range resp.GetListServicesResponse().GetService() {
			names = append(names, s.Name)
		}
		for _, want := range []string{"deadspace.v1.DeadSpace", "grpc.health.v1.Health"} {
			if !slices.Contains(names, want) {
				t.Errorf("services = %v, want %s among them", names, want)
			}
		}
		_ = stream.CloseSend()
		if _, err := stream.Recv(); !errors.Is(err, io.EOF) {
			t.Errorf("after CloseSend: %v", err)
		}
	})
	t.Run("shutdown reports not serving", func(t *testing.T) {
		srv.Shutdown()
		resp, err := healthpb.NewHealthClient(conn).Check(t.Context(), &healthpb.HealthCheckRequest{})
		if err != nil {
			t.Fatal(err)
		}
		if resp.Status != healthpb.HealthCheckResponse_NOT_SERVING {
			t.Errorf("status = %v, want NOT_SERVING", resp.Status)
		}
	})
}
