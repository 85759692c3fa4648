// Package serve assembles the live service: configuration from flags and
// environment variables, the embedded store, the engine, the webhook and
// health endpoints, optional registration of the Subscription on the FHIR
// server, and an orderly shutdown.
package serve

import (
	"errors"
	"flag"
	"fmt"
	"net"
	"net/url"
	"os"
	"strconv"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/settings"
	"github.com/deadspace-fhir/deadspace/api/ui"
)

// Config is every setting of deadspace serve. Each field has a flag and an
// environment variable: --fhir-base and DEADSPACE_FHIR_BASE, and so on.
type Config struct {
	// Derivation is the derivation configuration replay shares
	// (api/settings): --window, --codes, --barometric-pressure and so on.
	Derivation settings.Derivation

	FHIRBase       string
	FHIRToken      string // secret: from DEADSPACE_FHIR_TOKEN or --fhir-token-file only
	FHIRTokenFile  string
	Listen         string
	DataDir        string
	Store          string // secret when it carries a password: prefer DEADSPACE_STORE
	StoreLease     time.Duration
	JobLease       time.Duration
	OwnerGrace     time.Duration
	WebhookSecret  string // secret: from the flag, DEADSPACE_WEBHOOK_SECRET or --webhook-secret-file
	WebhookSecFile string
	WebhookHeader  string
	MaxBodyBytes   int64
	PollInterval   time.Duration
	Settle         time.Duration
	DevicePace     time.Duration
	Retention      time.Duration
	Heartbeat      time.Duration
	GapGrace       time.Duration
	FetchBudget    time.Duration
	Register       bool
	PublicURL      string
	LogLevel       string
	GRPCListen     string
	TLSCert        string
	TLSKey         string
	GRPCClientCA   string
	FHIRTokenURL   string
	FHIRClientID   string
	FHIRScope      string
	FHIRKeyFile    string
	FHIRKeyID      string
	MaxTxEntries   int
	ReadyGrace     time.Duration
	MaxConcurrent  int
	UI             UIConfig

	// given names the flags the user set, on the command line or by their
	// environment variables (ApplyEnv), so that a rule between settings
	// refuses what the user asked for and never a default left alone. Bind
	// makes it empty; a Config written in code (nil) counts a setting as
	// given when it holds neither zero nor its default.
	given map[string]bool
}

// Defaults of the settings whose default is not zero and which a rule
// between settings refuses only when given (Config.given).
const (
	DefaultFHIRScope    = "system/Observation.rs system/Observation.cu system/Patient.rs system/Provenance.c system/Device.c system/Subscription.cru"
	DefaultMaxTxEntries = 8
	DefaultReadyGrace   = 30 * time.Second

	DefaultUIOIDCScopes = "openid profile groups"
	DefaultUIOIDCClaim  = "groups"
	DefaultUIUserClaim  = "preferred_username"
	DefaultUISessionTTL = 8 * time.Hour
)

// UIConfig is the settings of the auditor's pages (--ui-*): off unless
// --ui-listen is set, and then signed in by OpenID Connect or by a
// trusted proxy's user header.
type UIConfig struct {
	Listen           string
	OIDCIssuer       string
	OIDCClientID     string
	OIDCClientSecret string // secret: from DEADSPACE_UI_OIDC_CLIENT_SECRET or --ui-oidc-client-secret-file
	OIDCSecretFile   string
	OIDCRedirectURL  string
	OIDCScopes       string
	OIDCClaim        string
	OIDCAllowed      string
	OIDCUserClaim    string
	OIDCCA           string
	UserHeader       string
	TrustedProxies   string
	SessionTTL       time.Duration
	// SessionKey signs the pages' sessions: from DEADSPACE_UI_SESSION_KEY
	// or --ui-session-key-file. Replicas share it; without it each process
	// makes its own and sessions end with the process.
	SessionKey     string
	SessionKeyFile string
	AccessLog      string
}

// Bind registers every flag on fs with its default.
func (c *Config) Bind(fs *flag.FlagSet) {
	c.given = map[string]bool{}
	c.BindFHIR(fs)
	fs.StringVar(&c.Listen, "listen", "127.0.0.1:8080", "HTTP address for the webhook, /healthz and /readyz")
	fs.StringVar(&c.DataDir, "data-dir", "deadspace-data", "directory of the embedded store")
	fs.DurationVar(&c.StoreLease, "store-write-lease", 2*time.Minute, "with --store postgres://…: how long a replica holds an outbox write it is sending; a write whose replica died is sent by another after it (longer than the slowest send, retries included)")
	fs.DurationVar(&c.JobLease, "store-job-lease", 30*time.Second, "with --store postgres://…: how long one replica holds polling, catch-up and subscription registration, and its claim on a patient it is evaluating; another replica takes them over within about this long after it died")
	fs.DurationVar(&c.OwnerGrace, "store-owner-grace", engine.DefaultOwnerGrace, "with --store postgres://…: how long a patient's new data is left to the replica that evaluated the patient last (it holds the fall detector's state) before another replica evaluates it")
	fs.StringVar(&c.Store, "store", "", "where the service keeps its state: empty for the embedded store in --data-dir, or a postgres:// URL for replicas that share one PostgreSQL database (prefer DEADSPACE_STORE, which keeps the password out of the process list)")
	fs.StringVar(&c.WebhookSecret, "webhook-secret", "", "shared secret the FHIR server sends with each notification (prefer DEADSPACE_WEBHOOK_SECRET or --webhook-secret-file)")
	fs.StringVar(&c.WebhookSecFile, "webhook-secret-file", "", "file holding the webhook secret")
	fs.StringVar(&c.WebhookHeader, "webhook-header", "Authorization", "header carrying the secret: Authorization means \"Bearer <secret>\"; any other header carries the secret itself")
	fs.Int64Var(&c.MaxBodyBytes, "max-body-bytes", 4<<20, "largest webhook request body accepted")
	c.Derivation.Register(fs)
	fs.DurationVar(&c.PollInterval, "poll-interval", 0, "search the FHIR server for changes this often (0: only at start, on gaps and on empty rest-hooks)")
	fs.DurationVar(&c.Settle, "settle", 30*time.Second, "how long new data waits before it is derived, so late readings are included")
	fs.DurationVar(&c.DevicePace, "device-pace", engine.DefaultDevicePace, "shortest time between two evaluations of one patient for device readings alone (blood gases are evaluated at once; 0: every reading)")
	fs.DurationVar(&c.Retention, "retention", 24*time.Hour, "how long inputs are kept, by their effective time")
	fs.DurationVar(&c.Heartbeat, "heartbeat-timeout", 0, "catch up by search when no notification arrived for this long (0: off)")
	fs.DurationVar(&c.GapGrace, "gap-grace", engine.DefaultGapGrace, "how long subscription events a notification skipped over may take to arrive before a catch-up search looks for them (0: the default)")
	fs.DurationVar(&c.FetchBudget, "fetch-budget", engine.DefaultFetchBudget, "how long the reads of an id-only notification may take while its sender waits, retries and Retry-After waits included; a read that does not fit is answered 503 with Retry-After and caught up later (at most "+engine.MaxFetchBudget.String()+"; 0: the default)")
	fs.BoolVar(&c.Register, "register-subscription", false, "create or re-activate the rest-hook Subscription on the FHIR server at start-up")
	fs.StringVar(&c.PublicURL, "public-url", "", "URL the FHIR server reaches this service at (for --register-subscription), e.g. https://deadspace.example/")
	fs.StringVar(&c.LogLevel, "log-level", "info", "debug, info, warn or error")
	fs.StringVar(&c.GRPCListen, "grpc-listen", "127.0.0.1:9090", "gRPC address (empty: no gRPC)")
	fs.StringVar(&c.TLSCert, "tls-cert", "", "PEM certificate for HTTPS and gRPC TLS (with --tls-key)")
	fs.StringVar(&c.TLSKey, "tls-key", "", "PEM private key for --tls-cert")
	fs.StringVar(&c.GRPCClientCA, "grpc-client-ca", "", "PEM CA bundle: gRPC clients must present a certificate it signed (mutual TLS)")
	fs.IntVar(&c.MaxConcurrent, "max-concurrent-requests", 256, "webhook requests handled at once; more are answered 503 with Retry-After")
	fs.DurationVar(&c.ReadyGrace, "ready-grace", DefaultReadyGrace, "how long the FHIR server may fail before /readyz reports not ready")
}

// BindFHIR registers the flags of the FHIR server connection: its base,
// the bearer token or SMART Backend Services credentials, and the
// transaction size. deadspace backfill takes the same ones.
func (c *Config) BindFHIR(fs *flag.FlagSet) {
	if c.given == nil {
		c.given = map[string]bool{}
	}
	fs.StringVar(&c.FHIRBase, "fhir-base", "", "FHIR server base URL; without it the service runs standalone and keeps results in its store")
	fs.StringVar(&c.FHIRTokenFile, "fhir-token-file", "", "file holding a bearer token for the FHIR server (or set DEADSPACE_FHIR_TOKEN)")
	fs.StringVar(&c.FHIRTokenURL, "fhir-token-url", "", "OAuth 2.0 token endpoint for SMART Backend Services (client credentials with a signed JWT)")
	fs.StringVar(&c.FHIRClientID, "fhir-client-id", "", "registered client_id for --fhir-token-url")
	fs.StringVar(&c.FHIRScope, "fhir-scope", DefaultFHIRScope, "scopes to request from --fhir-token-url")
	fs.StringVar(&c.FHIRKeyFile, "fhir-private-key-file", "", "PEM private key (RSA for RS384, P-384 for ES384) that signs the client assertion")
	fs.StringVar(&c.FHIRKeyID, "fhir-key-id", "", "kid of the matching public key registered with the authorization server")
	fs.IntVar(&c.MaxTxEntries, "fhir-max-transaction-entries", DefaultMaxTxEntries, "largest transaction sent to the FHIR server; larger writes are split")
	c.UI.bind(fs)
}

func (u *UIConfig) bind(fs *flag.FlagSet) {
	fs.StringVar(&u.Listen, "ui-listen", "", "address of the auditor's pages (empty: no pages); TLS with --tls-cert as the other listeners")
	fs.StringVar(&u.OIDCIssuer, "ui-oidc-issuer", "", "OpenID Connect issuer URL users sign in with")
	fs.StringVar(&u.OIDCClientID, "ui-oidc-client-id", "", "client_id registered with the OpenID Connect provider")
	fs.StringVar(&u.OIDCSecretFile, "ui-oidc-client-secret-file", "", "file holding the OpenID Connect client secret (or set DEADSPACE_UI_OIDC_CLIENT_SECRET)")
	fs.StringVar(&u.OIDCRedirectURL, "ui-oidc-redirect-url", "", "this service's sign-in callback as the provider knows it, https://host:port/signin/callback")
	fs.StringVar(&u.OIDCScopes, "ui-oidc-scopes", DefaultUIOIDCScopes, "scopes to request, space-separated")
	fs.StringVar(&u.OIDCClaim, "ui-oidc-claim", DefaultUIOIDCClaim, "ID token claim that lists the user's groups or roles")
	fs.StringVar(&u.OIDCAllowed, "ui-oidc-allowed", "", "comma-separated groups or roles allowed to see the pages")
	fs.StringVar(&u.OIDCUserClaim, "ui-oidc-user-claim", DefaultUIUserClaim, "ID token claim written to the access log as the user")
	fs.StringVar(&u.OIDCCA, "ui-oidc-ca", "", "PEM CA bundle for reaching the OpenID Connect provider (default: the system's)")
	fs.StringVar(&u.UserHeader, "ui-user-header", "", "instead of OpenID Connect: request header naming the user, set by an authenticating proxy")
	fs.StringVar(&u.TrustedProxies, "ui-trusted-proxies", "", "comma-separated addresses or CIDR prefixes whose --ui-user-header is trusted")
	fs.DurationVar(&u.SessionTTL, "ui-session-ttl", DefaultUISessionTTL, "how long a sign-in lasts")
	fs.StringVar(&u.SessionKeyFile, "ui-session-key-file", "", "file holding the key that signs sign-in sessions (at least 32 bytes; or set DEADSPACE_UI_SESSION_KEY); replicas share it so a session works on all and survives restarts")
	fs.StringVar(&u.AccessLog, "ui-access-log", "", "file the page views that show patients are appended to (default: access.log in --data-dir)")
}

// validate checks the pages' settings; tls says whether --tls-cert is set.
func (u *UIConfig) validate(tls bool) []error {
	if u.Listen == "" {
		return nil
	}
	var errs []error
	host, _, err := listenAddr(u.Listen)
	if err != nil {
		errs = append(errs, fmt.Errorf("--ui-listen: %w", err))
	} else if !tls && !loopback(host) {
		errs = append(errs, errors.New("--ui-listen on a non-loopback address needs --tls-cert and --tls-key: sign-in cookies are sent over HTTPS only"))
	}
	if u.OIDCSecretFile != "" {
		sec, err := readSecret(u.OIDCSecretFile)
		if err != nil {
			errs = append(errs, fmt.Errorf("--ui-oidc-client-secret-file: %w", err))
		}
		u.OIDCClientSecret = sec
	}
	switch {
	case u.OIDCIssuer != "" && u.UserHeader != "":
		errs = append(errs, errors.New("use either --ui-oidc-issuer or --ui-user-header, not both"))
	case u.OIDCIssuer != "":
		if iu, err := url.Parse(u.OIDCIssuer); err != nil || (iu.Scheme != "https" && iu.Scheme != "http") || iu.Host == "" {
			errs = append(errs, fmt.Errorf("--ui-oidc-issuer must be an http or https URL, got %q", u.OIDCIssuer))
		}
		if u.OIDCClientID == "" {
			errs = append(errs, errors.New("--ui-oidc-issuer needs --ui-oidc-client-id"))
		}
		if ru, err := url.Parse(u.OIDCRedirectURL); u.OIDCRedirectURL == "" || err != nil || ru.Host == "" || !strings.HasSuffix(ru.Path, "/signin/callback") {
			errs = append(errs, errors.New("--ui-oidc-issuer needs --ui-oidc-redirect-url, ending in /signin/callback"))
		}
		if u.OIDCClaim == "" || len(splitList(u.OIDCAllowed)) == 0 {
			errs = append(errs, errors.New("--ui-oidc-issuer needs --ui-oidc-claim and --ui-oidc-allowed: who may see patient data"))
		}
	case u.UserHeader != "":
		if strings.ContainsAny(u.UserHeader, " :\r\n") {
			errs = append(errs, fmt.Errorf("--ui-user-header must be a header name, got %q", u.UserHeader))
		}
		if u.TrustedProxies == "" {
			errs = append(errs, errors.New("--ui-user-header needs --ui-trusted-proxies: the header is trusted only from the proxy"))
		} else if _, err := ui.ParsePrefixes(u.TrustedProxies); err != nil {
			errs = append(errs, fmt.Errorf("--ui-trusted-proxies: %w", err))
		}
	default:
		errs = append(errs, errors.New("--ui-listen needs a way to sign in: --ui-oidc-issuer, or --ui-user-header with --ui-trusted-proxies"))
	}
	if u.SessionKeyFile != "" {
		key, err := readSecret(u.SessionKeyFile)
		if err != nil {
			errs = append(errs, fmt.Errorf("--ui-session-key-file: %w", err))
		}
		u.SessionKey = key
	}
	if u.SessionKey != "" && len(u.SessionKey) < ui.MinSessionKeyBytes {
		errs = append(errs, fmt.Errorf("the session key (--ui-session-key-file or DEADSPACE_UI_SESSION_KEY) has %d bytes, fewer than %d", len(u.SessionKey), ui.MinSessionKeyBytes))
	}
	if _, err := u.oidcCAs(); err != nil {
		errs = append(errs, err)
	}
	if u.SessionTTL < time.Minute || u.SessionTTL > 7*24*time.Hour {
		errs = append(errs, fmt.Errorf("--ui-session-ttl must be between 1m and 168h, got %v", u.SessionTTL))
	}
	return errs
}

func loopback(host string) bool {
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// splitList splits a comma-separated list, dropping blanks.
func splitList(s string) []string {
	var out []string
	for _, f := range strings.Split(s, ",") {
		if f = strings.TrimSpace(f); f != "" {
			out = append(out, f)
		}
	}
	return out
}

// ApplyEnv sets every flag not given on the command line from its
// environment variable (settings.ApplyEnv, the rule of every command), and
// reads the secrets that come only from the environment.
func (c *Config) ApplyEnv(fs *flag.FlagSet, getenv func(string) string) error {
	err := settings.ApplyEnv(fs, getenv)
	if c.given == nil {
		c.given = map[string]bool{}
	}
	fs.Visit(func(f *flag.Flag) { c.given[f.Name] = true })
	fs.VisitAll(func(f *flag.Flag) {
		if getenv(settings.EnvName(f.Name)) != "" {
			c.given[f.Name] = true
		}
	})
	if c.FHIRToken == "" {
		c.FHIRToken = getenv("DEADSPACE_FHIR_TOKEN")
	}
	if c.UI.OIDCClientSecret == "" {
		c.UI.OIDCClientSecret = getenv("DEADSPACE_UI_OIDC_CLIENT_SECRET")
	}
	if c.UI.SessionKey == "" {
		c.UI.SessionKey = getenv("DEADSPACE_UI_SESSION_KEY")
	}
	return err
}

// readSecret reads a secret file, trimming one trailing newline.
func readSecret(path string) (string, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return "", err
	}
	return strings.TrimRight(string(b), "\r\n"), nil
}

// Validate checks every setting and reports all problems at once. It also
// loads secrets from their files, and reads every other file a setting
// names (certificates, keys, CA bundles, the site code table), so that a
// missing or unreadable one is reported here, before anything is created.
func (c *Config) Validate() error {
	var errs []error
	errs = append(errs, c.validateFHIR()...)
	if c.WebhookSecFile != "" {
		s, err := readSecret(c.WebhookSecFile)
		if err != nil {
			errs = append(errs, fmt.Errorf("--webhook-secret-file: %w", err))
		}
		c.WebhookSecret = s
	}
	if c.WebhookSecret == "" {
		errs = append(errs, errors.New("a webhook secret is required (--webhook-secret, DEADSPACE_WEBHOOK_SECRET or --webhook-secret-file): the webhook writes into the clinical record and must be authenticated"))
	} else if len(c.WebhookSecret) < 16 {
		errs = append(errs, errors.New("the webhook secret must be at least 16 characters"))
	}
	errs = append(errs, c.checkListeners()...)
	if c.Store != "" {
		// The URL may carry a password: name its scheme only.
		u, err := url.Parse(c.Store)
		switch {
		case err != nil:
			errs = append(errs, errors.New("--store must be a postgres:// URL, and this one does not parse"))
		case u.Scheme != "postgres" && u.Scheme != "postgresql":
			errs = append(errs, fmt.Errorf("--store must be a postgres:// URL (or empty for the embedded store), got scheme %q", u.Scheme))
		}
		if c.StoreLease < time.Second {
			errs = append(errs, fmt.Errorf("--store-write-lease must be at least 1s, got %v", c.StoreLease))
		}
		if c.JobLease < time.Second {
			errs = append(errs, fmt.Errorf("--store-job-lease must be at least 1s, got %v", c.JobLease))
		}
		if c.OwnerGrace <= 0 {
			errs = append(errs, fmt.Errorf("--store-owner-grace must be positive, got %v", c.OwnerGrace))
		}
	} else if c.DataDir == "" {
		errs = append(errs, errors.New("--data-dir is required for the embedded store"))
	} else if err := c.checkDataDir(); err != nil {
		errs = append(errs, err)
	}
	if c.WebhookHeader == "" || strings.ContainsAny(c.WebhookHeader, " :\r\n") {
		errs = append(errs, fmt.Errorf("--webhook-header must be a header name, got %q", c.WebhookHeader))
	}
	if c.MaxBodyBytes < 1024 {
		errs = append(errs, fmt.Errorf("--max-body-bytes must be at least 1024, got %d", c.MaxBodyBytes))
	}
	if c.PollInterval < 0 {
		errs = append(errs, fmt.Errorf("--poll-interval must not be negative, got %v", c.PollInterval))
	}
	if c.PollInterval > 0 && c.PollInterval < time.Second {
		errs = append(errs, fmt.Errorf("--poll-interval must be at least 1s, got %v", c.PollInterval))
	}
	if c.Settle < 0 {
		errs = append(errs, fmt.Errorf("--settle must not be negative, got %v", c.Settle))
	}
	if c.DevicePace < 0 || c.DevicePace > engine.MaxDevicePace {
		errs = append(errs, fmt.Errorf("--device-pace must be between 0s and %v, got %v", engine.MaxDevicePace, c.DevicePace))
	}
	if c.Retention < 2*time.Hour {
		errs = append(errs, fmt.Errorf("--retention must be at least 2h, got %v", c.Retention))
	}
	if c.GapGrace < 0 {
		errs = append(errs, fmt.Errorf("--gap-grace must not be negative, got %v", c.GapGrace))
	}
	if c.FetchBudget != 0 && (c.FetchBudget < 100*time.Millisecond || c.FetchBudget > engine.MaxFetchBudget) {
		errs = append(errs, fmt.Errorf("--fetch-budget must be between 100ms and %v (well within a sender's patience and the HTTP server's 60s write timeout), or 0 for the default, got %v", engine.MaxFetchBudget, c.FetchBudget))
	}
	if c.Heartbeat < 0 {
		errs = append(errs, fmt.Errorf("--heartbeat-timeout must not be negative, got %v", c.Heartbeat))
	}
	errs = append(errs, c.checkNeedsFHIRBase()...)
	errs = append(errs, c.checkNeedsUIListen()...)
	if c.Register {
		if u, err := url.Parse(c.PublicURL); c.PublicURL == "" || err != nil || u.Host == "" {
			errs = append(errs, errors.New("--register-subscription needs --public-url, the URL the FHIR server reaches this service at"))
		}
	}
	if (c.TLSCert == "") != (c.TLSKey == "") {
		errs = append(errs, errors.New("--tls-cert and --tls-key go together"))
	}
	if c.GRPCClientCA != "" && c.TLSCert == "" {
		errs = append(errs, errors.New("--grpc-client-ca needs --tls-cert and --tls-key"))
	}
	_, _, tlsErrs := c.serverTLS()
	errs = append(errs, tlsErrs...)
	if c.MaxConcurrent < 1 {
		errs = append(errs, fmt.Errorf("--max-concurrent-requests must be at least 1, got %d", c.MaxConcurrent))
	}
	if c.ReadyGrace < 0 {
		errs = append(errs, fmt.Errorf("--ready-grace must not be negative, got %v", c.ReadyGrace))
	}
	if _, err := c.Derivation.Resolve("dev"); err != nil {
		errs = append(errs, err)
	}
	errs = append(errs, c.UI.validate(c.TLSCert != "")...)
	if c.UI.Listen != "" {
		if err := c.checkAccessLog(); err != nil {
			errs = append(errs, err)
		}
	}
	switch c.LogLevel {
	case "debug", "info", "warn", "error":
	default:
		errs = append(errs, fmt.Errorf("--log-level must be debug, info, warn or error, got %q", c.LogLevel))
	}
	return errors.Join(errs...)
}

// ValidateFHIR checks the FHIR connection settings only, reporting every
// problem at once, reads the token file and checks the private key file.
func (c *Config) ValidateFHIR() error { return errors.Join(c.validateFHIR()...) }

func (c *Config) validateFHIR() []error {
	var errs []error
	if c.FHIRBase != "" {
		u, err := url.Parse(c.FHIRBase)
		if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
			errs = append(errs, fmt.Errorf("--fhir-base must be an http or https URL, got %q", c.FHIRBase))
		}
	}
	if c.FHIRTokenFile != "" {
		tok, err := readSecret(c.FHIRTokenFile)
		if err != nil {
			errs = append(errs, fmt.Errorf("--fhir-token-file: %w", err))
		}
		c.FHIRToken = tok
	}
	errs = append(errs, c.checkNeedsTokenURL()...)
	if c.FHIRTokenURL != "" {
		if c.FHIRBase == "" {
			errs = append(errs, errors.New("--fhir-token-url needs --fhir-base"))
		}
		if c.FHIRClientID == "" || c.FHIRKeyFile == "" {
			errs = append(errs, errors.New("--fhir-token-url needs --fhir-client-id and --fhir-private-key-file"))
		}
		if c.FHIRToken != "" {
			errs = append(errs, errors.New("use either a static FHIR token or --fhir-token-url, not both"))
		}
	}
	if _, err := c.fhirKey(); err != nil {
		errs = append(errs, err)
	}
	if c.MaxTxEntries < 2 {
		errs = append(errs, fmt.Errorf("--fhir-max-transaction-entries must be at least 2, got %d", c.MaxTxEntries))
	}
	return errs
}

// gave reports whether the user set the flag name: on the command line or
// by its environment variable when the Config came from Bind and ApplyEnv;
// otherwise (a Config written in code) whether its value is neither zero
// nor the flag's default, which is what isDefault says.
func (c *Config) gave(name string, isDefault bool) bool {
	if c.given != nil {
		return c.given[name]
	}
	return !isDefault
}

// checkNeedsFHIRBase refuses the settings that only act on a FHIR server
// when there is none (standalone): each would be silently ignored, so a
// site that believes it polls, catches up, registers its Subscription or
// authenticates would not. Those whose default is zero (off) are refused
// when they are on; the others only when the user gave them, so that a
// default never needs --fhir-base. --fhir-token-url is refused in
// validateFHIR, which backfill shares.
func (c *Config) checkNeedsFHIRBase() []error {
	if c.FHIRBase != "" {
		return nil
	}
	var errs []error
	need := func(setting, why string) {
		errs = append(errs, fmt.Errorf("%s needs --fhir-base: %s, and without a FHIR server there is none", setting, why))
	}
	if c.PollInterval > 0 {
		need(fmt.Sprintf("--poll-interval %v", c.PollInterval), "it searches the FHIR server for changes")
	}
	if c.Heartbeat > 0 {
		need(fmt.Sprintf("--heartbeat-timeout %v", c.Heartbeat), "it catches up by searching the FHIR server")
	}
	if c.gave("gap-grace", c.GapGrace == 0 || c.GapGrace == engine.DefaultGapGrace) {
		need(fmt.Sprintf("--gap-grace %v", c.GapGrace), "it delays a catch-up search of the FHIR server")
	}
	if c.Register {
		need("--register-subscription", "it creates the Subscription on the FHIR server")
	}
	if c.PublicURL != "" {
		need(fmt.Sprintf("--public-url %q", c.PublicURL), "it is where the FHIR server sends notifications (for --register-subscription)")
	}
	if c.gave("ready-grace", c.ReadyGrace == 0 || c.ReadyGrace == DefaultReadyGrace) {
		need(fmt.Sprintf("--ready-grace %v", c.ReadyGrace), "it is how long the FHIR server may fail before /readyz reports not ready")
	}
	if c.gave("fhir-max-transaction-entries", c.MaxTxEntries == 0 || c.MaxTxEntries == DefaultMaxTxEntries) {
		need(fmt.Sprintf("--fhir-max-transaction-entries %d", c.MaxTxEntries), "it sizes the writes to the FHIR server")
	}
	switch {
	case c.FHIRTokenFile != "":
		need("--fhir-token-file", "the token is sent to the FHIR server")
	case c.FHIRToken != "":
		need("DEADSPACE_FHIR_TOKEN", "the token is sent to the FHIR server")
	}
	return errs
}

// checkNeedsUIListen refuses the pages' settings given without
// --ui-listen: the pages are off without it, so a site that believes it
// set who may sign in, or where page views are logged, would have none of
// it. The session key's environment variable is left alone: deployments
// keep it in a Secret whether the pages are on or not.
func (c *Config) checkNeedsUIListen() []error {
	u := c.UI
	if u.Listen != "" {
		return nil
	}
	var errs []error
	for _, f := range []struct {
		name string
		set  bool
	}{
		{"--ui-oidc-issuer", u.OIDCIssuer != ""},
		{"--ui-oidc-client-id", u.OIDCClientID != ""},
		{"--ui-oidc-client-secret-file", u.OIDCSecretFile != ""},
		{"--ui-oidc-redirect-url", u.OIDCRedirectURL != ""},
		{"--ui-oidc-allowed", u.OIDCAllowed != ""},
		{"--ui-oidc-ca", u.OIDCCA != ""},
		{"--ui-user-header", u.UserHeader != ""},
		{"--ui-trusted-proxies", u.TrustedProxies != ""},
		{"--ui-session-key-file", u.SessionKeyFile != ""},
		{"--ui-access-log", u.AccessLog != ""},
		{"--ui-oidc-scopes", c.gave("ui-oidc-scopes", u.OIDCScopes == "" || u.OIDCScopes == DefaultUIOIDCScopes)},
		{"--ui-oidc-claim", c.gave("ui-oidc-claim", u.OIDCClaim == "" || u.OIDCClaim == DefaultUIOIDCClaim)},
		{"--ui-oidc-user-claim", c.gave("ui-oidc-user-claim", u.OIDCUserClaim == "" || u.OIDCUserClaim == DefaultUIUserClaim)},
		{"--ui-session-ttl", c.gave("ui-session-ttl", u.SessionTTL == 0 || u.SessionTTL == DefaultUISessionTTL)},
	} {
		if f.set {
			errs = append(errs, fmt.Errorf("%s needs --ui-listen: the auditor's pages are off without it", f.name))
		}
	}
	return errs
}

// checkNeedsTokenURL refuses SMART Backend Services settings given without
// the token endpoint they are sent to: without --fhir-token-url none of
// them is used, and the service would reach the FHIR server without the
// authentication the site believes it configured.
func (c *Config) checkNeedsTokenURL() []error {
	if c.FHIRTokenURL != "" {
		return nil
	}
	var errs []error
	need := func(setting string) {
		errs = append(errs, fmt.Errorf("%s needs --fhir-token-url: SMART Backend Services credentials are used only with a token endpoint", setting))
	}
	if c.FHIRClientID != "" {
		need(fmt.Sprintf("--fhir-client-id %q", c.FHIRClientID))
	}
	if c.FHIRKeyFile != "" {
		need("--fhir-private-key-file")
	}
	if c.FHIRKeyID != "" {
		need(fmt.Sprintf("--fhir-key-id %q", c.FHIRKeyID))
	}
	if c.gave("fhir-scope", c.FHIRScope == "" || c.FHIRScope == DefaultFHIRScope) {
		need(fmt.Sprintf("--fhir-scope %q", c.FHIRScope))
	}
	return errs
}

// listenAddr splits a listen address and checks its port: a number from 0
// (any free port) to 65535. A service name such as "http", or no port at
// all, is refused: the address is then not the one the operator reads.
func listenAddr(addr string) (host string, port int, err error) {
	host, p, err := net.SplitHostPort(addr)
	if err != nil {
		return "", 0, err
	}
	n, err := strconv.ParseUint(p, 10, 64)
	if err != nil || n > 65535 {
		return "", 0, fmt.Errorf("port %q of %q is not a number from 0 to 65535 (0: any free port)", p, addr)
	}
	return host, int(n), nil
}

// listener is one address the service listens on, with its flag.
type listener struct {
	flag, addr string
	host       string
	port       int
}

// checkListeners checks every listener's address (--listen, which also
// serves /metrics, /healthz and /readyz; --grpc-listen; --ui-listen, whose
// address UIConfig.validate checks), and refuses two that would bind one
// host and port: the second would fail at start-up, after the store was
// opened. Port 0 (any free port) never clashes.
func (c *Config) checkListeners() []error {
	var errs []error
	var ls []listener
	for _, l := range []struct {
		flag, addr string
		on         bool
	}{
		{"--listen", c.Listen, true},
		{"--grpc-listen", c.GRPCListen, c.GRPCListen != ""},
		{"--ui-listen", c.UI.Listen, c.UI.Listen != ""},
	} {
		if !l.on {
			continue
		}
		host, port, err := listenAddr(l.addr)
		if err != nil {
			if l.flag != "--ui-listen" { // reported by UIConfig.validate
				errs = append(errs, fmt.Errorf("%s: %w", l.flag, err))
			}
			continue
		}
		this := listener{flag: l.flag, addr: l.addr, host: host, port: port}
		for _, other := range ls {
			if overlap(this, other) {
				errs = append(errs, fmt.Errorf("%s %s and %s %s are one address: each listener needs a port of its own", l.flag, l.addr, other.flag, other.addr))
				break
			}
		}
		ls = append(ls, this)
	}
	return errs
}

// overlap reports whether two listeners would bind the same host and port.
// An empty host, 0.0.0.0 and :: listen on every address, so they overlap
// every host of their port; localhost is the loopback addresses.
func overlap(a, b listener) bool {
	if a.port == 0 || b.port == 0 || a.port != b.port {
		return false
	}
	if wildcard(a.host) || wildcard(b.host) {
		return true
	}
	if strings.EqualFold(a.host, b.host) {
		return true
	}
	ia, ib := hostIP(a.host), hostIP(b.host)
	for _, x := range ia {
		for _, y := range ib {
			if x.Equal(y) {
				return true
			}
		}
	}
	return false
}

// hostIP is the addresses a listener's host names, as far as they are
// known without a resolver: its IP, or localhost's two.
func hostIP(host string) []net.IP {
	if strings.EqualFold(host, "localhost") {
		return []net.IP{net.IPv4(127, 0, 0, 1), net.IPv6loopback}
	}
	if ip := net.ParseIP(host); ip != nil {
		return []net.IP{ip}
	}
	return nil
}

func wildcard(host string) bool {
	if host == "" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsUnspecified()
}
