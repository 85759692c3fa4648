package serve_test

import (
	"errors"
	"flag"
	"io"
	"strings"
	"testing"
	"time"

	"github.com/deadspace-fhir/deadspace/api/serve"
)

// argsConfig is serve's configuration from flags and environment variables,
// as the command builds it.
func argsConfig(t *testing.T, args []string, env map[string]string) error {
	t.Helper()
	fs := flag.NewFlagSet("serve", flag.ContinueOnError)
	fs.SetOutput(io.Discard)
	var cfg serve.Config
	cfg.Bind(fs)
	base := []string{"--data-dir", t.TempDir(), "--webhook-secret", strings.Repeat("s", 32)}
	if err := fs.Parse(append(base, args...)); err != nil {
		t.Fatal(err)
	}
	return errors.Join(cfg.ApplyEnv(fs, func(k string) string { return env[k] }), cfg.Validate())
}

// TestListenersAndTheirPorts: every listener's port is a number from 0 to
// 65535, and no two listeners bind one host and port (an empty host,
// 0.0.0.0 and :: overlap every host; port 0 never clashes).
func TestListenersAndTheirPorts(t *testing.T) {
	ui := []string{"--ui-user-header", "X-Forwarded-User", "--ui-trusted-proxies", "127.0.0.1"}
	for _, tc := range []struct {
		name string
		args []string
		env  map[string]string
		want []string // nil: accepted
	}{
		{"the defaults", nil, nil, nil},
		{"any free port for each", append([]string{"--listen", "127.0.0.1:0", "--grpc-listen", "127.0.0.1:0", "--ui-listen", "127.0.0.1:0"}, ui...), nil, nil},
		{"one port on two hosts", []string{"--listen", "127.0.0.1:8080", "--grpc-listen", "127.0.0.2:8080"}, nil, nil},
		{"the highest port", []string{"--listen", "127.0.0.1:65535"}, nil, nil},
		{"a port out of range", []string{"--listen", "127.0.0.1:65536"}, nil, []string{"--listen: port \"65536\""}},
		{"a port out of range by environment", nil, map[string]string{"DEADSPACE_GRPC_LISTEN": "127.0.0.1:99999"}, []string{"--grpc-listen: port \"99999\""}},
		{"a negative port", []string{"--grpc-listen", "127.0.0.1:-1"}, nil, []string{"--grpc-listen: port \"-1\""}},
		{"a service name for a port", []string{"--listen", "127.0.0.1:http"}, nil, []string{"--listen: port \"http\""}},
		{"no port", []string{"--listen", "127.0.0.1:"}, nil, []string{"--listen: port \"\""}},
		{"the pages' port out of range", append([]string{"--ui-listen", "127.0.0.1:80000"}, ui...), nil, []string{"--ui-listen: port \"80000\""}},
		{"HTTP and gRPC on one address", []string{"--listen", "127.0.0.1:8181", "--grpc-listen", "127.0.0.1:8181"}, nil,
			[]string{"--grpc-listen 127.0.0.1:8181 and --listen 127.0.0.1:8181"}},
		{"gRPC on every host of the webhook's port", []string{"--listen", "127.0.0.1:8181", "--grpc-listen", ":8181"}, nil, []string{"--grpc-listen :8181 and --listen"}},
		{"the webhook on 0.0.0.0", []string{"--listen", "0.0.0.0:9090"}, nil, []string{"--grpc-listen 127.0.0.1:9090 and --listen 0.0.0.0:9090"}},
		{"the webhook on ::", []string{"--listen", "[::]:9090"}, nil, []string{"--grpc-listen 127.0.0.1:9090 and --listen [::]:9090"}},
		{"localhost is 127.0.0.1", []string{"--listen", "localhost:9090"}, nil, []string{"--grpc-listen 127.0.0.1:9090 and --listen localhost:9090"}},
		{"the pages on gRPC's address, by environment", ui, map[string]string{"DEADSPACE_UI_LISTEN": "127.0.0.1:9090"},
			[]string{"--ui-listen 127.0.0.1:9090 and --grpc-listen 127.0.0.1:9090"}},
		{"gRPC off frees its address", append([]string{"--grpc-listen", "", "--ui-listen", "127.0.0.1:9090"}, ui...), nil, nil},
	} {
		t.Run(tc.name, func(t *testing.T) {
			checkRefusal(t, argsConfig(t, tc.args, tc.env), tc.want)
		})
	}
}

// TestSettingsThatNeedAServer: settings that act only on a FHIR server,
// or only with a SMART token endpoint, are refused without it, whether
// given as flags or variables; their defaults never are, and neither is a
// zero that turns them off.
func TestSettingsThatNeedAServer(t *testing.T) {
	const base = "https://fhir.example/r4"
	for _, tc := range []struct {
		name string
		args []string
		env  map[string]string
		want []string // nil: accepted
	}{
		{"standalone with every default", nil, nil, nil},
		{"standalone with polling and heartbeat off", []string{"--poll-interval", "0", "--heartbeat-timeout", "0s"}, nil, nil},
		{"polling", []string{"--poll-interval", "5m"}, nil, []string{"--poll-interval 5m0s needs --fhir-base"}},
		{"polling by environment", nil, map[string]string{"DEADSPACE_POLL_INTERVAL": "5m"}, []string{"--poll-interval 5m0s needs --fhir-base"}},
		{"a heartbeat", nil, map[string]string{"DEADSPACE_HEARTBEAT_TIMEOUT": "10m"}, []string{"--heartbeat-timeout 10m0s needs --fhir-base"}},
		{"a gap grace", []string{"--gap-grace", "5s"}, nil, []string{"--gap-grace 5s needs --fhir-base"}},
		{"a gap grace at its default, given", nil, map[string]string{"DEADSPACE_GAP_GRACE": "2s"}, []string{"--gap-grace 2s needs --fhir-base"}},
		{"a ready grace", nil, map[string]string{"DEADSPACE_READY_GRACE": "1m"}, []string{"--ready-grace 1m0s needs --fhir-base"}},
		{"a transaction size", []string{"--fhir-max-transaction-entries", "20"}, nil, []string{"--fhir-max-transaction-entries 20 needs --fhir-base"}},
		{"a Subscription to register", []string{"--register-subscription", "--public-url", "https://deadspace.example/"}, nil,
			[]string{"--register-subscription needs --fhir-base", "--public-url \"https://deadspace.example/\" needs --fhir-base"}},
		{"a token by environment", nil, map[string]string{"DEADSPACE_FHIR_TOKEN": "t0k3n"}, []string{"DEADSPACE_FHIR_TOKEN needs --fhir-base"}},
		{"a client id", []string{"--fhir-client-id", "deadspace"}, nil, []string{"--fhir-client-id \"deadspace\" needs --fhir-token-url"}},
		{"a key id and scope with a server, no token endpoint", []string{"--fhir-base", base, "--fhir-key-id", "k1"},
			map[string]string{"DEADSPACE_FHIR_SCOPE": "system/Observation.rs"},
			[]string{"--fhir-key-id \"k1\" needs --fhir-token-url", "--fhir-scope \"system/Observation.rs\" needs --fhir-token-url"}},
		{"every one with a server", []string{"--fhir-base", base, "--poll-interval", "5m", "--heartbeat-timeout", "10m", "--gap-grace", "5s",
			"--ready-grace", "1m", "--fhir-max-transaction-entries", "20", "--register-subscription", "--public-url", "https://deadspace.example/"},
			map[string]string{"DEADSPACE_FHIR_TOKEN": "t0k3n"}, nil},
		{"the pages' sign-in settings without the pages", []string{"--ui-oidc-issuer", "https://idp.example", "--ui-session-ttl", "1h"}, nil,
			[]string{"--ui-oidc-issuer needs --ui-listen", "--ui-session-ttl needs --ui-listen"}},
		{"the pages' access log by environment without the pages", nil, map[string]string{"DEADSPACE_UI_ACCESS_LOG": "/var/log/pages.log"},
			[]string{"--ui-access-log needs --ui-listen"}},
		{"the pages' session key in the environment without the pages", nil, map[string]string{"DEADSPACE_UI_SESSION_KEY": "0123456789abcdef0123456789abcdef"}, nil},
		{"all at once, with another mistake", []string{"--poll-interval", "5m", "--heartbeat-timeout", "10m", "--fhir-client-id", "x", "--retention", "1h"}, nil,
			[]string{"--poll-interval", "--heartbeat-timeout", "--fhir-client-id", "--retention must be at least 2h"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			checkRefusal(t, argsConfig(t, tc.args, tc.env), tc.want)
		})
	}
}

// TestSettingsThatNeedAServerInCode: a Config written in code counts a
// setting as given when it holds neither zero nor its default.
func TestSettingsThatNeedAServerInCode(t *testing.T) {
	for _, tc := range []struct {
		name string
		edit func(c *serve.Config)
		want []string
	}{
		{"zeros and defaults", func(c *serve.Config) {
			c.MaxTxEntries, c.ReadyGrace = serve.DefaultMaxTxEntries, serve.DefaultReadyGrace
		}, nil},
		{"a ready grace of its own", func(c *serve.Config) { c.ReadyGrace = 5 * time.Minute }, []string{"--ready-grace 5m0s needs --fhir-base"}},
		{"a scope of its own", func(c *serve.Config) { c.FHIRScope = "system/*.rs" }, []string{"--fhir-scope \"system/*.rs\" needs --fhir-token-url"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			c := testConfig("", t.TempDir())
			tc.edit(&c)
			checkRefusal(t, c.Validate(), tc.want)
		})
	}
}

// checkRefusal checks err names each of want once, or is nil for nil want.
func checkRefusal(t *testing.T, err error, want []string) {
	t.Helper()
	if want == nil {
		if err != nil {
			t.Fatalf("refused: %v", err)
		}
		return
	}
	if err == nil {
		t.Fatal("accepted")
	}
	for _, w := range want {
		if n := strings.Count(err.Error(), w); n != 1 {
			t.Errorf("the report names %q %d times, want once:\n%v", w, n, err)
		}
	}
}
