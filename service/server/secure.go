package server

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net"
	"net/http"
	"net/http/pprof"
	"os"
	"path/filepath"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/exporter-toolkit/web"
	"google.golang.org/grpc"
	grpcinsecure "google.golang.org/grpc/credentials/insecure"

	"github.com/genvelope/genvelope/service/access"
	"github.com/genvelope/genvelope/service/journal"
	"github.com/genvelope/genvelope/service/metrics"
	"github.com/genvelope/genvelope/service/rpc"
)

// secure checks the transport settings (no plaintext off loopback
// unless asked), loads the access file and the gRPC certificates, and
// returns the gRPC server options: credentials, the guard's and the
// caps' interceptors, the size and keepalive limits.
func (s *Server) secure(reg *prometheus.Registry) ([]grpc.ServerOption, error) {
	sec := &s.cfg.Security
	var err error
	if s.webCfg, err = readWebConfig(sec.WebConfig); err != nil {
		return nil, err
	}
	grpcPlain, err := plaintextCheck("gRPC", s.cfg.GRPCListen, sec.GRPCTLSCert != "", sec.InsecurePlaintext)
	if err != nil {
		return nil, err
	}
	httpPlain, err := plaintextCheck("HTTP", s.cfg.HTTPListen, s.webCfg.TLS, sec.InsecurePlaintext)
	if err != nil {
		return nil, err
	}
	pprofPlain, err := plaintextCheck("HTTP", sec.PprofListen, s.webCfg.TLS, sec.InsecurePlaintext)
	if err != nil {
		return nil, err
	}
	insecure := prometheus.NewGauge(prometheus.GaugeOpts{
		Namespace: metrics.Namespace, Name: "insecure_plaintext",
		Help: "1 when a listener on a non-loopback address serves without TLS (--insecure-plaintext).",
	})
	reg.MustRegister(insecure)
	if grpcPlain || httpPlain || pprofPlain {
		insecure.Set(1)
		s.log.Error("INSECURE: serving without TLS on a non-loopback address (--insecure-plaintext): anyone on the network can read everything, push telemetry and act on alarms",
			"grpc", s.cfg.GRPCListen, "grpc_plaintext", grpcPlain, "http", s.cfg.HTTPListen, "http_plaintext", httpPlain || pprofPlain)
	}

	auditors := access.Auditors{access.LogAuditor{Log: s.log}}
	if s.journal != nil {
		auditors = append(auditors, journalAuditor{j: s.journal, log: s.log})
	}
	if sec.Auditor != nil {
		auditors = append(auditors, sec.Auditor)
	}
	auditor := access.Auditor(auditors)
	s.guard, err = access.NewGuard(access.Options{
		Path: sec.AccessFile, Auditor: auditor, Logger: s.log,
		SiteOf: func(id string) (string, bool) {
			u := s.store.Fleet().Unit(id)
			if u == nil {
				return "", false
			}
			return u.Site, true
		},
		UnitIDs: func() []string { return s.store.Fleet().IDs() },
	})
	if err != nil {
		return nil, err
	}
	reg.MustRegister(s.guard.Collector())
	if !s.guard.Enabled() && (!isLoopback(s.cfg.GRPCListen) || !isLoopback(s.cfg.HTTPListen)) {
		s.log.Warn("no --access file: every client that reaches a listener may push telemetry, act on alarms and reload",
			"grpc", s.cfg.GRPCListen, "http", s.cfg.HTTPListen)
	}

	creds, closeCreds, err := grpcCreds(sec)
	if err != nil {
		return nil, err
	}
	s.closeCreds = closeCreds
	s.limits = s.cfg.Limits.withDefaults()
	caps := newCallerLimits(s.limits, s.guard)
	maxBatch := s.cfg.MaxBatch
	if maxBatch <= 0 {
		maxBatch = rpc.DefaultMaxBatch
	}
	codec := newStrictCodec()
	if creds == nil {
		creds = grpcinsecure.NewCredentials()
	}
	opts := append(grpcLimitOptions(s.limits, maxBatch),
		grpc.ForceServerCodecV2(codec),
		grpc.ChainUnaryInterceptor(connCapUnary, codec.Unary, s.guard.UnaryInterceptor, caps.Unary),
		grpc.ChainStreamInterceptor(connCapStream, codec.Stream, s.guard.StreamInterceptor, caps.Stream),
		grpc.Creds(&capCreds{TransportCredentials: creds, guard: s.guard, conns: newConnCounts(s.limits.GRPCConnsPerCaller)}),
	)
	return opts, nil
}

// denied counts and audits the samples of one push refused for want of
// the telemetry_writer grant over their units.
func (s *Server) denied(ctx context.Context, n int, unitID string) {
	s.guard.DenyN(ctx, access.FromContext(ctx), "grpc push", access.Sanitize(unitID, 64), access.ReasonSampleDenied, n)
}

// httpServer returns an HTTP server for handler behind the host check
// and the guard, with the read, write and idle timeouts.
func (s *Server) httpServer(handler http.Handler, listen string, write bool) *http.Server {
	caps := newHTTPConnCaps(s.limits.HTTPConnsPerCaller)
	h := &httpGuard{guard: s.guard, hosts: allowedHosts(listen, s.cfg.Security.HTTPHosts), basicAuth: s.webCfg.Users, next: handler}
	h.hideUnits = true // the pages check the scope of /units/{id} themselves (web.Options.Scope)
	srv := &http.Server{
		Handler: h, ReadHeaderTimeout: 10 * time.Second, ReadTimeout: s.limits.HTTPRead,
		IdleTimeout: s.limits.HTTPIdle, MaxHeaderBytes: 64 << 10,
		ErrorLog:    newHandshakeLog(s.guard, s.log),
		ConnContext: caps.connContext, ConnState: caps.connState,
	}
	if write {
		srv.WriteTimeout = s.limits.HTTPWrite
	}
	return srv
}

// pprofMux serves the profiles (for the admin role; see routeOf).
func pprofMux() *http.ServeMux {
	mux := http.NewServeMux()
	mux.HandleFunc("/debug/pprof/", pprof.Index)
	mux.HandleFunc("/debug/pprof/cmdline", pprof.Cmdline)
	mux.HandleFunc("/debug/pprof/profile", pprof.Profile)
	mux.HandleFunc("/debug/pprof/symbol", pprof.Symbol)
	mux.HandleFunc("/debug/pprof/trace", pprof.Trace)
	return mux
}

// serveHTTP serves srv on ln through the exporter-toolkit, which applies
// the web configuration (TLS, client certificates, basic-auth users)
// and reads it again for every new connection.
func (s *Server) serveHTTP(srv *http.Server, ln net.Listener) error {
	path := s.cfg.Security.WebConfig
	users := &webUsers{path: path}
	toolkitPath, log := path, s.log
	var wt *webTLS
	if s.webCfg.TLS {
		// The TLS is ours (webtls.go); the toolkit reads the rest of the
		// file from a copy without it.
		name := "http"
		if srv == s.pprof {
			name = "pprof"
		}
		copyPath, remove, err := s.webCopyPath(name)
		if err != nil {
			return err
		}
		defer remove()
		if wt, err = newWebTLS(path, copyPath, s.guard, srv); err != nil {
			return err
		}
		toolkitPath, log = wt.derived, slog.New(quietTLSLog{s.log.Handler()})
		ln = wt.listen(ln)
	}
	ln = &observeListener{Listener: ln, hook: func() {
		srv.Handler = &authObserver{next: srv.Handler, guard: s.guard, users: users, before: wt}
	}}
	return web.Serve(ln, srv, &web.FlagConfig{WebConfigFile: &toolkitPath}, log)
}

// webCopyPath returns where the toolkit's copy of the web configuration
// is kept, and how to remove it: a private directory (0700) beside the
// state file, which every install keeps writable (a read-only root
// filesystem has no writable /tmp), else beside the journal, with a
// fixed name, so that a copy left by a killed process is replaced; else
// a directory of its own in the temporary directory.
func (s *Server) webCopyPath(name string) (path string, remove func(), err error) {
	for _, base := range []string{s.cfg.StatePath, s.cfg.JournalPath} {
		if base == "" {
			continue
		}
		dir := filepath.Join(filepath.Dir(base), ".genvelope-web")
		if err = os.MkdirAll(dir, 0o700); err != nil {
			continue
		}
		path = filepath.Join(dir, "web-config-"+name+".yml")
		return path, func() { os.Remove(path) }, nil
	}
	dir, terr := os.MkdirTemp("", "genvelope-web-")
	if terr != nil {
		return "", nil, fmt.Errorf("no writable directory for the copy of the web configuration: %w", errors.Join(err, terr))
	}
	return filepath.Join(dir, "web-config-"+name+".yml"), func() { os.RemoveAll(dir) }, nil
}

func outcomeOf(err error) string {
	if err != nil {
		return access.OutcomeFailed
	}
	return access.OutcomeDone
}

func errText(err error) string {
	if err != nil {
		return access.Sanitize(err.Error(), 512)
	}
	return ""
}

// webIdentity tells the pages who is signed in (the guard put the
// caller in the request's context) and whether they may act on a unit's
// alarms.
func webIdentity(r *http.Request) (name string, mayOperate func(unitID string) bool) {
	c := access.FromContext(r.Context())
	if c == nil {
		return "", func(string) bool { return true }
	}
	return c.Name, func(id string) bool { return c.May(access.Operator, id) }
}

// viewScope returns which units a request's caller may view: nil (all)
// without an access file or with the viewer role over every unit.
func viewScope(r *http.Request) func(unitID string) bool {
	c := access.FromContext(r.Context())
	if c == nil || c.HasAll(access.Viewer) {
		return nil
	}
	return func(id string) bool { return c.May(access.Viewer, id) }
}

// PprofAddr returns the bound address of the profiling listener, or ""
// when there is none.
func (s *Server) PprofAddr() string {
	if s.pprofLn == nil {
		return ""
	}
	return s.pprofLn.Addr().String()
}

// guardReload reads the access file again (nothing before the guard is
// made: a log may replay a reload while the server is being built).
func (s *Server) guardReload() error {
	if s.guard == nil {
		return nil
	}
	return s.guard.Reload()
}

// journalAuditor writes denials to the alarm journal (operator actions
// and reloads are journalled by the store already, with the identity as
// the operator).
type journalAuditor struct {
	j   *journal.Journal
	log *slog.Logger
}

func (a journalAuditor) Audit(_ context.Context, e access.Entry) {
	if e.Outcome != access.OutcomeDenied {
		return
	}
	msg := fmt.Sprintf("%s from %s: %s refused (%s)", e.Identity, e.Source, e.Action, e.Reason)
	if e.Target != "" {
		msg += " on " + e.Target
	}
	if e.Detail != "" {
		msg += ": " + e.Detail
	}
	if err := a.j.Append(journal.Entry{Time: e.Time, Change: journal.ChangeDenied, Message: msg, Operator: e.Identity}); err != nil {
		a.log.Error("access denial not journalled", "err", err)
	}
}
