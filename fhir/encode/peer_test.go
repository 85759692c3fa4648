package encode_test

import (
	"bytes"
	"encoding/json"
	"os"
	"os/exec"
	"path/filepath"
	"sort"
	"testing"

	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/fhirtest"
)

// TestPeers checks the encoder's output against two outside references
// (see testdata/peercheck.mjs): the Medplum 5.2.13 R4 validator, which
// evaluates the FHIRPath invariants google/fhir skips, and the UCUM
// reference library ucum-lhc 7.1.10. It needs Node and testdata/node's
// npm ci; it is skipped without them and under -short (about 10 s).
func TestPeers(t *testing.T) {
	if testing.Short() {
		t.Skip("skipped under -short: starts Node")
	}
	node, err := exec.LookPath("node")
	if err != nil {
		fhirtest.Missing(t, "node not found")
	}
	nodeDir, err := filepath.Abs(filepath.Join("..", "..", "testdata", "node"))
	if err != nil {
		t.Fatal(err)
	}
	if _, err := os.Stat(filepath.Join(nodeDir, "node_modules", "@medplum", "core")); err != nil {
		t.Skip("testdata/node/node_modules missing: run npm ci there")
	}

	cases := goldenCases(t)
	var names []string
	for n := range cases {
		names = append(names, n)
	}
	sort.Strings(names)
	type item struct{ name string }
	var items []item
	var resources []json.RawMessage
	for _, n := range names {
		for _, r := range cases[n] {
			b, err := json.Marshal(r)
			if err != nil {
				t.Fatal(err)
			}
			resources = append(resources, b)
			items = append(items, item{n})
		}
	}
	var units []string
	for _, c := range encode.Codes() {
		p, _ := encode.PrecisionOf(c)
		units = append(units, p.Unit)
	}
	in, err := json.Marshal(map[string]any{"resources": resources, "units": units})
	if err != nil {
		t.Fatal(err)
	}
	cmd := exec.Command(node, "--experimental-websocket", filepath.Join("testdata", "peercheck.mjs"), nodeDir)
	cmd.Stdin = bytes.NewReader(in)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	outb, err := cmd.Output()
	if err != nil {
		t.Fatalf("peercheck: %v\n%s", err, stderr.Bytes())
	}
	var out struct {
		Resources [][]struct {
			Severity   string   `json:"severity"`
			Text       string   `json:"text"`
			Expression []string `json:"expression"`
		} `json:"resources"`
		Units []struct {
			Code   string   `json:"code"`
			Status string   `json:"status"`
			Msg    []string `json:"msg"`
		} `json:"units"`
	}
	if err := json.Unmarshal(outb, &out); err != nil {
		t.Fatalf("peercheck output: %v\n%s", err, outb)
	}
	if len(out.Resources) != len(resources) || len(out.Units) != len(units) {
		t.Fatalf("peercheck answered %d resources and %d units, asked %d and %d", len(out.Resources), len(out.Units), len(resources), len(units))
	}
	for i, issues := range out.Resources {
		for _, is := range issues {
			// Medplum reports warnings too; ours must be clean of both.
			t.Errorf("%s resource %d: medplum %s: %s at %v\n%s", items[i].name, i, is.Severity, is.Text, is.Expression, resources[i])
		}
	}
	for _, u := range out.Units {
		if u.Status != "valid" {
			t.Errorf("UCUM code %q: ucum-lhc says %s %v", u.Code, u.Status, u.Msg)
		}
	}
}
