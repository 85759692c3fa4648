package cli_test

import (
	"bytes"
	"context"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/cli"
	"github.com/deadspace-fhir/deadspace/api/settings"
)

// TestServeRefusesSettingsThatCannotWork: an operator deploying serve
// makes one of the usual mistakes in its ConfigMap, together with another
// one the service already catches (--retention 1h). The README promises
// that "all settings are checked at start-up and every problem is reported
// at once (exit status 2), each naming its flag (or variable) and the
// value given: ... values out of range or at odds with each other ...
// all before anything is created", so the operator fixes everything in one
// round instead of finding the next mistake at the next rollout.
//
// Today each of these passes the check, and is found (if at all) only
// later: a port out of range or two listeners on one address fail when
// the service binds, after the store was opened and with only that one
// problem named, exit status 1; polling, a heartbeat timeout or SMART
// credentials given to a service with no FHIR server (or no token
// endpoint) are silently ignored, so a site that believes it polls, or
// that it authenticates, does not. --register-subscription already
// refuses to run without --fhir-base; these belong with it in
// serve.Config.Validate (the listeners' ports and addresses beside the
// existing net.SplitHostPort checks).
func TestServeRefusesSettingsThatCannotWork(t *testing.T) {
	for _, tc := range []struct {
		name string
		args []string
		want []string // what the report must name, beside the retention
	}{
		{"a port out of range", []string{"--listen", "127.0.0.1:70000", "--grpc-listen", "127.0.0.1:99999"}, []string{"70000", "99999"}},
		{"HTTP and gRPC on one address", []string{"--listen", "127.0.0.1:18181", "--grpc-listen", "127.0.0.1:18181"}, []string{"--grpc-listen"}},
		{"the pages on the webhook's address", []string{"--listen", "127.0.0.1:18182", "--grpc-listen", "", "--ui-listen", "127.0.0.1:18182",
			"--ui-user-header", "X-Forwarded-User", "--ui-trusted-proxies", "127.0.0.1"}, []string{"--ui-listen"}},
		{"polling with no FHIR server", []string{"--poll-interval", "1m"}, []string{"--poll-interval"}},
		{"a heartbeat timeout with no FHIR server", []string{"--heartbeat-timeout", "10m"}, []string{"--heartbeat-timeout"}},
		{"SMART credentials without a token endpoint", []string{"--fhir-base", "https://fhir.example/r4", "--fhir-client-id", "deadspace-icu", "--fhir-key-id", "k-2026"},
			[]string{"--fhir-client-id"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := filepath.Join(t.TempDir(), "data")
			args := append([]string{"serve", "--data-dir", dir, "--webhook-secret", secret, "--retention", "1h"}, tc.args...)
			ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
			defer cancel()
			var out, errOut bytes.Buffer
			code := cli.Run(ctx, args, func(string) string { return "" }, "test", &out, &errOut)
			msg := errOut.String()
			if code != settings.ExitUsage {
				t.Fatalf("exit %d, want %d; stderr:\n%s", code, settings.ExitUsage, msg)
			}
			if !strings.Contains(msg, "--retention must be at least 2h") {
				t.Errorf("the other mistake is not reported:\n%s", msg)
			}
			for _, w := range tc.want {
				if !strings.Contains(msg, w) {
					t.Errorf("the report does not name %q, though the setting cannot work:\n%s", w, msg)
				}
			}
			if _, err := os.Stat(dir); err == nil {
				t.Errorf("--data-dir was created by a run that stopped at its configuration")
			}
		})
	}
}
