package serve

import (
	"context"
	"crypto/tls"
	"encoding/json"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"net/url"
	"path/filepath"
	"strings"
	"sync"
	"time"

	"google.golang.org/grpc/credentials"

	"github.com/deadspace-fhir/deadspace/api/deadletters"
	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/grpcapi"
	"github.com/deadspace-fhir/deadspace/api/logredact"
	"github.com/deadspace-fhir/deadspace/api/metrics"
	"github.com/deadspace-fhir/deadspace/api/store"
	"github.com/deadspace-fhir/deadspace/api/store/boltstore"
	"github.com/deadspace-fhir/deadspace/api/store/pgstore"
	"github.com/deadspace-fhir/deadspace/api/ui"
	"github.com/deadspace-fhir/deadspace/api/webhook"
	"github.com/deadspace-fhir/deadspace/derive"
	"github.com/deadspace-fhir/deadspace/fhir/client"
	"github.com/deadspace-fhir/deadspace/fhir/decode"
	"github.com/deadspace-fhir/deadspace/fhir/encode"
	"github.com/deadspace-fhir/deadspace/fhir/notify"
)

// Service is a running deadspace serve.
type Service struct {
	cfg    Config
	log    *slog.Logger
	engine *engine.Engine
	store  serviceStore
	http   *http.Server
	ln     net.Listener
	client *client.Client
	// Metrics is the service's Prometheus registry and instruments.
	Metrics *metrics.Metrics
	grpc    *grpcapi.Server
	grpcLn  net.Listener
	// tls serves HTTP and the pages; nil without TLS.
	tls *tls.Config
	// grpcTLS serves gRPC, requiring client certificates with
	// --grpc-client-ca; nil without TLS.
	grpcTLS *tls.Config
	up      upstream
	// codeSystem is the project's CodeSystem resource, published once at
	// start so consumers can resolve the derived codes.
	codeSystem []byte
	pages      *pages
	// fall is the fall detector's configuration, for the pages.
	fall derive.FallConfig
}

// upstream tracks whether the FHIR server is answering, from every request
// the client makes. It is the one tracker of the server's health: /readyz,
// gRPC health, the deadspace_fhir_server_up gauge and the pages'
// operations view all read it.
type upstream struct {
	mu          sync.Mutex
	lastOK      time.Time
	failedSince time.Time // zero while the last request succeeded
}

func (u *upstream) observe(_ string, status int, _ time.Duration) {
	u.mu.Lock()
	defer u.mu.Unlock()
	now := time.Now()
	if status == 0 || status >= 500 || status == http.StatusTooManyRequests || status == http.StatusUnauthorized || status == http.StatusForbidden {
		if u.failedSince.IsZero() {
			u.failedSince = now
		}
		return
	}
	u.lastOK = now
	u.failedSince = time.Time{}
}

func (u *upstream) state() (lastOK, failedSince time.Time) {
	u.mu.Lock()
	defer u.mu.Unlock()
	return u.lastOK, u.failedSince
}

// answering reports whether the server has answered and its last request
// did not fail.
func (u *upstream) answering() bool {
	lastOK, failedSince := u.state()
	return !lastOK.IsZero() && failedSince.IsZero()
}

// problem is readiness's view of the server: "" when it answers or has
// failed for less than grace.
func (u *upstream) problem(now time.Time, grace time.Duration) string {
	lastOK, failedSince := u.state()
	switch {
	case lastOK.IsZero():
		return "FHIR server has not answered yet"
	case !failedSince.IsZero() && now.Sub(failedSince) >= grace:
		return "FHIR server is not answering"
	}
	return ""
}

// New opens the store, builds the engine and binds the HTTP listener, so
// that a bad address or a locked store fails here, before anything runs.
// cfg must have passed Validate.
func New(cfg Config, version string, log *slog.Logger) (*Service, error) {
	opts, err := cfg.Derivation.Resolve(version)
	if err != nil {
		return nil, err
	}
	enc, err := encode.New(opts.Encode)
	if err != nil {
		return nil, err
	}
	table := opts.Decode.Table
	// An absolute reference to this server is the same resource as the
	// relative one (fhir/ref's Key): one patient, one key in the store.
	opts.Decode.Base = cfg.FHIRBase
	s := &Service{cfg: cfg, log: log, Metrics: metrics.New(version), fall: opts.Derive.Fall}
	if s.codeSystem, err = enc.CodeSystem(); err != nil {
		return nil, err
	}
	if cfg.FHIRBase != "" {
		s.client, err = FHIRClient(cfg, version, log, s.observeFHIR)
		if err != nil {
			return nil, err
		}
	}
	// Files before the store: a bad one leaves nothing created.
	var tlsErrs []error
	if s.tls, s.grpcTLS, tlsErrs = cfg.serverTLS(); len(tlsErrs) > 0 {
		return nil, errors.Join(tlsErrs...)
	}
	s.store, err = openStore(cfg)
	if err != nil {
		return nil, err
	}
	search := table.SearchTokens()
	opEvents := ui.NewOpEvents(0)
	e, err := engine.New(engine.Config{
		Store: s.store, Decoder: decode.New(opts.Decode), Encoder: enc,
		Derive: opts.Derive, Client: s.client, Settle: cfg.Settle, DevicePace: cfg.DevicePace, Retention: cfg.Retention,
		PollInterval: cfg.PollInterval, HeartbeatTimeout: cfg.Heartbeat, GapGrace: cfg.GapGrace, FetchBudget: cfg.FetchBudget, SearchCodes: search, Logger: log,
		Hooks: withOpEvents(s.Metrics.EngineHooks(), opEvents), MaxTransactionEntries: cfg.MaxTxEntries,
		JobLease: cfg.JobLease, OwnerGrace: cfg.OwnerGrace, Register: s.registerHook(),
	})
	if err != nil {
		s.store.Close()
		return nil, err
	}
	s.engine = e
	s.Metrics.SetStats(s.store.Stats)
	if c, ok := s.store.(store.Committer); ok {
		s.Metrics.SetCommits(c.CommitStats)
	}
	if s.client != nil {
		s.Metrics.SetFHIRServer(s.up.answering)
	}
	hook, err := webhook.New(webhook.Config{
		Sink: sink{e}, Secret: cfg.WebhookSecret, Header: cfg.WebhookHeader, MaxBodyBytes: cfg.MaxBodyBytes, Logger: log,
	})
	if err != nil {
		s.store.Close()
		return nil, err
	}
	mux := http.NewServeMux()
	instrumented := s.Metrics.InstrumentWebhook(limitConcurrency(hook, cfg.MaxConcurrent))
	mux.Handle("/notify", instrumented)
	mux.Handle("/notify/", instrumented)
	mux.Handle("GET /metrics", s.Metrics.Handler())
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "text/plain; charset=utf-8")
		fmt.Fprintln(w, "ok")
	})
	mux.HandleFunc("GET /readyz", s.ready)
	s.ln, err = net.Listen("tcp", cfg.Listen)
	if err != nil {
		s.store.Close()
		return nil, fmt.Errorf("--listen: %w", err)
	}
	if s.tls != nil {
		s.ln = tls.NewListener(s.ln, s.tls)
	}
	if cfg.GRPCListen != "" {
		s.grpc = grpcapi.New(grpcapi.Config{Engine: e, Logger: log, DeadLetters: s.store, Watchers: func(delta int) {
			if delta > 0 {
				s.Metrics.IncWatchSubscribers()
			} else {
				s.Metrics.DecWatchSubscribers()
			}
		}})
		s.grpcLn, err = net.Listen("tcp", cfg.GRPCListen)
		if err != nil {
			s.ln.Close()
			s.store.Close()
			return nil, fmt.Errorf("--grpc-listen: %w", err)
		}
	}
	if cfg.UI.Listen != "" {
		s.pages, err = s.newPages(opEvents)
		if err != nil {
			if s.grpcLn != nil {
				s.grpcLn.Close()
			}
			s.ln.Close()
			s.store.Close()
			return nil, err
		}
	}
	s.http = &http.Server{
		Handler:           mux,
		ReadHeaderTimeout: 10 * time.Second,
		ReadTimeout:       30 * time.Second,
		WriteTimeout:      60 * time.Second,
		IdleTimeout:       2 * time.Minute,
		ErrorLog:          slog.NewLogLogger(log.Handler(), slog.LevelWarn),
	}
	return s, nil
}

// FHIRClient builds the client of the FHIR server the settings name, with
// a static bearer token or SMART Backend Services credentials (or none).
// cfg must have passed Validate or ValidateFHIR.
func FHIRClient(cfg Config, version string, log *slog.Logger, observe client.Observer) (*client.Client, error) {
	var auth client.Authorizer
	switch {
	case cfg.FHIRTokenURL != "":
		key, err := cfg.fhirKey()
		if err != nil {
			return nil, err
		}
		ba, err := client.NewBackendAuth(client.BackendConfig{
			TokenURL: cfg.FHIRTokenURL, ClientID: cfg.FHIRClientID, Scope: cfg.FHIRScope,
			Key: key, KeyID: cfg.FHIRKeyID, Logger: log,
		})
		if err != nil {
			return nil, err
		}
		auth = ba
	case cfg.FHIRTokenFile != "":
		// Read again whenever the server refuses the token (401), so a
		// renewed file needs no restart.
		tf, err := client.NewTokenFile(cfg.FHIRTokenFile, log)
		if err != nil {
			return nil, fmt.Errorf("--fhir-token-file: %w", err)
		}
		auth = tf
	case cfg.FHIRToken != "":
		auth = client.BearerToken(cfg.FHIRToken)
	}
	return client.New(client.Config{
		BaseURL: cfg.FHIRBase, Auth: auth, UserAgent: "deadspace/" + version, Logger: log, Observer: observe,
	})
}

// publishCodeSystem creates the project's CodeSystem on the FHIR server
// unless one with its url exists (a conditional create, so restarts and
// several instances leave one). It runs beside the service, never before
// it: the webhook answers at once after a restart even while the FHIR
// server is slow or down. A transient failure (no answer, 429, 5xx) is
// tried again with a growing pause until ctx ends; a refusal is logged and
// left (derived values are still right without it, and some servers refuse
// terminology writes).
func (s *Service) publishCodeSystem(ctx context.Context) {
	if s.client == nil {
		return
	}
	var cs struct{ URL, Version string }
	if err := json.Unmarshal(s.codeSystem, &cs); err != nil {
		s.log.ErrorContext(ctx, "the CodeSystem resource does not decode", "err", err)
		return
	}
	q := url.Values{"url": {cs.URL}, "version": {cs.Version}}
	pause := time.Second
	for {
		attempt, cancel := context.WithTimeout(ctx, 30*time.Second)
		err := s.ensureCodeSystem(attempt, q)
		cancel()
		if err == nil || ctx.Err() != nil {
			return
		}
		var fhirErr *client.Error
		if errors.As(err, &fhirErr) && !fhirErr.Retryable {
			s.log.WarnContext(ctx, "the FHIR server refused the CodeSystem of the derived codes; consumers cannot resolve the codes on this server", "err", err)
			return
		}
		s.log.WarnContext(ctx, "publishing the CodeSystem of the derived codes failed; trying again", "err", err, "pause", pause)
		select {
		case <-ctx.Done():
			return
		case <-time.After(pause):
		}
		pause = min(2*pause, 5*time.Minute)
	}
}

// ensureCodeSystem creates the CodeSystem conditionally on its url and
// version, and makes sure what the server answered is it: a server that
// ignores url or version in conditions answers 200 with any one
// CodeSystem it holds, or 412 when it holds several. Then a search by url
// and version, kept to the CodeSystems that really carry both, finds it,
// or it is created without a condition (a restart finds it by the same
// search).
func (s *Service) ensureCodeSystem(ctx context.Context, q url.Values) error {
	body, meta, err := s.client.ConditionalCreate(ctx, "CodeSystem", s.codeSystem, q)
	switch {
	case errors.Is(err, client.ErrPreconditionFailed):
	case err != nil:
		return err
	case meta.Status != http.StatusOK:
		return nil // created
	default:
		if !isCodeSystem(body) && meta.ID != "" {
			if body, _, err = s.client.Read(ctx, "CodeSystem", meta.ID); err != nil {
				return err
			}
		}
		if carriesURLVersion(body, q.Get("url"), q.Get("version")) {
			return nil
		}
	}
	found := false
	err = s.client.Search(ctx, "CodeSystem", q, func(entry json.RawMessage) error {
		var en struct{ Resource json.RawMessage }
		if json.Unmarshal(entry, &en) == nil && carriesURLVersion(en.Resource, q.Get("url"), q.Get("version")) {
			found = true
		}
		return nil
	})
	if err != nil || found {
		return err
	}
	s.log.WarnContext(ctx, "the FHIR server seems to ignore url or version in a CodeSystem's conditional create; creating the CodeSystem of the derived codes without a condition")
	_, _, err = s.client.Create(ctx, "CodeSystem", s.codeSystem)
	return err
}

func isCodeSystem(body []byte) bool {
	var m struct {
		ResourceType string `json:"resourceType"`
	}
	return json.Unmarshal(body, &m) == nil && m.ResourceType == "CodeSystem"
}

// carriesURLVersion reports whether body is a CodeSystem with this url
// and version.
func carriesURLVersion(body []byte, u, version string) bool {
	var m struct {
		ResourceType, URL, Version string
	}
	return json.Unmarshal(body, &m) == nil && m.ResourceType == "CodeSystem" && m.URL == u && m.Version == version
}

// storeOpenTimeout bounds connecting to PostgreSQL and migrating its
// schema at start, waits for other replicas' migrations included.
const storeOpenTimeout = time.Minute

// serviceStore is what the service needs of its store: the state, and the
// operator's dead-letter calls, which every store the service can open
// serves (the compiler checks it here, so the gRPC dead-letter calls never
// answer UNIMPLEMENTED for want of them).
type serviceStore interface {
	store.Store
	deadletters.Source
}

// openStore opens the embedded store in --data-dir, or PostgreSQL when
// --store names a database.
func openStore(cfg Config) (serviceStore, error) {
	if cfg.Store == "" {
		bs, err := boltstore.Open(filepath.Join(cfg.DataDir, "deadspace.db"), boltstore.Options{})
		if err != nil {
			return nil, err
		}
		return bs, nil
	}
	ctx, cancel := context.WithTimeout(context.Background(), storeOpenTimeout)
	defer cancel()
	ps, err := pgstore.Open(ctx, cfg.Store, pgstore.Options{WriteLease: cfg.StoreLease})
	if err != nil {
		return nil, fmt.Errorf("--store: %w", err)
	}
	return ps, nil
}

// observeFHIR feeds every FHIR request to the metrics and to readiness.
func (s *Service) observeFHIR(op string, status int, dur time.Duration) {
	s.up.observe(op, status, dur)
	if o := s.Metrics.ClientObserver(); o != nil {
		o(op, status, dur)
	}
}

// FHIRServerAnswered reports whether the FHIR server has answered any
// request since start, from the service's one tracker.
func (s *Service) FHIRServerAnswered() bool {
	lastOK, _ := s.up.state()
	return !lastOK.IsZero()
}

// Addr is the bound HTTP address.
func (s *Service) Addr() string { return s.ln.Addr().String() }

// GRPCAddr is the bound gRPC address, or "" without gRPC.
func (s *Service) GRPCAddr() string {
	if s.grpcLn == nil {
		return ""
	}
	return s.grpcLn.Addr().String()
}

// grpcCredentials are TLS, with client certificates required when a client
// CA is configured, or nil for plaintext on a loopback address.
func (s *Service) grpcCredentials() credentials.TransportCredentials {
	if s.grpcTLS == nil {
		return nil
	}
	return credentials.NewTLS(s.grpcTLS)
}

// Engine is the service's engine, for the gRPC API and tests.
func (s *Service) Engine() *engine.Engine { return s.engine }

// Run serves until ctx is done, then stops taking input, lets in-flight
// requests finish, stops the engine and closes the store.
func (s *Service) Run(ctx context.Context) error {
	engineCtx, stopEngine := context.WithCancel(context.WithoutCancel(ctx))
	var wg sync.WaitGroup
	wg.Add(2)
	go func() {
		defer wg.Done()
		_ = s.engine.Run(engineCtx)
	}()
	go func() {
		defer wg.Done()
		s.publishCodeSystem(engineCtx)
	}()
	serveErr := make(chan error, 3)
	go func() { serveErr <- s.http.Serve(s.ln) }()
	if s.pages != nil {
		go func() { serveErr <- fmt.Errorf("pages: %w", s.pages.srv.Serve(s.pages.ln)) }()
	}
	grpcCtx, stopGRPC := context.WithCancel(context.WithoutCancel(ctx))
	defer stopGRPC()
	var grpcDone chan struct{}
	if s.grpc != nil {
		creds := s.grpcCredentials()
		grpcDone = make(chan struct{})
		go s.followReadiness(grpcCtx)
		go func() {
			defer close(grpcDone)
			if err := s.grpc.Serve(grpcCtx, s.grpcLn, creds); err != nil {
				serveErr <- fmt.Errorf("gRPC: %w", err)
			}
		}()
	}
	s.log.InfoContext(ctx, "serving", "addr", s.Addr(), "grpc", s.GRPCAddr(), "ui", s.UIAddr(), "tls", s.tls != nil, "standalone", s.engine.Standalone())

	var err error
	select {
	case <-ctx.Done():
	case err = <-serveErr:
	}
	shutdownCtx, cancel := context.WithTimeout(context.Background(), 15*time.Second)
	defer cancel()
	if serr := s.http.Shutdown(shutdownCtx); serr != nil && err == nil {
		err = serr
	}
	if s.pages != nil {
		if serr := s.pages.srv.Shutdown(shutdownCtx); serr != nil && err == nil {
			err = serr
		}
		if cerr := s.pages.access.Close(); cerr != nil && err == nil {
			err = cerr
		}
	}
	stopGRPC()
	if grpcDone != nil {
		<-grpcDone
	}
	stopEngine()
	wg.Wait()
	if cerr := s.store.Close(); cerr != nil && err == nil {
		err = cerr
	}
	if errors.Is(err, http.ErrServerClosed) {
		err = nil
	}
	s.log.Info("stopped")
	return err
}

// readiness lists what keeps the service from being ready: the store does
// not answer, the FHIR server (when one is configured) has not answered or
// has been failing for longer than the ready grace, the outbox has been
// stuck for five minutes, or the writer stopped (the software Device cannot
// be resolved on the server). /readyz and gRPC health both use it.
func (s *Service) readiness(ctx context.Context) (engine.Health, []string) {
	h, err := s.engine.Health(ctx)
	var problems []string
	if err != nil {
		problems = append(problems, "store: "+err.Error())
	} else if err := s.engine.StoreWrites(ctx); err != nil {
		// A store that reads but cannot write would refuse every input.
		problems = append(problems, "store: "+err.Error())
	}
	now := time.Now()
	if !s.engine.Standalone() {
		if p := s.up.problem(now, s.cfg.ReadyGrace); p != "" {
			problems = append(problems, p)
		}
		if !h.OutboxBlockedSince.IsZero() && now.Sub(h.OutboxBlockedSince) > 5*time.Minute {
			problems = append(problems, "outbox is not draining")
		}
		if h.WritesStopped != "" {
			// Not transient: the server's answers leave the writer nothing
			// to cite, so this is said at once. The text carries the
			// server's wording, identifiers removed.
			problems = append(problems, "writes stopped: "+logredact.Text(h.WritesStopped))
		}
	}
	return h, problems
}

// ready answers 200 when [Service.readiness] finds no problem.
func (s *Service) ready(w http.ResponseWriter, r *http.Request) {
	h, problems := s.readiness(r.Context())
	s.setGRPCHealth(problems)
	w.Header().Set("Content-Type", "application/json")
	status := http.StatusOK
	if len(problems) > 0 {
		status = http.StatusServiceUnavailable
	}
	w.WriteHeader(status)
	_ = json.NewEncoder(w).Encode(map[string]any{
		"ready": len(problems) == 0, "problems": problems,
		"outboxDepth": h.Stats.OutboxDepth, "deadLetters": h.Stats.DeadLetters, "pendingPatients": h.Stats.DirtyPatients,
	})
}

// grpcHealthEvery is how often gRPC health is brought up to date with
// readiness between /readyz requests.
const grpcHealthEvery = 5 * time.Second

// setGRPCHealth makes gRPC health say what /readyz says.
func (s *Service) setGRPCHealth(problems []string) {
	if s.grpc != nil {
		s.grpc.SetServing(len(problems) == 0)
	}
}

// followReadiness keeps gRPC health in step with readiness until ctx ends.
func (s *Service) followReadiness(ctx context.Context) {
	t := time.NewTicker(grpcHealthEvery)
	defer t.Stop()
	for {
		_, problems := s.readiness(ctx)
		if ctx.Err() != nil {
			return
		}
		s.setGRPCHealth(problems)
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
	}
}

// sink adapts the engine to the webhook.
type sink struct{ e *engine.Engine }

func (k sink) Resources(ctx context.Context, src webhook.Source, resources []json.RawMessage) (webhook.Receipt, error) {
	r, err := k.e.Ingest(ctx, src.Mode, resources)
	return receipt(r), forWebhook(err)
}

func (k sink) Fetch(ctx context.Context, src webhook.Source, refs []string) error {
	_, err := k.e.Fetch(ctx, refs)
	return forWebhook(err)
}

func (k sink) Status(ctx context.Context, src webhook.Source, n notify.Notification) error {
	return forWebhook(k.e.Notified(ctx, n))
}

func (k sink) Notification(ctx context.Context, src webhook.Source, resources []json.RawMessage, n notify.Notification) (webhook.Receipt, error) {
	r, err := k.e.IngestNotified(ctx, src.Mode, resources, n)
	return receipt(r), forWebhook(err)
}

func (k sink) Changed(ctx context.Context, src webhook.Source) error {
	k.e.RequestCatchUp("rest-hook")
	return nil
}

func (k sink) Deleted(ctx context.Context, src webhook.Source, deleted []webhook.Deletion) error {
	ds := make([]engine.Deletion, len(deleted))
	for i, d := range deleted {
		ds[i] = engine.Deletion{Ref: d.Ref, At: d.At, How: "a Bundle sent to the webhook (" + src.Mode + ") has a DELETE entry for it"}
	}
	_, err := k.e.Deleted(ctx, ds)
	return forWebhook(err)
}

func receipt(r engine.Receipt) webhook.Receipt {
	out := webhook.Receipt{Accepted: r.Accepted}
	for _, x := range r.Rejected {
		out.Rejected = append(out.Rejected, webhook.Rejection{Index: x.Index, Reason: string(x.Reason), Detail: x.Detail})
	}
	return out
}

// forWebhook says an engine error in the webhook's terms: input the
// engine refuses is the sender's fault (400), and a read deferred for the
// fetch budget asks the sender to deliver again after its wait (503 with
// Retry-After).
func forWebhook(err error) error {
	var deferred *engine.ReadDeferred
	switch {
	case errors.Is(err, engine.ErrInvalid):
		return fmt.Errorf("%w: %w", webhook.ErrInvalid, err)
	case errors.As(err, &deferred):
		return &webhook.RetryLater{After: deferred.RetryAfter, Err: err}
	}
	return err
}

// registerHook is what the engine runs to register the Subscription, when
// --register-subscription asks for it: the engine runs it on the replica
// that polls, each time a replica takes polling over (once at start with
// the embedded store), so replicas starting together register it once and
// a replica taking over from a dead one checks it is still active.
func (s *Service) registerHook() func(context.Context) error {
	if !s.cfg.Register {
		return nil
	}
	return s.register
}

// register creates the rest-hook Subscription on the FHIR server, or finds
// the one this service created before (same endpoint) and re-activates it.
func (s *Service) register(ctx context.Context) error {
	endpoint := strings.TrimRight(s.cfg.PublicURL, "/") + "/notify"
	criteria := "Observation?code=" + strings.Join(s.searchCodes(), ",")
	header := s.cfg.WebhookHeader + ": " + s.cfg.WebhookSecret
	if s.cfg.WebhookHeader == "Authorization" {
		header = "Authorization: Bearer " + s.cfg.WebhookSecret
	}
	var existing []json.RawMessage
	err := s.client.Search(ctx, "Subscription", map[string][]string{"url": {endpoint}}, func(entry json.RawMessage) error {
		var en struct {
			Resource json.RawMessage `json:"resource"`
		}
		if json.Unmarshal(entry, &en) == nil && len(en.Resource) > 0 {
			existing = append(existing, en.Resource)
		}
		return nil
	})
	if err != nil {
		return fmt.Errorf("register: search: %w", err)
	}
	sub := map[string]any{
		"resourceType": "Subscription", "status": "requested",
		"reason":   "deadspace: derive dead-space values from blood gases and ventilator readings",
		"criteria": criteria,
		"channel": map[string]any{
			"type": "rest-hook", "endpoint": endpoint, "payload": "application/fhir+json", "header": []string{header},
		},
	}
	for _, raw := range existing {
		var cur struct {
			ID     string `json:"id"`
			Status string `json:"status"`
		}
		if json.Unmarshal(raw, &cur) != nil || cur.ID == "" {
			continue
		}
		if cur.Status == "active" || cur.Status == "requested" {
			s.log.InfoContext(ctx, "subscription already registered", "status", cur.Status)
			return nil
		}
		sub["id"] = cur.ID
		body, _ := json.Marshal(sub)
		if _, _, err := s.client.Update(ctx, "Subscription", cur.ID, body, ""); err != nil {
			return fmt.Errorf("register: re-activate: %w", err)
		}
		s.log.InfoContext(ctx, "subscription re-activated", "previous_status", cur.Status)
		return nil
	}
	body, _ := json.Marshal(sub)
	if _, _, err := s.client.Create(ctx, "Subscription", body); err != nil {
		return fmt.Errorf("register: create: %w", err)
	}
	s.log.InfoContext(ctx, "subscription registered")
	return nil
}

func (s *Service) searchCodes() []string {
	return s.engine.SearchCodes()
}

// limitConcurrency answers 503 with Retry-After when max requests are
// already in flight, so a flood cannot exhaust memory or file handles; the
// sender retries, and nothing was accepted, so nothing is lost.
func limitConcurrency(h http.Handler, max int) http.Handler {
	if max <= 0 {
		return h
	}
	slots := make(chan struct{}, max)
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		select {
		case slots <- struct{}{}:
			defer func() { <-slots }()
			h.ServeHTTP(w, r)
		default:
			w.Header().Set("Retry-After", "1")
			w.Header().Set("Content-Type", "application/fhir+json")
			w.WriteHeader(http.StatusServiceUnavailable)
			fmt.Fprint(w, `{"resourceType":"OperationOutcome","issue":[{"severity":"error","code":"throttled","diagnostics":"too many requests in flight; retry"}]}`)
		}
	})
}
