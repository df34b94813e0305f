package access

import (
	"context"
	"crypto/tls"
	"crypto/x509"
	"fmt"
	"log/slog"
	"net/http"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"
)

// Denial reasons, the values of genvelope_access_denied_total{reason}.
const (
	ReasonUnauthenticated = "unauthenticated"   // no identity the access file knows
	ReasonNotGranted      = "not_granted"       // a known identity without the role over the target
	ReasonSampleDenied    = "permission_denied" // samples for units a writer may not push for
	ReasonCrossOrigin     = "cross_origin"      // a browser request from another origin
	ReasonHost            = "host_not_allowed"  // a Host header not among the service's names
	ReasonLimit           = "resource_limit"    // a per-client cap was reached
	ReasonProtocol        = "bad_request"       // malformed input refused before any work
)

// Caller is who a call comes from and what the access file grants them.
type Caller struct {
	// Name is the identity: the name the access file knows the caller
	// by, else the certificate's subject CN (or first SAN) or the
	// basic-auth user; "" when the caller presented none.
	Name string
	// Via says how the caller was identified: "certificate",
	// "basic-auth" or "" (not identified).
	Via string
	// Source is the caller's network address.
	Source string

	rights *Rights
	siteOf func(unitID string) (string, bool)
}

// May reports whether the caller has role over the unit unitID. It does
// not allocate.
func (c *Caller) May(role Role, unitID string) bool {
	if c.rights.all {
		return true
	}
	site, _ := c.siteOf(unitID)
	return c.rights.Allows(role, unitID, site)
}

// Has reports whether the caller has role over at least one unit.
func (c *Caller) Has(role Role) bool { return c.rights.Has(role) }

// HasAll reports whether the caller has role over every unit.
func (c *Caller) HasAll(role Role) bool { return c.rights.HasAll(role) }

// Allows is May(TelemetryWriter, unitID): the per-sample check of a push.
func (c *Caller) Allows(unitID string) bool { return c.May(TelemetryWriter, unitID) }

// Who returns the caller's name for a record: the identity, or
// "anonymous".
func (c *Caller) Who() string {
	if c.Name == "" {
		return "anonymous"
	}
	return c.Name
}

type ctxKey struct{}

// NewContext returns ctx carrying c.
func NewContext(ctx context.Context, c *Caller) context.Context {
	return context.WithValue(ctx, ctxKey{}, c)
}

// FromContext returns the caller ctx carries, or nil.
func FromContext(ctx context.Context) *Caller {
	c, _ := ctx.Value(ctxKey{}).(*Caller)
	return c
}

// Options configure a Guard.
type Options struct {
	// Path is the access file; "" means none: everything is allowed,
	// unless Policy is given.
	Path string
	// Policy is a policy in force without a file (tests, embedding).
	Policy *Policy
	// SiteOf returns a unit's site from the fleet being served.
	SiteOf func(unitID string) (site string, ok bool)
	// UnitIDs returns the ids of the fleet being served (to name the
	// units a viewer may see when it asks for one it may not).
	UnitIDs func() []string
	// Auditor receives denials and operator actions; default a
	// LogAuditor on Logger.
	Auditor Auditor
	Logger  *slog.Logger
	Now     func() time.Time
}

// Guard holds the access file in force and checks callers against it.
type Guard struct {
	opts    Options
	policy  atomic.Pointer[Policy]
	loadMu  sync.Mutex
	denied  *prometheus.CounterVec
	auditor Auditor
	gate    gate // bounds the audit of repeated failures (authfail.go)
	// fleetKnown: Options.SiteOf was given, so that a unit it does not
	// know is not in the fleet.
	fleetKnown bool
}

// NewGuard reads the access file, if any; it fails when the file has
// errors.
func NewGuard(o Options) (*Guard, error) {
	if o.Logger == nil {
		o.Logger = slog.Default()
	}
	if o.Now == nil {
		o.Now = time.Now
	}
	fleetKnown := o.SiteOf != nil
	if !fleetKnown {
		o.SiteOf = func(string) (string, bool) { return "", false }
	}
	if o.UnitIDs == nil {
		o.UnitIDs = func() []string { return nil }
	}
	g := &Guard{opts: o, auditor: o.Auditor, fleetKnown: fleetKnown}
	if g.auditor == nil {
		g.auditor = LogAuditor{Log: o.Logger}
	}
	g.denied = prometheus.NewCounterVec(prometheus.CounterOpts{
		Namespace: "genvelope", Name: "access_denied_total",
		Help: "Calls (and samples, for permission_denied) refused by access control, and failed authentications, by reason.",
	}, []string{"reason"})
	for _, r := range append([]string{ReasonUnauthenticated, ReasonNotGranted, ReasonSampleDenied, ReasonCrossOrigin, ReasonHost, ReasonLimit, ReasonProtocol}, AuthFailureReasons()...) {
		g.denied.WithLabelValues(r)
	}
	if o.Policy != nil && o.Path == "" {
		g.policy.Store(o.Policy)
	}
	if err := g.Reload(); err != nil {
		return nil, err
	}
	return g, nil
}

// Collector returns the guard's metrics.
func (g *Guard) Collector() prometheus.Collector { return g.denied }

// Enabled reports whether an access file is in force.
func (g *Guard) Enabled() bool { return g.policy.Load() != nil }

// Reload reads the access file again; a file with errors changes
// nothing and is returned.
func (g *Guard) Reload() error {
	if g.opts.Path == "" {
		return nil
	}
	g.loadMu.Lock()
	defer g.loadMu.Unlock()
	p, err := LoadFile(g.opts.Path)
	if err != nil {
		return err
	}
	g.policy.Store(p)
	g.opts.Logger.Info("access file loaded", "file", g.opts.Path, "identities", p.Len())
	return nil
}

// caller builds the caller known by candidate names.
func (g *Guard) caller(names []string, via, source string) *Caller {
	c := &Caller{Via: via, Source: source, siteOf: g.opts.SiteOf}
	if !g.Enabled() {
		c.rights = allowAll
		if len(names) > 0 {
			c.Name = names[0]
		}
		return c
	}
	p := g.policy.Load()
	if n := p.known(names); n != "" {
		c.Name = n
		c.rights = p.rights([]string{n})
		return c
	}
	if len(names) > 0 {
		c.Name = names[0]
	}
	c.rights = &Rights{}
	return c
}

// Named returns the caller known by name, as if it had presented a
// certificate with that subject CN.
func (g *Guard) Named(name, source string) *Caller {
	return g.caller([]string{name}, "certificate", source)
}

// CertNames returns the names a client certificate identifies its
// holder by: the subject CN, then the DNS, URI and e-mail SANs.
func CertNames(cert *x509.Certificate) []string {
	var names []string
	if cert.Subject.CommonName != "" {
		names = append(names, cert.Subject.CommonName)
	}
	names = append(names, cert.DNSNames...)
	for _, u := range cert.URIs {
		names = append(names, u.String())
	}
	return append(names, cert.EmailAddresses...)
}

// FromTLS returns the caller of a connection: identified by its
// verified client certificate, if it presented one.
func (g *Guard) FromTLS(cs *tls.ConnectionState, source string) *Caller {
	if cs != nil && len(cs.VerifiedChains) > 0 && len(cs.PeerCertificates) > 0 {
		return g.caller(CertNames(cs.PeerCertificates[0]), "certificate", source)
	}
	return g.caller(nil, "", source)
}

// FromHTTP returns the caller of an HTTP request: identified by its
// verified client certificate, else by its basic-auth user (checked by
// the web configuration's users before the request gets here).
func (g *Guard) FromHTTP(r *http.Request, basicAuthChecked bool) *Caller {
	if r.TLS != nil && len(r.TLS.VerifiedChains) > 0 && len(r.TLS.PeerCertificates) > 0 {
		return g.caller(CertNames(r.TLS.PeerCertificates[0]), "certificate", r.RemoteAddr)
	}
	if user, _, ok := r.BasicAuth(); ok && basicAuthChecked {
		return g.caller([]string{user}, "basic-auth", r.RemoteAddr)
	}
	return g.caller(nil, "", r.RemoteAddr)
}

// DenyReason returns why c may not act: unauthenticated when the access
// file does not know it, not granted otherwise.
func DenyReason(c *Caller) string {
	if c.rights.all || len(c.rights.grants) > 0 {
		return ReasonNotGranted
	}
	return ReasonUnauthenticated
}

// Deny counts and audits a refused call.
func (g *Guard) Deny(ctx context.Context, c *Caller, action, target, reason string) {
	g.DenyN(ctx, c, action, target, reason, 1)
}

// DenyN counts n refusals of one call (samples of one batch) and audits
// the call once.
func (g *Guard) DenyN(ctx context.Context, c *Caller, action, target, reason string, n int) {
	g.denied.WithLabelValues(reason).Add(float64(n))
	e := Entry{Time: g.opts.Now(), Action: action, Target: target, Outcome: OutcomeDenied, Reason: reason}
	if c != nil {
		e.Identity, e.Source = c.Who(), c.Source
	}
	if n > 1 {
		e.Detail = fmt.Sprintf("%d refused", n)
	}
	if reason == ReasonUnauthenticated {
		// A caller the access file does not know may repeat itself
		// without end: through the flood gate, as failed sign-ins.
		g.gated(ctx, e)
		return
	}
	g.auditor.Audit(ctx, e)
}

// Record audits an action that was allowed: an operator action or a
// reload, with its outcome ("done" or "failed: ...").
func (g *Guard) Record(ctx context.Context, c *Caller, action, target, outcome, detail string) {
	e := Entry{Time: g.opts.Now(), Action: action, Target: target, Outcome: outcome, Detail: detail}
	if c != nil {
		e.Identity, e.Source = c.Who(), c.Source
	}
	g.auditor.Audit(ctx, e)
}
