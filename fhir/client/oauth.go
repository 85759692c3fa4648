package client

import (
	"context"
	"crypto"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/rsa"
	"crypto/sha512"
	"crypto/x509"
	"encoding/asn1"
	"encoding/base64"
	"encoding/json"
	"encoding/pem"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"math/big"
	"net/http"
	"net/url"
	"os"
	"strconv"
	"strings"
	"sync"
	"time"
)

// SMART Backend Services (HL7 SMART App Launch 2.0.0, "Backend Services" and "Client
// Authentication: Asymmetric") is OAuth 2.0 client credentials (RFC 6749 §4.4) where the client
// proves itself with a signed JWT (RFC 7523 §2.2) instead of a shared secret.
const (
	clientAssertionType = "urn:ietf:params:oauth:client-assertion-type:jwt-bearer"

	// assertionLifetime stays a minute under SMART's ceiling (exp no more than five minutes in
	// the future), so a token server whose clock runs somewhat behind ours still accepts it.
	assertionLifetime = 4 * time.Minute

	// defaultTokenLifetime applies when a token response has no expires_in. RFC 6749 §5.1 only
	// recommends the field; five minutes is the lifetime SMART recommends servers issue.
	defaultTokenLifetime = 5 * time.Minute

	// maxTokenLifetime caps expires_in so a server's huge value cannot overflow a Duration, and
	// so a token is re-fetched at least daily whatever the server says.
	maxTokenLifetime = 24 * time.Hour

	// tokenRequestTimeout bounds one token request. The request runs on behalf of every waiting
	// caller, so it does not end when the caller that started it gives up.
	tokenRequestTimeout = 30 * time.Second

	// failedRefreshPause is how long a still-valid token keeps being used after a failed
	// refresh before the next attempt, so an unreachable token endpoint costs one request per
	// pause rather than one per FHIR call.
	failedRefreshPause = 5 * time.Second

	// invalidateGrace: a 401 for a token fetched this recently came from a request sent with
	// the previous token, so it says nothing about the current one.
	invalidateGrace = 5 * time.Second

	maxTokenResponseBytes = 1 << 20

	// RFC 7518 §3.3: RSA keys for RS* "of size 2048 bits or larger MUST be used".
	minRSABits = 2048
)

// Invalidator is implemented by an [Authorizer] whose credentials the FHIR server may reject
// before their stated expiry (a revoked or rotated access token). A client that gets 401 calls
// Invalidate and retries once, so the retry carries fresh credentials.
type Invalidator interface {
	Invalidate()
}

// BackendConfig configures [NewBackendAuth].
type BackendConfig struct {
	// TokenURL is the authorization server's token endpoint (token_endpoint in
	// .well-known/smart-configuration). It must be https; it is also the assertion's aud.
	TokenURL string
	// ClientID is the registered client_id; it is the assertion's iss and sub.
	ClientID string
	// Scope is the space-separated scope to request, e.g.
	// "system/Observation.rs system/Observation.c system/Provenance.c".
	Scope string
	// Key signs the assertions: an RSA key of at least 2048 bits (RS384) or an ECDSA P-384 key
	// (ES384), the two algorithms SMART requires servers to support. Any crypto.Signer works,
	// so the key may live in an HSM or KMS.
	Key crypto.Signer
	// KeyID is the kid of the matching public key in the JWK Set registered with the server.
	KeyID string
	// HTTPClient defaults to a client with a 30 s timeout. Redirects from the token endpoint
	// are never followed, whatever this client's policy.
	HTTPClient *http.Client
	// Now is the clock for assertion times and token expiry; nil means time.Now.
	Now func() time.Time
	// Logger gets debug records for fetched tokens and warnings for failed refreshes; nil
	// discards them. Tokens and assertions are never logged.
	Logger *slog.Logger
}

// String hides the key: a Signer of value type (ed25519.PrivateKey is a byte slice) would
// otherwise print its key material.
func (c BackendConfig) String() string {
	return fmt.Sprintf("client.BackendConfig{TokenURL:%q, ClientID:%q, KeyID:%q, Key:[redacted]}", c.TokenURL, c.ClientID, c.KeyID)
}

// GoString hides the key from %#v.
func (c BackendConfig) GoString() string { return c.String() }

// LogValue hides the key from slog.
func (c BackendConfig) LogValue() slog.Value {
	return slog.GroupValue(slog.String("token_url", c.TokenURL), slog.String("client_id", c.ClientID), slog.String("kid", c.KeyID))
}

// Validate reports every problem in c at once.
func (c BackendConfig) Validate() error {
	var errs []error
	if c.TokenURL == "" {
		errs = append(errs, errors.New("TokenURL is required"))
	} else if u, err := url.Parse(c.TokenURL); err != nil {
		errs = append(errs, fmt.Errorf("TokenURL: %w", err))
	} else {
		// The request carries a bearer credential's worth of proof; SMART requires TLS.
		if u.Scheme != "https" {
			errs = append(errs, fmt.Errorf("TokenURL scheme must be https, got %q", u.Scheme))
		}
		if u.Host == "" {
			errs = append(errs, errors.New("TokenURL has no host"))
		}
		if u.Fragment != "" {
			errs = append(errs, errors.New("TokenURL must not have a fragment"))
		}
	}
	if c.ClientID == "" {
		errs = append(errs, errors.New("ClientID is required"))
	}
	if c.Scope == "" {
		//lint:ignore ST1005 the message names the Config field
		errs = append(errs, errors.New("Scope is required"))
	}
	if c.KeyID == "" {
		errs = append(errs, errors.New("KeyID is required: SMART servers pick the verification key by kid"))
	}
	if c.Key == nil {
		//lint:ignore ST1005 the message names the Config field
		errs = append(errs, errors.New("Key is required"))
	} else if _, err := signingAlg(c.Key); err != nil {
		errs = append(errs, err)
	}
	return errors.Join(errs...)
}

// BackendAuth is an [Authorizer] that gets access tokens from a SMART Backend Services token
// endpoint and caches them. It is safe for concurrent use.
//
// A cached token is used until less than max(60 s, 10 % of its lifetime) is left (but never
// past half its lifetime); then the next caller fetches a new one while concurrent callers wait
// for that same request. Expiry is measured from when the request was sent, so it errs early.
// If a refresh fails while the old token is still within its lifetime, the old token goes on
// being used and the refresh is retried a few seconds later.
type BackendAuth struct {
	tokenURL string
	clientID string
	scope    string
	keyID    string
	key      crypto.Signer
	alg      string
	hc       *http.Client
	now      func() time.Time
	log      *slog.Logger

	mu        sync.Mutex
	token     string
	fetchedAt time.Time
	refreshAt time.Time
	expiresAt time.Time
	flight    *tokenFlight
}

// tokenFlight is one token request shared by every caller that needed a token while it ran.
type tokenFlight struct {
	done  chan struct{}
	token string
	err   error
	// waiters counts callers that joined; tests use it to know all callers are waiting.
	waiters int
}

var (
	_ Authorizer  = (*BackendAuth)(nil)
	_ Invalidator = (*BackendAuth)(nil)
)

// NewBackendAuth checks cfg and returns an authorizer. It makes no request: the first token
// is fetched by the first Authorize.
func NewBackendAuth(cfg BackendConfig) (*BackendAuth, error) {
	if err := cfg.Validate(); err != nil {
		return nil, fmt.Errorf("client.NewBackendAuth: %w", err)
	}
	alg, _ := signingAlg(cfg.Key)
	hc := &http.Client{Timeout: tokenRequestTimeout}
	if cfg.HTTPClient != nil {
		cp := *cfg.HTTPClient
		hc = &cp
	}
	// A 307/308 would resend the form, assertion included, to wherever the Location points.
	hc.CheckRedirect = func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }
	a := &BackendAuth{
		tokenURL: cfg.TokenURL,
		clientID: cfg.ClientID,
		scope:    cfg.Scope,
		keyID:    cfg.KeyID,
		key:      cfg.Key,
		alg:      alg,
		hc:       hc,
		now:      cfg.Now,
		log:      cfg.Logger,
	}
	if a.now == nil {
		a.now = time.Now
	}
	if a.log == nil {
		a.log = slog.New(slog.DiscardHandler)
	}
	return a, nil
}

// Authorize sets "Authorization: Bearer <access token>", fetching a token first if the cached
// one is missing or due for refresh. It waits at most until req's context ends.
func (a *BackendAuth) Authorize(req *http.Request) error {
	tok, err := a.accessToken(req.Context())
	if err != nil {
		return err
	}
	req.Header.Set("Authorization", "Bearer "+tok)
	return nil
}

// Invalidate drops the cached token so the next Authorize fetches a new one. It is a no-op
// while a refresh is running or for a token fetched within the last few seconds: a burst of
// 401s from requests that all carried the previous token then costs a single token request.
func (a *BackendAuth) Invalidate() {
	a.mu.Lock()
	defer a.mu.Unlock()
	if a.flight != nil || a.token == "" || a.now().Sub(a.fetchedAt) < invalidateGrace {
		return
	}
	a.token = ""
	a.log.Debug("oauth token invalidated", "token_url", a.tokenURL)
}

// String hides the token.
func (a *BackendAuth) String() string {
	return fmt.Sprintf("client.BackendAuth{token_url=%s client_id=%s kid=%s alg=%s token=[redacted]}", a.tokenURL, a.clientID, a.keyID, a.alg)
}

// GoString hides the token from %#v.
func (a *BackendAuth) GoString() string { return a.String() }

// LogValue hides the token from slog.
func (a *BackendAuth) LogValue() slog.Value {
	return slog.GroupValue(slog.String("token_url", a.tokenURL), slog.String("client_id", a.clientID),
		slog.String("kid", a.keyID), slog.String("alg", a.alg))
}

func (a *BackendAuth) accessToken(ctx context.Context) (string, error) {
	a.mu.Lock()
	if a.token != "" && a.now().Before(a.refreshAt) {
		tok := a.token
		a.mu.Unlock()
		return tok, nil
	}
	f := a.flight
	if f == nil {
		f = &tokenFlight{done: make(chan struct{})}
		a.flight = f
		// Detached from ctx: other callers wait on this request too, and one of them giving up
		// must not fail it for the rest.
		go a.refresh(context.WithoutCancel(ctx), f)
	}
	f.waiters++
	a.mu.Unlock()

	select {
	case <-f.done:
		return f.token, f.err
	case <-ctx.Done():
		return "", fmt.Errorf("oauth token from %s: %w", a.tokenURL, ctx.Err())
	}
}

func (a *BackendAuth) refresh(ctx context.Context, f *tokenFlight) {
	ctx, cancel := context.WithTimeout(ctx, tokenRequestTimeout)
	defer cancel()
	sent := a.now()
	tok, lifetime, err := a.fetch(ctx, sent)

	a.mu.Lock()
	switch {
	case err == nil:
		a.token, a.fetchedAt = tok, sent
		a.expiresAt = sent.Add(lifetime)
		a.refreshAt = sent.Add(lifetime - refreshMargin(lifetime))
		f.token = tok
		a.log.DebugContext(ctx, "oauth token fetched", "token_url", a.tokenURL, "lifetime", lifetime)
	case a.token != "" && a.now().Before(a.expiresAt):
		f.token = a.token
		a.refreshAt = a.now().Add(failedRefreshPause)
		if a.refreshAt.After(a.expiresAt) {
			a.refreshAt = a.expiresAt
		}
		a.log.WarnContext(ctx, "oauth token refresh failed; using the current token until it expires",
			"token_url", a.tokenURL, "expires_in", a.expiresAt.Sub(a.now()), "err", err)
	default:
		f.err = err
		a.log.WarnContext(ctx, "oauth token request failed", "token_url", a.tokenURL, "err", err)
	}
	a.flight = nil
	a.mu.Unlock()
	close(f.done)
}

// refreshMargin is how long before expiry a token is replaced: max(60 s, 10 %), but at most
// half the lifetime so a short-lived token is still reused for a while.
func refreshMargin(lifetime time.Duration) time.Duration {
	return min(max(time.Minute, lifetime/10), lifetime/2)
}

// fetch makes one token request (SMART Backend Services "Request access token"): a form POST
// with grant_type, scope, client_assertion_type and client_assertion.
func (a *BackendAuth) fetch(ctx context.Context, now time.Time) (string, time.Duration, error) {
	assertion, err := a.assertion(now)
	if err != nil {
		return "", 0, &TokenError{Err: fmt.Errorf("signing the client assertion: %w", err)}
	}
	form := url.Values{
		"grant_type":            {"client_credentials"},
		"scope":                 {a.scope},
		"client_assertion_type": {clientAssertionType},
		"client_assertion":      {assertion},
	}
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, a.tokenURL, strings.NewReader(form.Encode()))
	if err != nil {
		return "", 0, &TokenError{Err: fmt.Errorf("building the token request: %w", err)}
	}
	req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	req.Header.Set("Accept", "application/json")
	resp, err := a.hc.Do(req)
	if err != nil {
		return "", 0, &TokenError{Err: stripURL(err)}
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(io.LimitReader(resp.Body, maxTokenResponseBytes+1))
	if err != nil {
		return "", 0, &TokenError{Status: resp.StatusCode, Err: fmt.Errorf("reading the token response: %w", err)}
	}
	if len(body) > maxTokenResponseBytes {
		return "", 0, &TokenError{Status: resp.StatusCode, Err: fmt.Errorf("token response exceeds %d bytes", maxTokenResponseBytes)}
	}
	if resp.StatusCode < 200 || resp.StatusCode > 299 {
		return "", 0, parseTokenError(resp.StatusCode, body, assertion)
	}
	tok, lifetime, err := parseTokenResponse(body)
	if err != nil {
		return "", 0, &TokenError{Status: resp.StatusCode, Err: err}
	}
	return tok, lifetime, nil
}

// TokenError is a failed token request. Status is 0 when no response arrived; Code,
// Description and URI are the error, error_description and error_uri of an RFC 6749 §5.2
// error response (invalid_client, invalid_scope, ...). It never contains the client assertion
// or an access token.
type TokenError struct {
	Status      int
	Code        string
	Description string
	URI         string
	// Err is the transport, signing or decoding failure, if that is what went wrong.
	Err error
}

func (e *TokenError) Error() string {
	var b strings.Builder
	b.WriteString("oauth token request: ")
	if e.Status != 0 {
		fmt.Fprintf(&b, "HTTP %d", e.Status)
	} else {
		b.WriteString("no response")
	}
	if e.Code != "" {
		b.WriteString(" ")
		b.WriteString(e.Code)
	}
	if e.Description != "" {
		b.WriteString(": ")
		b.WriteString(e.Description)
	}
	if e.Err != nil {
		b.WriteString(": ")
		b.WriteString(e.Err.Error())
	}
	return b.String()
}

func (e *TokenError) Unwrap() error { return e.Err }

// Temporary reports failures worth retrying later: no response, 429, and 5xx. invalid_client
// and its kind need someone to fix the registration or the key.
func (e *TokenError) Temporary() bool {
	switch {
	case e.Status == 0:
		// A key that cannot sign now will not sign later either.
		return !errors.Is(e.Err, errSigning)
	case e.Status == http.StatusTooManyRequests, e.Status >= 500:
		return true
	}
	return false
}

// errSigning marks failures of the key itself, which retrying does not cure.
var errSigning = errors.New("signing")

// parseTokenError reads an RFC 6749 §5.2 error body. The server's wording is kept short and on
// one line, and any echo of the assertion is cut out before it could reach a log.
func parseTokenError(status int, body []byte, assertion string) *TokenError {
	redact := func(s string) string {
		if assertion != "" {
			s = strings.ReplaceAll(s, assertion, "[redacted]")
		}
		return cleanPrefix([]byte(s), 300)
	}
	e := &TokenError{Status: status}
	var r struct {
		Error       string `json:"error"`
		Description string `json:"error_description"`
		URI         string `json:"error_uri"`
	}
	if json.Unmarshal(body, &r) == nil && r.Error != "" {
		e.Code = redact(r.Error)
		e.Description = redact(r.Description)
		e.URI = redact(r.URI)
		return e
	}
	if p := redact(string(body)); p != "" {
		e.Err = fmt.Errorf("unexpected response body: %s", p)
	}
	return e
}

// parseTokenResponse reads an RFC 6749 §5.1 success body.
func parseTokenResponse(body []byte) (token string, lifetime time.Duration, err error) {
	var r struct {
		AccessToken string          `json:"access_token"`
		TokenType   string          `json:"token_type"`
		ExpiresIn   json.RawMessage `json:"expires_in"`
	}
	if err := json.Unmarshal(body, &r); err != nil {
		return "", 0, fmt.Errorf("decoding the token response: %w", err)
	}
	if r.AccessToken == "" {
		return "", 0, errors.New("token response has no access_token")
	}
	// The token goes into a header: RFC 6750 §2.1 b64token characters are all visible ASCII.
	for i := 0; i < len(r.AccessToken); i++ {
		if c := r.AccessToken[i]; c <= ' ' || c >= 0x7f {
			return "", 0, errors.New("access_token contains characters not allowed in an Authorization header")
		}
	}
	// RFC 6749 §7.1: the type says how to use the token. A missing type is read as bearer,
	// which is what every SMART server issues; anything else (DPoP, mac) needs more than a
	// header this client knows how to send.
	if r.TokenType != "" && !strings.EqualFold(r.TokenType, "bearer") {
		return "", 0, fmt.Errorf("token_type %q is not bearer", cleanPrefix([]byte(r.TokenType), 40))
	}
	lifetime, err = parseExpiresIn(r.ExpiresIn)
	if err != nil {
		return "", 0, err
	}
	return r.AccessToken, lifetime, nil
}

// parseExpiresIn takes a JSON number of seconds, or the same as a string, which some servers
// send.
func parseExpiresIn(raw json.RawMessage) (time.Duration, error) {
	s := strings.TrimSpace(string(raw))
	if s == "" || s == "null" {
		return defaultTokenLifetime, nil
	}
	if strings.HasPrefix(s, `"`) {
		if err := json.Unmarshal(raw, &s); err != nil {
			return 0, fmt.Errorf("expires_in: %w", err)
		}
	}
	v, err := strconv.ParseFloat(strings.TrimSpace(s), 64)
	if err != nil || math.IsNaN(v) || math.IsInf(v, 0) {
		return 0, fmt.Errorf("expires_in %q is not a number", cleanPrefix([]byte(s), 40))
	}
	if v <= 0 {
		return 0, fmt.Errorf("expires_in %v is not positive", v)
	}
	if v >= maxTokenLifetime.Seconds() {
		return maxTokenLifetime, nil
	}
	return time.Duration(v * float64(time.Second)), nil
}

// assertion builds the signed JWT (RFC 7519, compact JWS per RFC 7515 §7.1) with the header
// and claims SMART lists: alg, kid, typ; iss, sub, aud, exp, jti. It leaves out iat and nbf,
// which SMART does not ask for and which only add ways for a skewed clock to fail the request.
func (a *BackendAuth) assertion(now time.Time) (string, error) {
	header, err := json.Marshal(struct {
		Alg string `json:"alg"`
		Kid string `json:"kid"`
		Typ string `json:"typ"`
	}{a.alg, a.keyID, "JWT"})
	if err != nil {
		return "", fmt.Errorf("encoding the JWT header: %w", err)
	}
	claims, err := json.Marshal(struct {
		Iss string `json:"iss"`
		Sub string `json:"sub"`
		Aud string `json:"aud"`
		Exp int64  `json:"exp"`
		Jti string `json:"jti"`
	}{
		Iss: a.clientID,
		Sub: a.clientID,
		Aud: a.tokenURL,
		// Truncating to whole seconds keeps exp at or below now+assertionLifetime.
		Exp: now.Add(assertionLifetime).Unix(),
		// 128 random bits: the server rejects a jti it has seen, so it must never repeat.
		Jti: rand.Text(),
	})
	if err != nil {
		return "", fmt.Errorf("encoding the JWT claims: %w", err)
	}
	enc := base64.RawURLEncoding
	input := enc.EncodeToString(header) + "." + enc.EncodeToString(claims)
	sig, err := jwsSign(a.key, a.alg, []byte(input))
	if err != nil {
		return "", err
	}
	return input + "." + enc.EncodeToString(sig), nil
}

// signingAlg picks the JWS alg for key, refusing keys SMART servers need not accept.
func signingAlg(key crypto.Signer) (string, error) {
	switch pub := key.Public().(type) {
	case *rsa.PublicKey:
		if n := pub.N.BitLen(); n < minRSABits {
			return "", fmt.Errorf("RSA key has %d bits; RS384 needs at least %d", n, minRSABits)
		}
		return "RS384", nil
	case *ecdsa.PublicKey:
		if pub.Curve != elliptic.P384() {
			return "", fmt.Errorf("ECDSA key is on %s; ES384 needs P-384", pub.Curve.Params().Name)
		}
		return "ES384", nil
	default:
		return "", fmt.Errorf("unsupported key type %T: SMART Backend Services signs with RS384 (RSA) or ES384 (ECDSA P-384)", pub)
	}
}

// jwsSign signs input with SHA-384. RS384 is RSASSA-PKCS1-v1_5 (RFC 7518 §3.3), which is what
// an RSA crypto.Signer does when given a crypto.Hash. ES384 must be R||S, each left-padded to
// 48 bytes (RFC 7518 §3.4), whereas crypto.Signer gives ASN.1 DER.
func jwsSign(key crypto.Signer, alg string, input []byte) ([]byte, error) {
	digest := sha512.Sum384(input)
	sig, err := key.Sign(rand.Reader, digest[:], crypto.SHA384)
	if err != nil {
		return nil, fmt.Errorf("%w with %s: %w", errSigning, alg, err)
	}
	if alg != "ES384" {
		return sig, nil
	}
	raw, err := ecdsaDERToRaw(sig, 48)
	if err != nil {
		return nil, fmt.Errorf("%w with %s: %w", errSigning, alg, err)
	}
	return raw, nil
}

// ecdsaDERToRaw turns an ASN.1 ECDSA-Sig-Value (SEQUENCE { r INTEGER, s INTEGER }) into the
// fixed-width R||S form.
func ecdsaDERToRaw(der []byte, size int) ([]byte, error) {
	var v struct{ R, S *big.Int }
	rest, err := asn1.Unmarshal(der, &v)
	if err != nil {
		return nil, fmt.Errorf("decoding the ECDSA signature: %w", err)
	}
	if len(rest) != 0 {
		return nil, errors.New("trailing bytes after the ECDSA signature")
	}
	if v.R.Sign() <= 0 || v.S.Sign() <= 0 || v.R.BitLen() > size*8 || v.S.BitLen() > size*8 {
		return nil, errors.New("ECDSA signature values out of range")
	}
	out := make([]byte, 2*size)
	v.R.FillBytes(out[:size])
	v.S.FillBytes(out[size:])
	return out, nil
}

// LoadPrivateKeyPEM reads a private key from a PEM file: PKCS#8 ("PRIVATE KEY"), SEC 1
// ("EC PRIVATE KEY", with or without the "EC PARAMETERS" block openssl ecparam writes before
// it) or PKCS#1 ("RSA PRIVATE KEY"). Encrypted keys are refused: a service has nowhere safe to
// keep the passphrase that is not also a fine place for the key itself.
func LoadPrivateKeyPEM(path string) (crypto.Signer, error) {
	data, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("client.LoadPrivateKeyPEM: %w", err)
	}
	k, err := parsePrivateKeyPEM(data)
	if err != nil {
		return nil, fmt.Errorf("client.LoadPrivateKeyPEM %s: %w", path, err)
	}
	return k, nil
}

func parsePrivateKeyPEM(data []byte) (crypto.Signer, error) {
	var (
		key    crypto.Signer
		others []string
	)
	for rest := data; ; {
		var b *pem.Block
		b, rest = pem.Decode(rest)
		if b == nil {
			break
		}
		if strings.Contains(b.Headers["Proc-Type"], "ENCRYPTED") || b.Type == "ENCRYPTED PRIVATE KEY" {
			return nil, errors.New("encrypted private keys are not supported")
		}
		var (
			k   crypto.Signer
			err error
		)
		switch b.Type {
		case "PRIVATE KEY":
			var anyKey any
			anyKey, err = x509.ParsePKCS8PrivateKey(b.Bytes)
			if err == nil {
				var ok bool
				if k, ok = anyKey.(crypto.Signer); !ok {
					err = fmt.Errorf("PKCS#8 key of type %T cannot sign", anyKey)
				}
			}
		case "EC PRIVATE KEY":
			k, err = x509.ParseECPrivateKey(b.Bytes)
		case "RSA PRIVATE KEY":
			k, err = x509.ParsePKCS1PrivateKey(b.Bytes)
		default:
			others = append(others, b.Type)
			continue
		}
		if err != nil {
			return nil, fmt.Errorf("parsing %q block: %w", b.Type, err)
		}
		if key != nil {
			// Two keys in one file is a mistake; picking one silently could sign with the wrong
			// key and fail at the server with an unhelpful invalid_client.
			return nil, errors.New("more than one private key in the file")
		}
		key = k
	}
	if key == nil {
		if len(others) > 0 {
			return nil, fmt.Errorf("no private key block (found %s)", strings.Join(others, ", "))
		}
		return nil, errors.New("no PEM data")
	}
	return key, nil
}
