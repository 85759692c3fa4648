package serve

import (
	"context"
	"crypto/tls"
	"fmt"
	"net"
	"net/http"
	"os"
	"strings"
	"time"

	"github.com/deadspace-fhir/deadspace/api/engine"
	"github.com/deadspace-fhir/deadspace/api/ui"
)

// pages are the auditor's pages on their own listener.
type pages struct {
	ln     net.Listener
	srv    *http.Server
	access *os.File
}

// withOpEvents records gaps and catch-ups for the operations page as well
// as counting them.
func withOpEvents(h engine.Hooks, evs *ui.OpEvents) engine.Hooks {
	gap, catchUp := h.Gap, h.CatchUp
	h.Gap = func() {
		evs.Add("gap in the notifications: a catch-up was requested")
		if gap != nil {
			gap()
		}
	}
	h.CatchUp = func(trigger string) {
		evs.Add("catch-up by search (" + trigger + ")")
		if catchUp != nil {
			catchUp(trigger)
		}
	}
	return h
}

// newPages builds the pages' handler and binds their listener.
func (s *Service) newPages(evs *ui.OpEvents) (*pages, error) {
	cfg := s.cfg.UI
	auth, err := s.pagesAuth()
	if err != nil {
		return nil, err
	}
	f, err := os.OpenFile(s.cfg.accessLogPath(), os.O_CREATE|os.O_APPEND|os.O_WRONLY, 0o600)
	if err != nil {
		return nil, fmt.Errorf("--ui-access-log: %w", err)
	}
	src := ui.NewLive(ui.LiveConfig{
		Engine: s.engine, Outbox: s.store, Window: s.cfg.Derivation.Window, Fall: s.fall, Server: s.up.state, Events: evs,
		Omissions: s.Metrics,
	})
	h, err := ui.NewHandler(ui.HandlerConfig{Source: src, Auth: auth, Access: ui.NewAccessLog(f, s.log), Logger: s.log})
	if err != nil {
		f.Close()
		return nil, err
	}
	ln, err := net.Listen("tcp", cfg.Listen)
	if err != nil {
		f.Close()
		return nil, fmt.Errorf("--ui-listen: %w", err)
	}
	if s.tls != nil {
		ln = tls.NewListener(ln, s.tls)
	}
	return &pages{ln: ln, access: f, srv: &http.Server{
		Handler: h, ReadHeaderTimeout: 10 * time.Second, ReadTimeout: 30 * time.Second,
		WriteTimeout: 60 * time.Second, IdleTimeout: 2 * time.Minute,
	}}, nil
}

func (s *Service) pagesAuth() (ui.Authenticator, error) {
	cfg := s.cfg.UI
	if cfg.UserHeader != "" {
		trusted, err := ui.ParsePrefixes(cfg.TrustedProxies)
		if err != nil {
			return nil, fmt.Errorf("--ui-trusted-proxies: %w", err)
		}
		return ui.ProxyAuth{Header: cfg.UserHeader, Trusted: trusted}, nil
	}
	var client *http.Client
	pool, err := cfg.oidcCAs()
	if err != nil {
		return nil, err
	}
	if pool != nil {
		client = &http.Client{Timeout: 30 * time.Second, Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: pool, MinVersion: tls.VersionTLS12}}}
	}
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	return ui.NewOIDC(ctx, ui.OIDCConfig{
		Issuer: cfg.OIDCIssuer, ClientID: cfg.OIDCClientID, ClientSecret: cfg.OIDCClientSecret,
		RedirectURL: cfg.OIDCRedirectURL, Scopes: strings.Fields(cfg.OIDCScopes), Claim: cfg.OIDCClaim,
		Allowed: splitList(cfg.OIDCAllowed), UserClaim: cfg.OIDCUserClaim, SessionTTL: cfg.SessionTTL,
		SessionKey: []byte(cfg.SessionKey),
		HTTPClient: client, Logger: s.log,
	})
}

// UIAddr is the bound address of the pages, or "" without them.
func (s *Service) UIAddr() string {
	if s.pages == nil {
		return ""
	}
	return s.pages.ln.Addr().String()
}
