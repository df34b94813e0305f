package server

import (
	"context"
	"fmt"
	"log"
	"log/slog"
	"net"
	"net/http"
	"os"
	"strings"
	"sync"
	"time"

	"github.com/prometheus/exporter-toolkit/web"
	"go.yaml.in/yaml/v3"

	"github.com/genvelope/genvelope/service/access"
)

// The exporter-toolkit checks basic-auth users (and answers its own rate
// limit) in a handler that wraps ours, so a refused password never
// reaches httpGuard. authObserver wraps the toolkit's handler in turn:
// it changes nothing of the toolkit's checks, and audits the 401 (and
// 429) answers that did not come from our own handler, with the claimed
// user and whether the web configuration knows that user.
type authObserver struct {
	next  http.Handler // the toolkit's handler
	guard *access.Guard
	users *webUsers
	// before, when set, brings the toolkit's copy of the web
	// configuration up to date before the toolkit reads it.
	before *webTLS
}

type reachedKey struct{}

// markReached tells authObserver that a request got past the toolkit.
func markReached(ctx context.Context) {
	if p, ok := ctx.Value(reachedKey{}).(*bool); ok {
		*p = true
	}
}

func (o *authObserver) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	if o.before != nil {
		o.before.sync() // a failure removes the copy: the toolkit refuses the request, as without the file
	}
	reached := new(bool)
	r = r.WithContext(context.WithValue(r.Context(), reachedKey{}, reached))
	rec := &refusalWriter{ResponseWriter: w, status: http.StatusOK, reached: reached, r: r, o: o}
	o.next.ServeHTTP(rec, r)
	if *reached {
		return
	}
	action := "http " + r.Method + " " + clipPath(r.URL.Path)
	switch rec.status {
	case http.StatusUnauthorized:
		user, _, ok := r.BasicAuth()
		reason := access.ReasonNoCredentials
		switch {
		case ok && o.users.known(user):
			reason = access.ReasonBadPassword
		case ok:
			reason = access.ReasonUnknownUser
		}
		claimed := user
		if claimed == "" && r.TLS != nil && len(r.TLS.VerifiedChains) == 0 && len(r.TLS.PeerCertificates) > 0 {
			// A certificate the web configuration asks for but does not
			// verify (RequestClientCert, RequireAnyClientCert): the name
			// it claims.
			claimed = access.CertName(r.TLS.PeerCertificates[0])
		}
		o.guard.AuthFailed(r.Context(), access.AuthFailure{Source: r.RemoteAddr, Claimed: claimed, Action: action, Reason: reason})
	case http.StatusTooManyRequests:
		o.guard.DenyGated(r.Context(), &access.Caller{Source: r.RemoteAddr}, action, access.ReasonLimit, "the web configuration's rate limit")
	}
}

// refusalWriter notes the status the toolkit answers. A connection whose
// first answer is the toolkit's 401 counts against its address (its
// caller is not known): over the per-client cap that answer closes it,
// so that clients without valid credentials cannot hold the listener's
// connections open between attempts.
type refusalWriter struct {
	http.ResponseWriter
	status  int
	reached *bool
	r       *http.Request
	o       *authObserver
}

func (w *refusalWriter) WriteHeader(code int) {
	w.status = code
	if code == http.StatusUnauthorized && !*w.reached {
		host, _, err := net.SplitHostPort(w.r.RemoteAddr)
		if err != nil {
			host = w.r.RemoteAddr
		}
		if ok, max := admit(w.r.Context(), "addr:"+host); !ok {
			w.Header().Set("Connection", "close") // HTTP/2 too: GOAWAY, then closed (see httpGuard)
			w.o.guard.DenyGated(w.r.Context(), &access.Caller{Source: w.r.RemoteAddr}, "http connect", access.ReasonLimit,
				fmt.Sprintf("more than %d HTTP connections without valid credentials", max))
		}
	}
	w.ResponseWriter.WriteHeader(code)
}

// webUsers reads the web configuration's user names (not their hashes)
// again when the file changes, to tell an unknown user from a wrong
// password in the audit.
type webUsers struct {
	path string

	mu      sync.Mutex
	modTime time.Time
	size    int64
	names   map[string]bool
}

func (u *webUsers) known(user string) bool {
	if u == nil || u.path == "" {
		return false
	}
	u.mu.Lock()
	defer u.mu.Unlock()
	fi, err := os.Stat(u.path)
	if err != nil {
		return false
	}
	if u.names == nil || !fi.ModTime().Equal(u.modTime) || fi.Size() != u.size {
		u.names = map[string]bool{}
		u.modTime, u.size = fi.ModTime(), fi.Size()
		if data, err := os.ReadFile(u.path); err == nil {
			var c web.Config
			if yaml.Unmarshal(data, &c) == nil {
				for name := range c.Users {
					u.names[name] = true
				}
			}
		}
	}
	return u.names[user]
}

// observeListener runs hook once, at the first Accept. http.Server.Serve
// calls Accept in the goroutine that called web.Serve, after the toolkit
// has put its handler in place and before any connection is served: the
// hook can wrap that handler without a race.
type observeListener struct {
	net.Listener
	once sync.Once
	hook func()
}

func (l *observeListener) Accept() (net.Conn, error) {
	l.once.Do(l.hook)
	return l.Listener.Accept()
}

// handshakeLog is the HTTP server's error log: a failed TLS handshake
// (which net/http reports only there, as "http: TLS handshake error from
// ADDR: ERR") is audited as a failed authentication with its reason;
// everything else goes to the log at debug level. A connection closed
// before the handshake (EOF: a port probe) is no attempt to
// authenticate.
type handshakeLog struct {
	guard *access.Guard
	log   *slog.Logger
}

const handshakePrefix = "http: TLS handshake error from "

func (h handshakeLog) Write(p []byte) (int, error) {
	msg := strings.TrimSpace(string(p))
	if rest, ok := strings.CutPrefix(msg, handshakePrefix); ok {
		// No ": " inside an address, IPv6 included ("[::1]:5678").
		if addr, errText, ok := strings.Cut(rest, ": "); ok {
			if errText != "EOF" {
				reason, _ := access.ClassifyTLSText(errText)
				h.guard.AuthFailed(context.Background(), access.AuthFailure{Source: addr, Action: "http connect", Reason: reason, Detail: errText})
			}
			return len(p), nil
		}
	}
	h.log.Debug(msg)
	return len(p), nil
}

func newHandshakeLog(g *access.Guard, l *slog.Logger) *log.Logger {
	return log.New(handshakeLog{guard: g, log: l}, "", 0)
}
