package server_test

import (
	"bufio"
	"context"
	"crypto/tls"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"path/filepath"
	"regexp"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"golang.org/x/net/http2"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/connectivity"
	"google.golang.org/grpc/credentials/insecure"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/keepalive"
	"google.golang.org/grpc/status"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/access"
	"github.com/genvelope/genvelope/service/journal"
	"github.com/genvelope/genvelope/service/server"
	"github.com/genvelope/genvelope/test/testpki"
)

// reverse is the test users' password: the name reversed.
func reverse(s string) string {
	rs := []rune(s)
	for i, j := 0, len(rs)-1; i < j; i, j = i+1, j-1 {
		rs[i], rs[j] = rs[j], rs[i]
	}
	return string(rs)
}

// httpConn is one kept-alive HTTPS connection to a secureServer.
type httpConn struct {
	c  net.Conn
	br *bufio.Reader
}

// openHTTP opens a TLS connection (presenting client when not nil) and
// makes one GET on it as user/password ("" for none).
func openHTTP(t *testing.T, p *pki, addr string, client *testpki.Leaf, path, user, password string) (*httpConn, int, string, error) {
	t.Helper()
	tc := &tls.Config{RootCAs: p.ca.Pool(), ServerName: "localhost", NextProtos: []string{"http/1.1"}}
	if client != nil {
		// Sent even when its CA is not among those the server names.
		tc.GetClientCertificate = func(*tls.CertificateRequestInfo) (*tls.Certificate, error) { return &client.TLS, nil }
	}
	c, err := tls.Dial("tcp", addr, tc)
	if err != nil {
		return nil, 0, "", err
	}
	t.Cleanup(func() { c.Close() })
	hc := &httpConn{c: c, br: bufio.NewReader(c)}
	code, body, err := hc.get(path, user, password)
	return hc, code, body, err
}

func (hc *httpConn) get(path, user, password string) (int, string, error) {
	hc.c.SetDeadline(time.Now().Add(waitLong))
	req, _ := http.NewRequest("GET", "https://localhost"+path, nil)
	if user != "" {
		req.SetBasicAuth(user, password)
	}
	if err := req.Write(hc.c); err != nil {
		return 0, "", err
	}
	resp, err := http.ReadResponse(hc.br, req)
	if err != nil {
		return 0, "", err
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b), nil
}

// h2Conn is one HTTP/2 connection (a real HTTP/2 client, ALPN h2) to a
// secureServer; closed is closed when the server ends the TCP
// connection, goAway set when it sent GOAWAY.
type h2Conn struct {
	cc     *http2.ClientConn //lint:ignore SA1019 see openH2
	closed chan struct{}
	goAway *atomic.Bool
}

func openH2(t *testing.T, p *pki, addr string) *h2Conn {
	t.Helper()
	c, err := tls.Dial("tcp", addr, &tls.Config{RootCAs: p.ca.Pool(), ServerName: "localhost", NextProtos: []string{"h2"}})
	if err != nil {
		t.Fatal(err)
	}
	if proto := c.ConnectionState().NegotiatedProtocol; proto != "h2" {
		t.Fatalf("negotiated %q, want h2", proto)
	}
	pr, pw := io.Pipe()
	h := &h2Conn{closed: make(chan struct{}), goAway: new(atomic.Bool)}
	// The frames the server sends, read beside the client (for GOAWAY).
	go readGoAways(pr, func(*http2.GoAwayFrame) { h.goAway.Store(true) })
	wc := &watchedConn{teeConn: teeConn{Conn: c, w: pw}, serverClosed: h.closed}
	t.Cleanup(func() { wc.teeConn.Close() })
	// x/net's HTTP/2 client over a connection the test holds: net/http's
	// own takes HTTP/2 only over a *tls.Conn it can see, and this one must
	// be wrapped.
	//lint:ignore SA1019 see above
	h.cc, err = (&http2.Transport{}).NewClientConn(wc)
	if err != nil {
		t.Fatal(err)
	}
	return h
}

// watchedConn closes serverClosed when a read ends because the server
// closed the connection. It plays a client that ignores GOAWAY: the
// HTTP/2 client's Close leaves the connection open (the test's cleanup
// closes it), so that only the server can end it.
type watchedConn struct {
	teeConn
	once         sync.Once
	serverClosed chan struct{}
}

func (c *watchedConn) Close() error { return nil }

func (c *watchedConn) Read(b []byte) (int, error) {
	n, err := c.teeConn.Read(b)
	if err != nil && !errors.Is(err, net.ErrClosed) {
		c.once.Do(func() { close(c.serverClosed) })
	}
	return n, err
}

func (h *h2Conn) get(path, user, password string) (int, string, error) {
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	req, _ := http.NewRequestWithContext(ctx, "GET", "https://localhost"+path, nil)
	req.SetBasicAuth(user, password)
	resp, err := h.cc.RoundTrip(req)
	if err != nil {
		return 0, "", err
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b), nil
}

// denialsBy returns the audit's denials with reason.
func denialsBy(audit *access.Memory, action, reason string) []access.Entry {
	var out []access.Entry
	for _, e := range audit.Find(action, access.OutcomeDenied) {
		if e.Reason == reason {
			out = append(out, e)
		}
	}
	return out
}

// One client (an identity, else an address) may hold at most
// GRPCConnsPerCaller gRPC and HTTPConnsPerCaller HTTP connections: the
// next one is answered RESOURCE_EXHAUSTED (gRPC, then closed) or 429
// (HTTP, Connection: close) with the reason, audited and counted; other
// identities are not affected, and a closed connection makes room.
func TestConnectionsPerCaller(t *testing.T) {
	const capN = 2
	p := newPKI(t)
	r, audit := secureServer(t, p, func(c *server.Config) {
		c.Limits = server.Limits{GRPCConnsPerCaller: capN, HTTPConnsPerCaller: capN}
	})
	t.Run("grpc by certificate", func(t *testing.T) {
		check := func(conn *grpc.ClientConn) error {
			ctx, cancel := context.WithTimeout(context.Background(), waitLong)
			defer cancel()
			_, err := healthpb.NewHealthClient(conn).Check(ctx, &healthpb.HealthCheckRequest{})
			return err
		}
		var held []*grpc.ClientConn
		for i := range capN {
			c := dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["viewer-all"])
			if err := check(c); err != nil {
				t.Fatalf("connection %d within the cap of %d: %v", i+1, capN, err)
			}
			held = append(held, c)
		}
		over := dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["viewer-all"])
		err := check(over)
		if status.Code(err) != codes.ResourceExhausted || !strings.Contains(status.Convert(err).Message(), fmt.Sprintf("viewer-all already has %d gRPC connections open", capN)) {
			t.Fatalf("connection %d over the cap: %v, want RESOURCE_EXHAUSTED naming the identity and the cap", capN+1, err)
		}
		over.Close()
		if err := check(dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["admin"])); err != nil {
			t.Errorf("another identity refused: %v", err)
		}
		got := denialsBy(audit, "grpc connect", access.ReasonLimit)
		if len(got) != 1 || got[0].Identity != "viewer-all" || !strings.HasPrefix(got[0].Source, "127.0.0.1:") {
			t.Errorf("audit of the refused connection: %+v", got)
		}
		held[0].Close()
		waitFor(t, "room for a connection after one closed", func() bool {
			c := dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["viewer-all"])
			err := check(c)
			if err != nil {
				c.Close()
			}
			return err == nil
		})
	})
	t.Run("http by basic-auth user", func(t *testing.T) {
		var held []*httpConn
		for i := range capN {
			hc, code, body, err := openHTTP(t, p, r.srv.HTTPAddr(), nil, "/healthz", "viewer-all", reverse("viewer-all"))
			if err != nil || code != http.StatusOK {
				t.Fatalf("connection %d within the cap: %d %q %v", i+1, code, body, err)
			}
			held = append(held, hc)
		}
		_, code, body, err := openHTTP(t, p, r.srv.HTTPAddr(), nil, "/healthz", "viewer-all", reverse("viewer-all"))
		if err != nil || code != http.StatusTooManyRequests || !strings.Contains(body, fmt.Sprintf("viewer-all already has %d HTTP connections open", capN)) {
			t.Fatalf("connection over the cap: %d %q %v, want 429 with the reason", code, body, err)
		}
		if _, code, _, err := openHTTP(t, p, r.srv.HTTPAddr(), nil, "/healthz", "admin", reverse("admin")); err != nil || code != http.StatusOK {
			t.Errorf("another user refused: %d %v", code, err)
		}
		// The held connections still serve.
		if code, _, err := held[1].get("/healthz", "viewer-all", reverse("viewer-all")); err != nil || code != http.StatusOK {
			t.Errorf("a held connection's second request: %d %v", code, err)
		}
		if got := denialsBy(audit, "http GET /healthz", access.ReasonLimit); len(got) != 1 || got[0].Identity != "viewer-all" {
			t.Errorf("audit of the refused connection: %+v", got)
		}
		held[0].c.Close()
		waitFor(t, "room for an HTTP connection after one closed", func() bool {
			_, code, _, err := openHTTP(t, p, r.srv.HTTPAddr(), nil, "/healthz", "viewer-all", reverse("viewer-all"))
			return err == nil && code == http.StatusOK
		})
	})
	t.Run("http/2 by basic-auth user", func(t *testing.T) {
		var held []*h2Conn
		for i := range capN {
			hc := openH2(t, p, r.srv.HTTPAddr())
			if code, body, err := hc.get("/healthz", "viewer-larchwater", reverse("viewer-larchwater")); err != nil || code != http.StatusOK {
				t.Fatalf("HTTP/2 connection %d within the cap: %d %q %v", i+1, code, body, err)
			}
			held = append(held, hc)
		}
		over := openH2(t, p, r.srv.HTTPAddr())
		code, body, err := over.get("/healthz", "viewer-larchwater", reverse("viewer-larchwater"))
		if err != nil || code != http.StatusTooManyRequests || !strings.Contains(body, fmt.Sprintf("viewer-larchwater already has %d HTTP connections open", capN)) {
			t.Fatalf("HTTP/2 connection over the cap: %d %q %v, want 429 with the reason", code, body, err)
		}
		// The server closes it (GOAWAY, then the TCP connection), where it
		// used to keep it open answering 429.
		select {
		case <-over.closed:
		case <-time.After(10 * time.Second):
			t.Fatalf("the HTTP/2 connection over the cap was not closed by the server (GOAWAY %v, client %v)", over.goAway.Load(), over.cc.State())
		}
		if !over.goAway.Load() {
			t.Error("closed without a GOAWAY")
		}
		// The held ones still serve, over HTTP/2.
		if code, _, err := held[1].get("/healthz", "viewer-larchwater", reverse("viewer-larchwater")); err != nil || code != http.StatusOK {
			t.Errorf("a held HTTP/2 connection's second request: %d %v", code, err)
		}
		if got := denialsBy(audit, "http GET /healthz", access.ReasonLimit); len(got) != 2 || got[1].Identity != "viewer-larchwater" {
			t.Errorf("audit of the refused connections: %+v, want the HTTP/1 one and viewer-larchwater's", got)
		}
	})
	t.Run("http without valid credentials, by address", func(t *testing.T) {
		// Refused by the toolkit (401): counted against the address, and
		// over the cap the 401 closes the connection.
		for i := range capN {
			hc, code, _, err := openHTTP(t, p, r.srv.HTTPAddr(), nil, "/metrics", "mallory", "guess")
			if err != nil || code != http.StatusUnauthorized {
				t.Fatalf("connection %d: %d %v", i+1, code, err)
			}
			if code, _, err := hc.get("/metrics", "mallory", "guess"); err != nil || code != http.StatusUnauthorized {
				t.Fatalf("connection %d kept alive: %d %v", i+1, code, err)
			}
		}
		hc, code, _, err := openHTTP(t, p, r.srv.HTTPAddr(), nil, "/metrics", "mallory", "guess")
		if err != nil || code != http.StatusUnauthorized {
			t.Fatalf("connection over the cap: %d %v", code, err)
		}
		if _, _, err := hc.get("/metrics", "mallory", "guess"); err == nil {
			t.Error("the connection over the cap was kept open after its 401")
		}
		if got := denialsBy(audit, "http connect", access.ReasonLimit); len(got) != 1 {
			t.Errorf("audit of the closed connection: %+v", got)
		}
	})
	if v, _ := metricValue(scrapeAs(t, p, r), "genvelope_access_denied_total", map[string]string{"reason": access.ReasonLimit}); v < 2 {
		t.Errorf("genvelope_access_denied_total{reason=resource_limit} = %v, want at least the 2 refusals", v)
	}
}

// Over HTTP/2 too, a connection whose first answer is the web
// configuration's 401 counts against its address, and over the cap that
// 401 ends it (GOAWAY, then closed by the server).
func TestHTTP2RefusedByAddressClosed(t *testing.T) {
	p := newPKI(t)
	r, _ := secureServer(t, p, func(c *server.Config) { c.Limits = server.Limits{HTTPConnsPerCaller: 1} })
	first := openH2(t, p, r.srv.HTTPAddr())
	if code, _, err := first.get("/metrics", "mallory", "guess"); err != nil || code != http.StatusUnauthorized {
		t.Fatalf("first connection: %d %v, want 401", code, err)
	}
	over := openH2(t, p, r.srv.HTTPAddr())
	if code, _, err := over.get("/metrics", "mallory", "guess"); err != nil || code != http.StatusUnauthorized {
		t.Fatalf("connection over the cap: %d %v, want 401", code, err)
	}
	select {
	case <-over.closed:
	case <-time.After(waitLong):
		t.Fatalf("the HTTP/2 connection over the cap was not closed by the server (GOAWAY %v)", over.goAway.Load())
	}
	if !over.goAway.Load() {
		t.Error("closed without a GOAWAY")
	}
	if code, _, err := first.get("/metrics", "mallory", "guess"); err != nil || code != http.StatusUnauthorized {
		t.Errorf("the first connection's second request: %d %v, want it kept (401)", code, err)
	}
}

// Anonymous clients are counted by address: a plaintext loopback
// service refuses the third gRPC connection from 127.0.0.1.
func TestConnectionsPerAddress(t *testing.T) {
	audit := &access.Memory{}
	r := start(t, server.Config{Limits: server.Limits{GRPCConnsPerCaller: 2}, Security: server.Security{Auditor: audit}})
	var errs []error
	for range 3 {
		c, err := grpc.NewClient(r.srv.GRPCAddr(), grpc.WithTransportCredentials(insecure.NewCredentials()))
		if err != nil {
			t.Fatal(err)
		}
		defer c.Close()
		_, err = pb.NewFleetServiceClient(c).ListUnits(ctxT(t), &pb.ListUnitsRequest{})
		errs = append(errs, err)
	}
	if errs[0] != nil || errs[1] != nil || status.Code(errs[2]) != codes.ResourceExhausted || !strings.Contains(errs[2].Error(), "anonymous already has 2 gRPC connections") {
		t.Fatalf("three connections from one address: %v", errs)
	}
	if got := denialsBy(audit, "grpc connect", access.ReasonLimit); len(got) != 1 || got[0].Identity != "anonymous" {
		t.Errorf("audit: %+v", got)
	}
}

// Every failed authentication is audited (log, journal, the metric by
// reason) with its source, the identity it claimed and the reason: a
// wrong password, an unknown user and no credentials on HTTP; no
// certificate, one from another CA and an expired one on gRPC and on
// HTTP where the web configuration requires client certificates (the
// refused certificate's subject as the claimed identity on both).
func TestFailedAuthenticationAudited(t *testing.T) {
	p := newPKI(t)
	jpath := filepath.Join(t.TempDir(), "journal.jsonl")
	expired := p.ca.Issue(t, testpki.Options{CN: "viewer-all", NotAfter: time.Now().Add(-time.Hour)})
	foreign := p.other.Client(t, "viewer-all")
	r, audit := secureServer(t, p, func(c *server.Config) { c.JournalPath = jpath })
	// A second HTTP listener config: client certificates required.
	mtlsWeb := testpki.Write(t, p.dir, "web-mtls.yaml", []byte("tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\n"+
		"  client_ca_file: ca.crt\n  client_auth_type: RequireAndVerifyClientCert\n"))
	r2, audit2 := secureServer(t, p, func(c *server.Config) { c.Security.WebConfig = mtlsWeb })
	// Client certificates whose chain verifies, but only with SANs the
	// certificates do not have (the toolkit's client_allowed_sans).
	sansWeb := testpki.Write(t, p.dir, "web-sans.yaml", []byte("tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\n"+
		"  client_ca_file: ca.crt\n  client_auth_type: RequireAndVerifyClientCert\n  client_allowed_sans: [nobody.example]\n"))
	r3, audit3 := secureServer(t, p, func(c *server.Config) { c.Security.WebConfig = sansWeb })
	// Client certificates asked for and not verified, beside users.
	anyWeb := testpki.Write(t, p.dir, "web-any.yaml", []byte("tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\n"+
		"  client_auth_type: RequireAnyClientCert\nbasic_auth_users:\n  viewer-all: "+bcryptHash(t, reverse("viewer-all"))+"\n"))
	r4, audit4 := secureServer(t, p, func(c *server.Config) { c.Security.WebConfig = anyWeb })

	type want struct{ reason, claimed string }
	for _, tc := range []struct {
		name  string
		do    func() error
		audit *access.Memory
		act   string
		want  want
	}{
		{"http wrong password", func() error {
			_, code, _, err := openHTTP(t, p, r.srv.HTTPAddr(), nil, "/metrics", "viewer-all", "guess")
			return expectCode(code, err, http.StatusUnauthorized)
		}, audit, "http GET /metrics", want{access.ReasonBadPassword, "viewer-all"}},
		{"http unknown user", func() error {
			_, code, _, err := openHTTP(t, p, r.srv.HTTPAddr(), nil, "/", "mallory", "x")
			return expectCode(code, err, http.StatusUnauthorized)
		}, audit, "http GET /", want{access.ReasonUnknownUser, "mallory"}},
		{"http no credentials", func() error {
			_, code, _, err := openHTTP(t, p, r.srv.HTTPAddr(), nil, "/journal", "", "")
			return expectCode(code, err, http.StatusUnauthorized)
		}, audit, "http GET /journal", want{access.ReasonNoCredentials, ""}},
		{"grpc no certificate", grpcRefused(t, r, p, nil), audit, "grpc connect", want{access.ReasonNoCertificate, ""}},
		{"grpc another CA", grpcRefused(t, r, p, foreign), audit, "grpc connect", want{access.ReasonBadCertificate, "viewer-all"}},
		{"grpc expired", grpcRefused(t, r, p, expired), audit, "grpc connect", want{access.ReasonExpiredCertificate, "viewer-all"}},
		{"http no certificate", httpRefused(t, p, r2, nil), audit2, "http connect", want{access.ReasonNoCertificate, ""}},
		{"http another CA", httpRefused(t, p, r2, foreign), audit2, "http connect", want{access.ReasonBadCertificate, "viewer-all"}},
		{"http expired", httpRefused(t, p, r2, expired), audit2, "http connect", want{access.ReasonExpiredCertificate, "viewer-all"}},
		{"http certificate without an allowed SAN", httpRefused(t, p, r3, p.clients["viewer-all"]), audit3, "http connect", want{access.ReasonBadCertificate, "viewer-all"}},
		{"http unverified certificate, no credentials", func() error {
			_, code, _, err := openHTTP(t, p, r4.srv.HTTPAddr(), foreign, "/", "", "")
			return expectCode(code, err, http.StatusUnauthorized)
		}, audit4, "http GET /", want{access.ReasonNoCredentials, "viewer-all"}},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if err := tc.do(); err != nil {
				t.Fatal(err)
			}
			var got []access.Entry
			waitFor(t, "the audit entry", func() bool {
				got = denialsBy(tc.audit, tc.act, tc.want.reason)
				return len(got) > 0
			})
			e := got[len(got)-1]
			wantID := "anonymous"
			if tc.want.claimed != "" {
				wantID = tc.want.claimed + " (not authenticated)"
			}
			if e.Identity != wantID || !strings.HasPrefix(e.Source, "127.0.0.1:") || e.Time.IsZero() {
				t.Errorf("entry %+v, want identity %q from 127.0.0.1", e, wantID)
			}
		})
	}
	// A certificate of the plant's CA is verified and identifies its
	// holder (genvelope's own TLS handshake on HTTP keeps the verified
	// chain for the request).
	if _, code, body, err := openHTTP(t, p, r2.srv.HTTPAddr(), p.clients["viewer-all"], "/", "", ""); err != nil || code != http.StatusOK ||
		!strings.Contains(body, "Signed in as <strong data-signed-in>viewer-all</strong>") {
		t.Errorf("a valid client certificate over HTTP: %d %v, want the page signed in as viewer-all", code, err)
	}
	fams := scrapeAs(t, p, r)
	for _, reason := range []string{access.ReasonBadPassword, access.ReasonUnknownUser, access.ReasonNoCredentials, access.ReasonNoCertificate, access.ReasonBadCertificate, access.ReasonExpiredCertificate} {
		if v, _ := metricValue(fams, "genvelope_access_denied_total", map[string]string{"reason": reason}); v < 1 {
			t.Errorf("genvelope_access_denied_total{reason=%q} = %v, want at least 1", reason, v)
		}
	}
	// The journal has them too.
	es, _, err := r.srv.Journal().Query(journal.Filter{Changes: []string{journal.ChangeDenied}}, 100, "")
	if err != nil {
		t.Fatal(err)
	}
	text := ""
	for _, e := range es {
		text += e.Message + "\n"
	}
	for _, s := range []string{"(bad_password)", "(unknown_user)", "(expired_certificate)", "viewer-all (not authenticated) from 127.0.0.1:"} {
		if !strings.Contains(text, s) {
			t.Errorf("journal lacks %q:\n%s", s, text)
		}
	}
}

func expectCode(code int, err error, want int) error {
	if err != nil {
		return err
	}
	if code != want {
		return fmt.Errorf("status %d, want %d", code, want)
	}
	return nil
}

// grpcRefused returns a call that expects the handshake refused.
func grpcRefused(t *testing.T, r *running, p *pki, client *testpki.Leaf) func() error {
	return func() error {
		conn := dial(t, r.srv.GRPCAddr(), p.ca.Pool(), client)
		defer conn.Close()
		ctx, cancel := context.WithTimeout(context.Background(), waitLong)
		defer cancel()
		_, err := pb.NewFleetServiceClient(conn).ListUnits(ctx, &pb.ListUnitsRequest{})
		if status.Code(err) != codes.Unavailable {
			return fmt.Errorf("got %v, want the handshake refused", err)
		}
		return nil
	}
}

// httpRefused returns a request that expects the TLS handshake (or the
// first read after it, in TLS 1.3) to fail.
func httpRefused(t *testing.T, p *pki, r *running, client *testpki.Leaf) func() error {
	return func() error {
		_, code, _, err := openHTTP(t, p, r.srv.HTTPAddr(), client, "/healthz", "", "")
		if err == nil {
			return fmt.Errorf("served (%d), want the handshake refused", code)
		}
		return nil
	}
}

// A viewer scoped to one site gets the overview, its refresh, /metrics
// and the journal filtered to that site's units, and a unit of another
// site answered as one that does not exist; the viewer of everything
// sees everything.
func TestScopedViewer(t *testing.T) {
	p := newPKI(t)
	r, _ := secureServer(t, p, func(c *server.Config) { c.JournalPath = filepath.Join(t.TempDir(), "journal.jsonl") })
	get := func(path, user string) string {
		t.Helper()
		code, body := httpsDo(t, p, r, "GET", path, user, "")
		if code != http.StatusOK {
			t.Fatalf("GET %s as %s: %d %s", path, user, code, body)
		}
		return body
	}
	others := []string{"harrowmere-1", "brindle-gt3", "harrowmere", "brindle-flats"}
	for _, path := range []string{"/", "/journal", "/fleet/live"} {
		body := get(path, "viewer-larchwater")
		if !strings.Contains(body, "larchwater-2") {
			t.Errorf("%s for the larchwater viewer lacks its unit", path)
		}
		for _, o := range others {
			if strings.Contains(body, o) {
				t.Errorf("%s for the larchwater viewer reveals %q", path, o)
			}
		}
		all := get(path, "viewer-all")
		if !strings.Contains(all, "harrowmere-1") || !strings.Contains(all, "brindle-gt3") {
			t.Errorf("%s for the viewer of everything lacks units", path)
		}
	}
	var live struct {
		Units []struct{ Unit string } `json:"units"`
	}
	if err := json.Unmarshal([]byte(get("/fleet/live", "viewer-larchwater")), &live); err != nil || len(live.Units) != 1 || live.Units[0].Unit != "larchwater-2" {
		t.Errorf("/fleet/live units %+v (%v), want larchwater-2 only", live.Units, err)
	}

	// The unit page of another site looks like a unit that does not exist.
	code, hidden := httpsDo(t, p, r, "GET", "/units/harrowmere-1", "viewer-larchwater", "")
	_, absent := httpsDo(t, p, r, "GET", "/units/harrowmere-9", "viewer-larchwater", "")
	// Alike but for the id and the clock.
	digits := regexp.MustCompile(`[0-9]`)
	if code != http.StatusNotFound || digits.ReplaceAllString(strings.ReplaceAll(hidden, "harrowmere-1", "X"), "0") != digits.ReplaceAllString(strings.ReplaceAll(absent, "harrowmere-9", "X"), "0") {
		t.Errorf("another site's unit: %d, and its page differs from a missing unit's", code)
	}

	code, hiddenLive := httpsDo(t, p, r, "GET", "/units/harrowmere-1/live", "viewer-larchwater", "")
	_, absentLive := httpsDo(t, p, r, "GET", "/units/harrowmere-9/live", "viewer-larchwater", "")
	if code != http.StatusNotFound || strings.ReplaceAll(hiddenLive, "harrowmere-1", "X") != strings.ReplaceAll(absentLive, "harrowmere-9", "X") {
		t.Errorf("another site's unit's refresh: %d %q, a missing unit's %q", code, hiddenLive, absentLive)
	}

	// /metrics: the site's unit series, the service's own series, the
	// unit count of the scope.
	code, body := httpsDo(t, p, r, "GET", "/metrics", "viewer-larchwater", "")
	if code != http.StatusOK {
		t.Fatalf("/metrics: %d", code)
	}
	for _, line := range strings.Split(body, "\n") {
		if strings.HasPrefix(line, "#") || !strings.Contains(line, `unit="`) {
			continue
		}
		if !strings.Contains(line, `unit="larchwater-2"`) {
			t.Errorf("/metrics for the larchwater viewer: %s", line)
		}
	}
	for _, want := range []string{"genvelope_fleet_units 1\n", "genvelope_access_denied_total{", "go_goroutines ", `genvelope_alarm_level{unit="larchwater-2"`} {
		if !strings.Contains(body, want) {
			t.Errorf("/metrics for the larchwater viewer lacks %q", want)
		}
	}
	if all := scrapeAs(t, p, r); len(all["genvelope_unit_info"].GetMetric()) != 3 {
		t.Errorf("the viewer of everything scrapes %d units, want 3", len(all["genvelope_unit_info"].GetMetric()))
	}
}

// Keepalive enforcement with a real gRPC client: one pinging more often
// than the policy allows is sent GOAWAY too_many_pings; an idle
// connection is closed after the idle timeout.
func TestKeepaliveEnforced(t *testing.T) {
	t.Run("idle connection closed", func(t *testing.T) {
		r := start(t, server.Config{Limits: server.Limits{GRPCIdle: 200 * time.Millisecond}})
		conn, frames := framedClient(t, r.srv.GRPCAddr())
		if _, err := pb.NewFleetServiceClient(conn).ListUnits(ctxT(t), &pb.ListUnitsRequest{}); err != nil {
			t.Fatal(err)
		}
		goAway := frames.waitGoAway(t)
		if goAway.ErrCode != http2.ErrCodeNo {
			t.Errorf("idle GOAWAY code %v, want NO_ERROR", goAway.ErrCode)
		}
		waitState(t, conn, connectivity.Idle)
	})
	t.Run("too many pings", func(t *testing.T) {
		if testing.Short() {
			t.Skip("the client pings every 10 s (grpc-go's least interval): about 40 s")
		}
		// The server allows a ping a minute; the client pings every 10 s
		// (grpc-go's least keepalive interval); the third ping too early
		// is the last the policy takes.
		r := start(t, server.Config{Limits: server.Limits{PingMinTime: time.Minute}})
		conn, frames := framedClient(t, r.srv.GRPCAddr(), grpc.WithKeepaliveParams(keepalive.ClientParameters{Time: 10 * time.Second, Timeout: 5 * time.Second, PermitWithoutStream: true}))
		if _, err := pb.NewFleetServiceClient(conn).ListUnits(ctxT(t), &pb.ListUnitsRequest{}); err != nil {
			t.Fatal(err)
		}
		goAway := frames.waitGoAway(t)
		if goAway.ErrCode != http2.ErrCodeEnhanceYourCalm || goAway.Debug != "too_many_pings" {
			t.Errorf("GOAWAY %v %q, want ENHANCE_YOUR_CALM too_many_pings", goAway.ErrCode, goAway.Debug)
		}
	})
}

// frameLog reads a copy of what the server sends a client as HTTP/2
// frames and keeps the GOAWAY frames.
type frameLog struct {
	mu     sync.Mutex
	goAway []*goAway
	done   chan struct{}
}

// goAway is a GOAWAY frame's code and debug data.
type goAway struct {
	ErrCode http2.ErrCode
	Debug   string
}

func (f *frameLog) waitGoAway(t *testing.T) *goAway {
	t.Helper()
	var g *goAway
	waitFor(t, "a GOAWAY frame from the server", func() bool {
		f.mu.Lock()
		defer f.mu.Unlock()
		if len(f.goAway) > 0 {
			g = f.goAway[0]
		}
		return g != nil
	})
	return g
}

// framedClient dials addr (plaintext) with a real gRPC client whose
// connections copy what they read to a frame parser.
func framedClient(t *testing.T, addr string, opts ...grpc.DialOption) (*grpc.ClientConn, *frameLog) {
	t.Helper()
	fl := &frameLog{done: make(chan struct{})}
	var once sync.Once
	dialer := func(ctx context.Context, a string) (net.Conn, error) {
		c, err := (&net.Dialer{}).DialContext(ctx, "tcp", a)
		if err != nil {
			return nil, err
		}
		pr, pw := io.Pipe()
		once.Do(func() {
			go readGoAways(pr, func(g *http2.GoAwayFrame) {
				fl.mu.Lock()
				fl.goAway = append(fl.goAway, &goAway{ErrCode: g.ErrCode, Debug: string(g.DebugData())})
				fl.mu.Unlock()
			})
			t.Cleanup(func() { pw.Close() })
			c = &teeConn{Conn: c, w: pw}
		})
		return c, nil
	}
	conn, err := grpc.NewClient("passthrough:///"+addr, append([]grpc.DialOption{grpc.WithTransportCredentials(insecure.NewCredentials()), grpc.WithContextDialer(dialer)}, opts...)...)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	return conn, fl
}

// readGoAways parses the HTTP/2 frames a server sent (copied to pr) and
// calls on for each GOAWAY, until the copy ends.
func readGoAways(pr *io.PipeReader, on func(*http2.GoAwayFrame)) {
	fr := http2.NewFramer(io.Discard, pr)
	for {
		f, err := fr.ReadFrame()
		if err != nil {
			pr.CloseWithError(err)
			return
		}
		if g, ok := f.(*http2.GoAwayFrame); ok {
			on(g)
		}
	}
}

// teeConn copies what it reads to w (the frame parser); the copy stops
// when the parser stops.
type teeConn struct {
	net.Conn
	w      *io.PipeWriter
	broken bool
}

func (c *teeConn) Read(b []byte) (int, error) {
	n, err := c.Conn.Read(b)
	if n > 0 && !c.broken {
		if _, werr := c.w.Write(b[:n]); werr != nil {
			c.broken = true
		}
	}
	return n, err
}

func (c *teeConn) Close() error {
	c.w.Close()
	return c.Conn.Close()
}

func waitState(t *testing.T, conn *grpc.ClientConn, want connectivity.State) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	for s := conn.GetState(); s != want; s = conn.GetState() {
		if !conn.WaitForStateChange(ctx, s) {
			t.Fatalf("connection state %v, never %v", s, want)
		}
	}
}
