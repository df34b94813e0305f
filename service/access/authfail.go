package access

import (
	"context"
	"crypto/tls"
	"crypto/x509"
	"errors"
	"fmt"
	"net"
	"strings"
	"sync"
	"time"
)

// Failed-authentication reasons, values of
// genvelope_access_denied_total{reason} beside the denial reasons.
const (
	ReasonBadPassword        = "bad_password"        // a basic-auth user the web configuration knows, with a wrong password
	ReasonUnknownUser        = "unknown_user"        // a basic-auth user the web configuration does not know
	ReasonNoCredentials      = "no_credentials"      // no basic-auth credentials where users are configured
	ReasonNoCertificate      = "no_certificate"      // no client certificate where one is required
	ReasonBadCertificate     = "bad_certificate"     // a client certificate that does not verify (another CA, wrong use, malformed)
	ReasonExpiredCertificate = "expired_certificate" // a client certificate outside its validity period
	ReasonHandshake          = "tls_handshake"       // another TLS handshake failure (protocol, plaintext on a TLS port, dropped)
)

// AuthFailureReasons lists the failed-authentication reasons.
func AuthFailureReasons() []string {
	return []string{ReasonBadPassword, ReasonUnknownUser, ReasonNoCredentials, ReasonNoCertificate, ReasonBadCertificate, ReasonExpiredCertificate, ReasonHandshake}
}

// ClassifyTLSError tells why a TLS handshake failed, and the subject a
// refused client certificate claimed when the error carries it (the
// verifier's errors for another CA and for an expired certificate do).
func ClassifyTLSError(err error) (reason, claimed string) {
	var ua x509.UnknownAuthorityError
	var ci x509.CertificateInvalidError
	var cv *tls.CertificateVerificationError
	switch {
	case errors.As(err, &ua):
		return ReasonBadCertificate, certName(ua.Cert)
	case errors.As(err, &ci):
		if ci.Reason == x509.Expired {
			return ReasonExpiredCertificate, certName(ci.Cert)
		}
		return ReasonBadCertificate, certName(ci.Cert)
	case errors.As(err, &cv):
		r, _ := ClassifyTLSText(cv.Error())
		if len(cv.UnverifiedCertificates) > 0 {
			return r, certName(cv.UnverifiedCertificates[0])
		}
		return r, ""
	}
	return ClassifyTLSText(err.Error())
}

// ClassifyTLSText classifies a handshake error from its text (what
// net/http logs for a failed TLS handshake).
func ClassifyTLSText(msg string) (reason, claimed string) {
	switch {
	case strings.Contains(msg, "didn't provide a certificate"), strings.Contains(msg, "certificate required"):
		return ReasonNoCertificate, ""
	case strings.Contains(msg, "certificate has expired"):
		return ReasonExpiredCertificate, ""
	case strings.Contains(msg, "x509:"), strings.Contains(msg, "bad certificate"), strings.Contains(msg, "failed to verify certificate"):
		return ReasonBadCertificate, ""
	}
	return ReasonHandshake, ""
}

// CertName is the name a certificate claims (its first CertNames),
// sanitized; "" for none.
func CertName(c *x509.Certificate) string { return certName(c) }

func certName(c *x509.Certificate) string {
	if c == nil {
		return ""
	}
	if names := CertNames(c); len(names) > 0 {
		return Sanitize(names[0], 128)
	}
	return ""
}

// AuthFailure is one failed authentication.
type AuthFailure struct {
	Source  string // network address
	Claimed string // the user or certificate subject claimed, "" when none is known
	Action  string // e.g. "http GET /metrics", "grpc connect"
	Reason  string // one of the failed-authentication reasons
	Detail  string
}

// AuthFailed counts a failed authentication by its reason and audits it,
// through the flood gate (see gate): a source that keeps failing
// writes at most GateBurst entries a minute per reason, then one summary.
func (g *Guard) AuthFailed(ctx context.Context, f AuthFailure) {
	g.denied.WithLabelValues(f.Reason).Inc()
	claimed := Sanitize(f.Claimed, 128)
	id := "anonymous"
	if claimed != "" {
		id = claimed + " (not authenticated)"
	}
	g.gated(ctx, Entry{Time: g.opts.Now(), Identity: id, Source: f.Source, Action: f.Action,
		Target: "", Outcome: OutcomeDenied, Reason: f.Reason, Detail: Sanitize(f.Detail, 256)})
}

// DenyGated counts and audits a refused call through the flood gate
// (for refusals a client repeats by itself, like connections over a
// cap while it reconnects).
func (g *Guard) DenyGated(ctx context.Context, c *Caller, action, reason, detail string) {
	g.denied.WithLabelValues(reason).Inc()
	e := Entry{Time: g.opts.Now(), Action: action, Outcome: OutcomeDenied, Reason: reason, Detail: detail}
	if c != nil {
		e.Identity, e.Source = c.Who(), c.Source
	}
	g.gated(ctx, e)
}

// FlushGate writes the summaries of the flood gate's windows that are
// over at now (the server calls it about once a second, so that a
// summary does not wait for the next failure).
func (g *Guard) FlushGate(ctx context.Context, now time.Time) {
	g.gate.mu.Lock()
	var out []Entry
	if now.Sub(g.gate.lastSweep) >= GateWindow/6 {
		out = g.gate.sweep(now)
	}
	g.gate.mu.Unlock()
	for _, e := range out {
		g.auditor.Audit(ctx, e)
	}
}

func (g *Guard) gated(ctx context.Context, e Entry) {
	for _, out := range g.gate.pass(e) {
		g.auditor.Audit(ctx, out)
	}
}

// The flood gate's bounds.
const (
	GateBurst   = 5           // entries per source and reason in one window
	GateWindow  = time.Minute // the window
	gateSources = 4096        // (source, reason) pairs tracked; more share one slot
)

// gate bounds the audit entries of repeated failures: per source host
// (the address without its port) and reason, the first GateBurst of a
// window are written; the rest are counted, and the count is written as
// one summary entry when the window is over (at the next gated entry,
// or FlushGate, after it). The metric counts every failure.
type gate struct {
	mu        sync.Mutex
	windows   map[gateKey]*gateWindow
	lastSweep time.Time
}

type gateKey struct{ host, reason string }

type gateWindow struct {
	start      time.Time
	n          int
	suppressed int
	last       Entry // the last suppressed entry, the summary's model
}

func hostOnly(addr string) string {
	if h, _, err := net.SplitHostPort(addr); err == nil {
		return h
	}
	return addr
}

// pass returns the entries to write for e: e itself while within the
// burst, the summaries of windows that ended, or nothing.
func (gt *gate) pass(e Entry) []Entry {
	gt.mu.Lock()
	defer gt.mu.Unlock()
	if gt.windows == nil {
		gt.windows = map[gateKey]*gateWindow{}
	}
	var out []Entry
	if e.Time.Sub(gt.lastSweep) >= GateWindow/6 {
		out = gt.sweep(e.Time)
	}
	k := gateKey{hostOnly(e.Source), e.Reason}
	w := gt.windows[k]
	if w == nil {
		if len(gt.windows) >= gateSources {
			k.host = "*"
			w = gt.windows[k]
		}
		if w == nil {
			w = &gateWindow{start: e.Time}
			gt.windows[k] = w
		}
	}
	if e.Time.Sub(w.start) >= GateWindow {
		if s, ok := w.summary(); ok {
			out = append(out, s)
		}
		*w = gateWindow{start: e.Time}
	}
	w.n++
	if w.n <= GateBurst {
		if w.n == GateBurst {
			e.Detail = strings.TrimSpace(e.Detail + fmt.Sprintf(" (%d such failures from %s within %s: further ones are counted and summarised)", GateBurst, hostOnly(e.Source), GateWindow))
		}
		return append(out, e)
	}
	w.suppressed++
	w.last = e
	return out
}

// sweep returns the summaries of windows over at now and forgets them.
func (gt *gate) sweep(now time.Time) []Entry {
	gt.lastSweep = now
	var out []Entry
	for k, w := range gt.windows {
		if now.Sub(w.start) < GateWindow {
			continue
		}
		if s, ok := w.summary(); ok {
			out = append(out, s)
		}
		delete(gt.windows, k)
	}
	return out
}

func (w *gateWindow) summary() (Entry, bool) {
	if w.suppressed == 0 {
		return Entry{}, false
	}
	s := w.last
	s.Detail = fmt.Sprintf("%d more like this from %s between %s and %s, not written one by one (last: %s)",
		w.suppressed, hostOnly(s.Source), w.start.UTC().Format(time.RFC3339), s.Time.UTC().Format(time.RFC3339), s.Detail)
	return s, true
}
