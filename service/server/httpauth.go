package server

import (
	"fmt"
	"net"
	"net/http"
	"net/url"
	"strings"

	"github.com/genvelope/genvelope/service/access"
)

// allowedHosts returns the Host names the HTTP listener answers to: the
// loopback names, the listen address' host when it names one, and the
// configured names; all lower case, without ports.
func allowedHosts(listen string, extra []string) map[string]bool {
	hosts := map[string]bool{"localhost": true, "127.0.0.1": true, "::1": true}
	if h, _, err := net.SplitHostPort(listen); err == nil {
		if ip := net.ParseIP(h); h != "" && (ip == nil || !ip.IsUnspecified()) {
			hosts[strings.ToLower(h)] = true
		}
	}
	for _, h := range extra {
		if h = strings.TrimSpace(h); h != "" {
			hosts[strings.ToLower(h)] = true
		}
	}
	return hosts
}

// hostOf returns the host of a Host header, lower case, without port or
// brackets.
func hostOf(hostport string) string {
	h := hostport
	if host, _, err := net.SplitHostPort(hostport); err == nil {
		h = host
	}
	return strings.ToLower(strings.Trim(h, "[]"))
}

// httpGuard is the HTTP listener's front: the Host check (against DNS
// rebinding), the caller's identity (client certificate or basic-auth
// user of the web configuration) and its rights per route, and the
// audit of operator actions and reloads.
type httpGuard struct {
	guard     *access.Guard
	hosts     map[string]bool
	basicAuth bool // the web configuration checks basic-auth users
	next      http.Handler
	// hideUnits passes a request about a unit outside the caller's view
	// (a read or an alarm action) on to the pages, which answer it as for
	// a unit that does not exist (false: 403).
	hideUnits bool
}

// route is what an HTTP request asks of its caller.
type route struct {
	role   access.Role
	unit   string // the unit the request is about; "" for any
	open   bool   // health, readiness and static assets: no identity needed
	fleet  bool   // a fleet-wide read: the role over every unit
	action string // an audited action, "" for none
}

func routeOf(r *http.Request) route {
	p := r.URL.Path
	switch {
	case p == "/healthz" || p == "/readyz" || strings.HasPrefix(p, "/static/"):
		return route{open: true}
	case p == "/-/reload":
		return route{role: access.Admin} // audited by the reload itself
	case strings.HasPrefix(p, "/debug/pprof"):
		return route{role: access.Admin}
	case strings.HasPrefix(p, "/units/"):
		rest := strings.TrimPrefix(p, "/units/")
		id, tail, _ := strings.Cut(rest, "/")
		if u, err := url.PathUnescape(id); err == nil {
			id = u
		}
		if r.Method == http.MethodPost && strings.HasPrefix(tail, "alarms/") {
			action := tail[strings.LastIndexByte(tail, '/')+1:]
			return route{role: access.Operator, unit: id, action: "web " + action}
		}
		return route{role: access.Viewer, unit: id}
	}
	// The overview, its refresh, the journal, /metrics: the units the
	// caller may view (the pages and metrics are filtered to them).
	return route{role: access.Viewer, fleet: true}
}

func (h *httpGuard) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	markReached(r.Context())
	c := h.guard.FromHTTP(r, h.basicAuth)
	ctx := access.NewContext(r.Context(), c)
	r = r.WithContext(ctx)
	if ok, max := admit(ctx, limitKey(c)); !ok {
		h.guard.DenyGated(ctx, c, "http "+r.Method+" "+clipPath(r.URL.Path), access.ReasonLimit, fmt.Sprintf("more than %d HTTP connections", max))
		// Closes the connection after this answer: HTTP/1 at once; over
		// HTTP/2 net/http takes the header as its signal to send GOAWAY
		// and close the connection once its open streams (each answered
		// 429 like this one) are done.
		w.Header().Set("Connection", "close")
		http.Error(w, fmt.Sprintf("genvelope: %s already has %d HTTP connections open, the most allowed for one client; this connection is refused (close one first)", c.Who(), max), http.StatusTooManyRequests)
		return
	}
	// An IP address as the host is no rebinding (that needs a name the
	// attacker controls), and is what Prometheus' service discovery
	// uses.
	if host := hostOf(r.Host); !h.hosts[host] && net.ParseIP(host) == nil {
		h.guard.Deny(ctx, c, "http "+r.Method+" "+clipPath(r.URL.Path), access.Sanitize(r.Host, 128), access.ReasonHost)
		http.Error(w, "genvelope: this server does not answer to that host name (see --http-host)", http.StatusMisdirectedRequest)
		return
	}
	rt := routeOf(r)
	if !rt.open {
		ok := c.Has(rt.role)
		switch {
		case rt.unit != "":
			ok = c.May(rt.role, rt.unit)
		case rt.fleet:
			ok = c.Has(rt.role)
		}
		if !ok {
			reason := access.DenyReason(c)
			h.guard.Deny(ctx, c, "http "+r.Method+" "+clipPath(r.URL.Path), access.Sanitize(rt.unit, 128), reason)
			if rt.unit != "" && h.hideUnits && c.Has(access.Viewer) && !c.May(access.Viewer, rt.unit) {
				// A unit outside the caller's view, read or acted on, is
				// not revealed: the pages answer it as a unit that does
				// not exist (their scope excludes it, so they neither
				// show nor act on it). One the caller may view but not
				// act on is answered 403: it knows the unit exists.
				h.next.ServeHTTP(w, r)
				return
			}
			if reason == access.ReasonUnauthenticated && h.basicAuth {
				w.Header().Set("WWW-Authenticate", `Basic realm="genvelope"`)
				http.Error(w, "genvelope: sign in", http.StatusUnauthorized)
				return
			}
			http.Error(w, "genvelope: "+c.Who()+" may not do this", http.StatusForbidden)
			return
		}
	}
	if rt.action == "" {
		h.next.ServeHTTP(w, r)
		return
	}
	rec := &statusRecorder{ResponseWriter: w, status: http.StatusOK}
	h.next.ServeHTTP(rec, r)
	outcome := access.OutcomeDone
	if rec.status >= 400 {
		outcome = access.OutcomeFailed
	}
	h.guard.Record(ctx, c, rt.action, access.Sanitize(strings.TrimPrefix(r.URL.Path, "/units/"), 256), outcome, http.StatusText(rec.status))
}

func clipPath(p string) string { return access.Sanitize(p, 128) }

// statusRecorder notes the status an audited handler answers.
type statusRecorder struct {
	http.ResponseWriter
	status int
}

func (s *statusRecorder) WriteHeader(code int) {
	s.status = code
	s.ResponseWriter.WriteHeader(code)
}
