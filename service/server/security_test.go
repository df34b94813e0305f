package server_test

import (
	"context"
	"crypto/tls"
	"crypto/x509"
	"io"
	"log/slog"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"
	"golang.org/x/crypto/bcrypt"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/peer"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/types/known/durationpb"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/access"
	"github.com/genvelope/genvelope/service/journal"
	"github.com/genvelope/genvelope/service/server"
	"github.com/genvelope/genvelope/test/testpki"
)

// The access file of these tests: a telemetry gateway for the harrowmere
// site, an operator of harrowmere, a viewer of everything, an admin.
const testAccess = `identities:
  - name: gw-harrowmere
    grants: [{role: telemetry_writer, sites: [harrowmere]}]
  - name: op-harrowmere
    grants: [{role: operator, sites: [harrowmere]}]
  - name: viewer-all
    grants: [{role: viewer}]
  - name: viewer-larchwater
    grants: [{role: viewer, sites: [larchwater]}]
  - name: admin
    grants: [{role: admin}]
`

// pki is one test plant's certificates, written to a directory.
type pki struct {
	dir                string
	ca, other          *testpki.CA
	caPath             string
	serverCert, srvKey string
	clients            map[string]*testpki.Leaf
}

func newPKI(t *testing.T) *pki {
	p := &pki{dir: t.TempDir(), ca: testpki.NewCA(t, "plant test CA"), other: testpki.NewCA(t, "another CA"), clients: map[string]*testpki.Leaf{}}
	p.caPath = testpki.Write(t, p.dir, "ca.crt", p.ca.PEM)
	p.serverCert, p.srvKey = testpki.WriteLeaf(t, p.dir, "server", p.ca.Server(t))
	for _, cn := range []string{"gw-harrowmere", "op-harrowmere", "viewer-all", "admin", "stranger"} {
		p.clients[cn] = p.ca.Client(t, cn)
	}
	return p
}

func bcryptHash(t *testing.T, pw string) string {
	h, err := bcrypt.GenerateFromPassword([]byte(pw), bcrypt.MinCost)
	if err != nil {
		t.Fatal(err)
	}
	return string(h)
}

// secureServer starts a server with mutual TLS on gRPC, TLS and
// basic-auth users (viewer-all, admin; the password is the name
// reversed) on HTTP, the access file and an audit log.
func secureServer(t *testing.T, p *pki, mutate func(*server.Config)) (*running, *access.Memory) {
	t.Helper()
	audit := &access.Memory{}
	webCfg := "tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\nbasic_auth_users:\n" +
		"  viewer-all: " + bcryptHash(t, "lla-reweiv") + "\n  admin: " + bcryptHash(t, "nimda") + "\n" +
		"  viewer-larchwater: " + bcryptHash(t, "retawhcral-reweiv") + "\n"
	cfg := server.Config{
		FleetPath: exampleFleet, GRPCListen: "127.0.0.1:0", HTTPListen: "127.0.0.1:0",
		Logger: slog.New(slog.NewTextHandler(io.Discard, nil)),
		Security: server.Security{
			GRPCTLSCert: p.serverCert, GRPCTLSKey: p.srvKey, GRPCClientCA: p.caPath,
			AccessFile: testpki.Write(t, p.dir, "access.yaml", []byte(testAccess)),
			Auditor:    audit, CertRefresh: 50 * time.Millisecond,
			WebConfig: testpki.Write(t, p.dir, "web.yaml", []byte(webCfg)),
		},
	}
	if mutate != nil {
		mutate(&cfg)
	}
	srv, err := server.New(cfg)
	if err != nil {
		t.Fatalf("server.New: %v", err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	r := &running{srv: srv, base: "https://" + srv.HTTPAddr(), cancel: cancel, done: make(chan error, 1)}
	go func() { r.done <- srv.Run(ctx) }()
	t.Cleanup(func() {
		cancel()
		<-r.done
	})
	return r, audit
}

// httpsDo makes one request to a secureServer as user (password: the
// name reversed; "" for none) and returns the status and body.
func httpsDo(t *testing.T, p *pki, r *running, method, path, user, host string, header ...string) (int, string) {
	t.Helper()
	client := &http.Client{Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: p.ca.Pool(), ServerName: "localhost"}}}
	defer client.CloseIdleConnections()
	req, _ := http.NewRequest(method, r.base+path, nil)
	if user != "" {
		rs := []rune(user)
		for i, j := 0, len(rs)-1; i < j; i, j = i+1, j-1 {
			rs[i], rs[j] = rs[j], rs[i]
		}
		req.SetBasicAuth(user, string(rs))
	}
	if host != "" {
		req.Host = host
	}
	for i := 0; i+1 < len(header); i += 2 {
		req.Header.Set(header[i], header[i+1])
	}
	resp, err := client.Do(req)
	if err != nil {
		t.Fatalf("%s %s: %v", method, path, err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}

// scrapeAs fetches /metrics from a secureServer as the viewer.
func scrapeAs(t *testing.T, p *pki, r *running) map[string]*dto.MetricFamily {
	t.Helper()
	code, body := httpsDo(t, p, r, "GET", "/metrics", "viewer-all", "")
	if code != http.StatusOK {
		t.Fatalf("GET /metrics: %d %s", code, body)
	}
	parser := expfmt.NewTextParser(model.UTF8Validation)
	fams, err := parser.TextToMetricFamilies(strings.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	return fams
}

// dial returns a gRPC connection presenting client (nil: none) and
// trusting roots.
func dial(t *testing.T, addr string, roots *x509.CertPool, client *testpki.Leaf) *grpc.ClientConn {
	t.Helper()
	tc := &tls.Config{RootCAs: roots, ServerName: "localhost", MinVersion: tls.VersionTLS12}
	if client != nil {
		tc.Certificates = []tls.Certificate{client.TLS}
	}
	conn, err := grpc.NewClient(addr, grpc.WithTransportCredentials(credentials.NewTLS(tc)))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	return conn
}

// A client without a certificate, with one from another CA, or with an
// expired one is refused at the handshake; one from the plant's CA is
// served.
func TestGRPCMutualTLS(t *testing.T) {
	p := newPKI(t)
	r, _ := secureServer(t, p, nil)
	expired := p.ca.Issue(t, testpki.Options{CN: "viewer-all", NotAfter: time.Now().Add(-time.Hour)})
	for _, tc := range []struct {
		name   string
		client *testpki.Leaf
		ok     bool
	}{
		{"no certificate", nil, false},
		{"another CA", p.other.Client(t, "viewer-all"), false},
		{"expired", expired, false},
		{"plant CA", p.clients["viewer-all"], true},
	} {
		t.Run(tc.name, func(t *testing.T) {
			conn := dial(t, r.srv.GRPCAddr(), p.ca.Pool(), tc.client)
			ctx, cancel := context.WithTimeout(context.Background(), waitLong)
			defer cancel()
			_, err := pb.NewFleetServiceClient(conn).ListUnits(ctx, &pb.ListUnitsRequest{})
			if tc.ok && err != nil {
				t.Fatalf("refused: %v", err)
			}
			if !tc.ok && status.Code(err) != codes.Unavailable {
				t.Fatalf("got %v, want the handshake refused (UNAVAILABLE)", err)
			}
		})
	}
}

// A renewed server certificate written over the old files is served to
// new connections without a restart.
func TestGRPCCertificateReload(t *testing.T) {
	p := newPKI(t)
	r, _ := secureServer(t, p, nil)
	servedCN := func() string {
		conn := dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["viewer-all"])
		defer conn.Close()
		var pr peer.Peer
		ctx, cancel := context.WithTimeout(context.Background(), waitLong)
		defer cancel()
		if _, err := pb.NewFleetServiceClient(conn).ListUnits(ctx, &pb.ListUnitsRequest{}, grpc.Peer(&pr)); err != nil {
			t.Fatalf("ListUnits: %v", err)
		}
		return pr.AuthInfo.(credentials.TLSInfo).State.PeerCertificates[0].Subject.CommonName
	}
	if cn := servedCN(); cn != "genvelope-test" {
		t.Fatalf("served %q first", cn)
	}
	renewed := p.ca.Issue(t, testpki.Options{CN: "genvelope-renewed", DNS: []string{"localhost"}, Server: true})
	// Key first, then certificate; the provider only takes a matching pair.
	testpki.Write(t, p.dir, "server.key", renewed.KeyPEM)
	testpki.Write(t, p.dir, "server.crt", renewed.CertPEM)
	deadline := time.Now().Add(waitLong)
	for servedCN() != "genvelope-renewed" {
		if time.Now().After(deadline) {
			t.Fatal("the renewed certificate was never served")
		}
		time.Sleep(20 * time.Millisecond)
	}
}

func sampleAt(unit string, at time.Time, pMW, qMvar, vKV float64) *pb.Sample {
	return &pb.Sample{UnitId: unit, Time: timestamppb.New(at), PMw: pMW, QMvar: qMvar, VKv: vKV}
}

// A writer's samples for units it may not push for are rejected, the
// good samples beside them accepted, and the denials counted and
// audited: for a unit the writer may view, as permission_denied; for one
// it may not view (another site's, or one not in the fleet), as
// unknown_unit, the answer of a unit not in the fleet.
func TestPushPermissionDenied(t *testing.T) {
	p := newPKI(t)
	p.clients["gw-seeing"] = p.ca.Client(t, "gw-seeing")
	accessFile := testAccess + "  - name: gw-seeing\n    grants: [{role: telemetry_writer, sites: [harrowmere]}, {role: viewer}]\n"
	r, audit := secureServer(t, p, func(c *server.Config) {
		c.JournalPath = filepath.Join(p.dir, "journal.jsonl")
		c.Security.AccessFile = testpki.Write(t, p.dir, "access-seeing.yaml", []byte(accessFile))
	})
	now := time.Now().Add(-time.Second)
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	for i, tc := range []struct {
		who  string
		want pb.RejectReason
	}{
		{"gw-harrowmere", pb.RejectReason_REJECT_REASON_UNKNOWN_UNIT},
		{"gw-seeing", pb.RejectReason_REJECT_REASON_PERMISSION_DENIED},
	} {
		tel := pb.NewTelemetryServiceClient(dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients[tc.who]))
		at := now.Add(time.Duration(i) * 200 * time.Millisecond)
		resp, err := tel.Push(ctx, &pb.PushRequest{Sequence: 1, Samples: []*pb.Sample{
			sampleAt("harrowmere-1", at, 300, 100, 20.4),
			sampleAt("larchwater-2", at, 60, 10, 13.8),
			sampleAt("harrowmere-1", at.Add(100*time.Millisecond), 300, 101, 20.4),
			sampleAt("no-such-unit", at, 1, 1, 1),
		}})
		if err != nil {
			t.Fatalf("%s Push: %v", tc.who, err)
		}
		if resp.Accepted != 2 || len(resp.Rejected) != 2 {
			t.Fatalf("%s: accepted %d, rejected %v; want 2 accepted and 2 rejected", tc.who, resp.Accepted, resp.Rejected)
		}
		for j, want := range []struct {
			index  uint32
			reason pb.RejectReason
		}{{1, tc.want}, {3, pb.RejectReason_REJECT_REASON_UNKNOWN_UNIT}} {
			if rj := resp.Rejected[j]; rj.Index != want.index || rj.Reason != want.reason {
				t.Errorf("%s rejection %d: index %d reason %v, want index %d %v", tc.who, j, rj.Index, rj.Reason, want.index, want.reason)
			}
		}
	}
	if got := len(audit.Find("grpc push", access.OutcomeDenied)); got != 2 {
		t.Errorf("%d audit entries for the pushes, want 1 for each batch", got)
	}
	// The denials are in the durable journal too.
	entries, _, err := r.srv.Journal().Matching(journal.Filter{Changes: []string{journal.ChangeDenied}}, 10)
	if err != nil || len(entries) != 2 || !strings.Contains(entries[0].Message, "permission_denied") {
		t.Errorf("journal denials %+v (%v), want one by each writer", entries, err)
	}
	for _, e := range entries {
		if e.Operator != "gw-harrowmere" && e.Operator != "gw-seeing" {
			t.Errorf("journal denial by %q, want the writers", e.Operator)
		}
	}
	fams := scrapeAs(t, p, r)
	for _, m := range []struct {
		name, label, value string
		want               float64
	}{
		{"genvelope_access_denied_total", "reason", "permission_denied", 4},
		{"genvelope_samples_total", "result", "permission_denied", 1},
		{"genvelope_samples_total", "result", "unknown_unit", 3},
		{"genvelope_samples_total", "result", "accepted", 4},
	} {
		if v, _ := metricValue(fams, m.name, map[string]string{m.label: m.value}); v != m.want {
			t.Errorf("%s{%s=%s} = %v, want %v", m.name, m.label, m.value, v, m.want)
		}
	}
}

// Operator actions over gRPC: each identity against each action, with
// what the rights say; every denial is in the audit, every allowed
// action too, under the certificate's identity, not the typed name.
func TestGRPCRights(t *testing.T) {
	p := newPKI(t)
	r, audit := secureServer(t, p, nil)
	shelve := func(unit string) any {
		return &pb.ShelveAlarmRequest{UnitId: unit, Limit: "field", Duration: durationpb.New(time.Hour), Operator: "typed name"}
	}
	for _, tc := range []struct {
		name, who string
		call      func(ctx context.Context, c pb.AlarmServiceClient) error
		want      codes.Code
	}{
		{"viewer acknowledges", "viewer-all", func(ctx context.Context, c pb.AlarmServiceClient) error {
			_, err := c.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: "harrowmere-1", Limit: "field"})
			return err
		}, codes.PermissionDenied},
		{"operator of harrowmere shelves larchwater: answered as a unit not in the fleet", "op-harrowmere", func(ctx context.Context, c pb.AlarmServiceClient) error {
			_, err := c.ShelveAlarm(ctx, shelve("larchwater-2").(*pb.ShelveAlarmRequest))
			return err
		}, codes.NotFound},
		{"stranger lists alarms", "stranger", func(ctx context.Context, c pb.AlarmServiceClient) error {
			_, err := c.ListAlarms(ctx, &pb.ListAlarmsRequest{})
			return err
		}, codes.Unauthenticated},
		{"writer watches", "gw-harrowmere", func(ctx context.Context, c pb.AlarmServiceClient) error {
			st, err := c.WatchAlarms(ctx, &pb.WatchAlarmsRequest{})
			if err != nil {
				return err
			}
			_, err = st.Recv()
			return err
		}, codes.PermissionDenied},
		{"operator of harrowmere shelves harrowmere", "op-harrowmere", func(ctx context.Context, c pb.AlarmServiceClient) error {
			_, err := c.ShelveAlarm(ctx, shelve("harrowmere-1").(*pb.ShelveAlarmRequest))
			return err
		}, codes.OK},
		{"shelving for more than a day", "op-harrowmere", func(ctx context.Context, c pb.AlarmServiceClient) error {
			_, err := c.ShelveAlarm(ctx, &pb.ShelveAlarmRequest{UnitId: "harrowmere-1", Limit: "field", Duration: durationpb.New(25 * time.Hour)})
			return err
		}, codes.InvalidArgument},
	} {
		t.Run(tc.name, func(t *testing.T) {
			before := len(audit.Find("grpc", access.OutcomeDenied))
			c := pb.NewAlarmServiceClient(dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients[tc.who]))
			ctx, cancel := context.WithTimeout(context.Background(), waitLong)
			defer cancel()
			if err := tc.call(ctx, c); status.Code(err) != tc.want {
				t.Fatalf("got %v, want %v", err, tc.want)
			}
			denied := audit.Find("grpc", access.OutcomeDenied)
			if tc.want == codes.PermissionDenied || tc.want == codes.Unauthenticated || tc.want == codes.NotFound {
				if len(denied) != before+1 {
					t.Fatalf("%d new denials audited, want 1", len(denied)-before)
				}
				if e := denied[len(denied)-1]; e.Identity != tc.who || e.Source == "" || e.Time.IsZero() {
					t.Errorf("audit entry %+v lacks the identity %q, the source or the time", e, tc.who)
				}
			}
		})
	}
	done := audit.Find("grpc shelve", access.OutcomeDone)
	if len(done) != 1 || done[0].Identity != "op-harrowmere" || done[0].Target != "harrowmere-1/field" {
		t.Errorf("shelve audit entries %+v, want one by op-harrowmere on harrowmere-1/field", done)
	}
	var recorded bool
	for _, ev := range r.srv.Store().Active() {
		if ev.Unit == "harrowmere-1" && strings.Contains(ev.Message, "op-harrowmere") {
			recorded = true
		}
	}
	_ = recorded // the shelved-event text is checked through the audit; Active lists only raised alarms
}

// The HTTP side: TLS and basic-auth users from the web configuration;
// the viewer reads, may not reload or act; the admin reloads; a request
// naming another host is refused; each denial is audited.
func TestHTTPWebConfigAndRights(t *testing.T) {
	p := newPKI(t)
	r, audit := secureServer(t, p, nil)
	for _, tc := range []struct {
		name, method, path, user, host string
		want                           int
	}{
		{"no credentials", "GET", "/", "", "", http.StatusUnauthorized},
		{"health needs credentials too (web config)", "GET", "/healthz", "", "", http.StatusUnauthorized},
		{"viewer reads the overview", "GET", "/", "viewer-all", "", http.StatusOK},
		{"viewer reads a unit", "GET", "/units/harrowmere-1", "viewer-all", "", http.StatusOK},
		{"viewer scrapes", "GET", "/metrics", "viewer-all", "", http.StatusOK},
		{"viewer reloads", "POST", "/-/reload", "viewer-all", "", http.StatusForbidden},
		{"viewer acknowledges", "POST", "/units/harrowmere-1/alarms/field/acknowledge", "viewer-all", "", http.StatusForbidden},
		{"admin reloads", "POST", "/-/reload", "admin", "", http.StatusOK},
		{"admin reads pages", "GET", "/", "admin", "", http.StatusForbidden},
		{"site viewer reads its unit", "GET", "/units/larchwater-2", "viewer-larchwater", "", http.StatusOK},
		{"site viewer reads another site's unit: not revealed", "GET", "/units/harrowmere-1", "viewer-larchwater", "", http.StatusNotFound},
		{"site viewer scrapes its site", "GET", "/metrics", "viewer-larchwater", "", http.StatusOK},
		{"rebinding host", "GET", "/", "viewer-all", "attacker.example:9471", http.StatusMisdirectedRequest},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if got, body := httpsDo(t, p, r, tc.method, tc.path, tc.user, tc.host); got != tc.want {
				t.Errorf("status %d, want %d: %s", got, tc.want, body)
			}
		})
	}
	if got := audit.Find("reload", access.OutcomeDone); len(got) != 1 || got[0].Identity != "admin" {
		t.Errorf("reload audit %+v, want one by admin", got)
	}
	// The viewer's reload and acknowledge, the admin's page, the site
	// viewer's other unit, the rebinding request; and the two requests
	// without credentials, refused by the toolkit.
	var denials, noCreds int
	for _, e := range audit.Find("http", access.OutcomeDenied) {
		switch e.Reason {
		case access.ReasonNoCredentials:
			noCreds++
		default:
			denials++
		}
	}
	if denials != 5 || noCreds != 2 {
		t.Errorf("%d HTTP denials and %d requests without credentials audited, want 5 and 2", denials, noCreds)
	}
	// A cross-origin browser request to reload is refused even for the
	// admin.
	if code, body := httpsDo(t, p, r, "POST", "/-/reload", "admin", "", "Sec-Fetch-Site", "cross-site", "Origin", "https://attacker.example"); code != http.StatusForbidden {
		t.Errorf("cross-origin reload: status %d, want 403: %s", code, body)
	}
	code, body := httpsDo(t, p, r, "GET", "/units/harrowmere-1", "viewer-all", "")
	if code != http.StatusOK || !strings.Contains(body, "Signed in as <strong data-signed-in>viewer-all</strong>") || strings.Contains(body, "/acknowledge") {
		t.Errorf("unit page for the viewer: status %d, signed-in line or action forms wrong", code)
	}
}

// A plaintext listener off loopback is refused at start unless
// --insecure-plaintext, which is then visible in a metric.
func TestPlaintextOffLoopbackRefused(t *testing.T) {
	log := slog.New(slog.NewTextHandler(io.Discard, nil))
	for _, tc := range []struct {
		name       string
		grpc, http string
		insecure   bool
		wantErr    string
	}{
		{"gRPC on all interfaces", "0.0.0.0:0", "127.0.0.1:0", false, "gRPC listen address 0.0.0.0:0 is not loopback and has no TLS"},
		{"HTTP on all interfaces", "127.0.0.1:0", "[::]:0", false, "HTTP listen address [::]:0 is not loopback and has no TLS"},
		{"loopback", "127.0.0.1:0", "localhost:0", false, ""},
		{"insecure accepted", "0.0.0.0:0", "127.0.0.1:0", true, ""},
	} {
		t.Run(tc.name, func(t *testing.T) {
			srv, err := server.New(server.Config{FleetPath: exampleFleet, GRPCListen: tc.grpc, HTTPListen: tc.http, Logger: log,
				Security: server.Security{InsecurePlaintext: tc.insecure}})
			if tc.wantErr != "" {
				if err == nil || !strings.Contains(err.Error(), tc.wantErr) {
					t.Fatalf("err %v, want %q", err, tc.wantErr)
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			r := &running{srv: srv, base: "http://" + srv.HTTPAddr(), done: make(chan error, 1)}
			ctx, cancel := context.WithCancel(context.Background())
			go func() { r.done <- srv.Run(ctx) }()
			defer func() { cancel(); <-r.done }()
			want := 0.0
			if tc.insecure {
				want = 1
			}
			if v, ok := metricValue(r.scrape(t), "genvelope_insecure_plaintext", nil); !ok || v != want {
				t.Errorf("genvelope_insecure_plaintext = %v (present %v), want %v", v, ok, want)
			}
		})
	}
}

// Lists and watches answer only the caller's units.
func TestGRPCScopedLists(t *testing.T) {
	p := newPKI(t)
	r, _ := secureServer(t, p, nil)
	conn := dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["op-harrowmere"])
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	defer cancel()
	resp, err := pb.NewFleetServiceClient(conn).ListUnits(ctx, &pb.ListUnitsRequest{})
	if err != nil {
		t.Fatal(err)
	}
	if len(resp.Units) != 1 || resp.Units[0].Id != "harrowmere-1" {
		t.Errorf("op-harrowmere lists %v, want harrowmere-1 only", resp.Units)
	}
	// Another site's unit is answered as one that does not exist, and
	// neither answer names units outside the scope.
	_, hidden := pb.NewFleetServiceClient(conn).GetUnit(ctx, &pb.GetUnitRequest{UnitId: "larchwater-2"})
	_, absent := pb.NewFleetServiceClient(conn).GetUnit(ctx, &pb.GetUnitRequest{UnitId: "harrowmere-9"})
	h, a := status.Convert(hidden), status.Convert(absent)
	if h.Code() != codes.NotFound || a.Code() != codes.NotFound || strings.Replace(h.Message(), "larchwater-2", "X", 1) != strings.Replace(a.Message(), "harrowmere-9", "X", 1) {
		t.Errorf("op-harrowmere gets larchwater-2: %v; a missing unit: %v; want the same NOT_FOUND", hidden, absent)
	}
	if !strings.HasSuffix(a.Message(), "known units: harrowmere-1") {
		t.Errorf("the answer names units outside the scope: %q", a.Message())
	}
	// The coordination study: of the caller's units only (it was denied
	// to everyone under an access file).
	coord := pb.NewCoordinationServiceClient(conn)
	if cr, err := coord.GetCoordination(ctx, &pb.GetCoordinationRequest{}); err != nil || len(cr.Units) != 1 || cr.Units[0].UnitId != "harrowmere-1" {
		t.Errorf("op-harrowmere's coordination study: %v, want harrowmere-1 only", err)
	}
	if _, err := coord.GetCoordination(ctx, &pb.GetCoordinationRequest{UnitId: "larchwater-2"}); status.Code(err) != codes.NotFound {
		t.Errorf("op-harrowmere's study of larchwater-2: %v, want NOT_FOUND", err)
	}
	// The viewer of everything is told every unit.
	all := dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["viewer-all"])
	if cr, err := pb.NewCoordinationServiceClient(all).GetCoordination(ctx, &pb.GetCoordinationRequest{}); err != nil || len(cr.Units) != 3 {
		t.Errorf("viewer-all's coordination study: %v", err)
	}
	_, err = pb.NewFleetServiceClient(all).GetUnit(ctx, &pb.GetUnitRequest{UnitId: "harrowmere-9"})
	if m := status.Convert(err).Message(); status.Code(err) != codes.NotFound || !strings.Contains(m, "larchwater-2") || !strings.Contains(m, "brindle-gt3") {
		t.Errorf("viewer-all gets a missing unit: %v", err)
	}
}

// A renewed HTTP certificate (the web configuration's files) is served
// to new connections without a restart.
func TestHTTPCertificateReload(t *testing.T) {
	p := newPKI(t)
	r, _ := secureServer(t, p, nil)
	served := func() string {
		c, err := tls.Dial("tcp", r.srv.HTTPAddr(), &tls.Config{RootCAs: p.ca.Pool(), ServerName: "localhost"})
		if err != nil {
			t.Fatal(err)
		}
		defer c.Close()
		return c.ConnectionState().PeerCertificates[0].Subject.CommonName
	}
	if cn := served(); cn != "genvelope-test" {
		t.Fatalf("served %q first", cn)
	}
	renewed := p.ca.Issue(t, testpki.Options{CN: "genvelope-renewed", DNS: []string{"localhost"}, Server: true})
	testpki.Write(t, p.dir, "server.key", renewed.KeyPEM)
	testpki.Write(t, p.dir, "server.crt", renewed.CertPEM)
	waitFor(t, "the renewed HTTP certificate served", func() bool { return served() == "genvelope-renewed" })
}

// Profiling is on a listener of its own, for the admin role only.
func TestPprofListenerAdminOnly(t *testing.T) {
	p := newPKI(t)
	r, _ := secureServer(t, p, func(c *server.Config) { c.Security.PprofListen = "127.0.0.1:0" })
	prof := &running{srv: r.srv, base: "https://" + r.srv.PprofAddr()}
	for _, tc := range []struct {
		user, path string
		want       int
	}{
		{"viewer-all", "/debug/pprof/", http.StatusForbidden},
		{"admin", "/debug/pprof/", http.StatusOK},
		{"viewer-all", "/metrics", http.StatusNotFound}, // nothing else there
	} {
		if code, _ := httpsDo(t, p, prof, "GET", tc.path, tc.user, ""); code != tc.want {
			t.Errorf("%s GET %s on the profiling listener: %d, want %d", tc.user, tc.path, code, tc.want)
		}
	}
	if code, _ := httpsDo(t, p, r, "GET", "/debug/pprof/", "admin", ""); code == http.StatusOK {
		t.Error("profiles are served on the main HTTP listener too")
	}
}

// The access file is read again with the fleet: a grant added takes
// effect at the reload; a file with errors is refused and the running
// one kept.
func TestAccessFileReload(t *testing.T) {
	p := newPKI(t)
	r, audit := secureServer(t, p, nil)
	list := func() codes.Code {
		c := pb.NewFleetServiceClient(dial(t, r.srv.GRPCAddr(), p.ca.Pool(), p.clients["stranger"]))
		ctx, cancel := context.WithTimeout(context.Background(), waitLong)
		defer cancel()
		_, err := c.ListUnits(ctx, &pb.ListUnitsRequest{})
		return status.Code(err)
	}
	if got := list(); got != codes.Unauthenticated {
		t.Fatalf("stranger before the reload: %v", got)
	}
	testpki.Write(t, p.dir, "access.yaml", []byte(testAccess+"  - {name: stranger, grants: [{role: viewer}]}\n"))
	if err := r.srv.Reload(); err != nil {
		t.Fatalf("Reload: %v", err)
	}
	if got := list(); got != codes.OK {
		t.Fatalf("stranger after the grant: %v", got)
	}
	testpki.Write(t, p.dir, "access.yaml", []byte("identities:\n  - {name: stranger, grants: [{role: superuser}]}\n"))
	if err := r.srv.Reload(); err == nil || !strings.Contains(err.Error(), `role "superuser"`) {
		t.Fatalf("Reload of a bad access file: %v", err)
	}
	if got := list(); got != codes.OK {
		t.Errorf("stranger after a refused reload: %v, want the running file kept", got)
	}
	if got := audit.Find("reload", access.OutcomeFailed); len(got) != 1 {
		t.Errorf("%d failed reloads audited, want 1", len(got))
	}
}

// genvelope terminates the HTTP listener's TLS itself (to audit refused
// certificates with their subject) and hands the exporter-toolkit a copy
// of the web configuration without tls_server_config: the copy follows
// the file (a user added is let in, the file removed refuses requests),
// HTTP/2 follows http_server_config, and plain HTTP on the TLS port is
// answered 400 as net/http does.
func TestWebConfigFollowed(t *testing.T) {
	p := newPKI(t)
	r, _ := secureServer(t, p, nil)
	webPath := filepath.Join(p.dir, "web.yaml")
	orig := readFile(t, webPath)
	if code, _ := httpsDo(t, p, r, "GET", "/healthz", "viewer-lately", ""); code != http.StatusUnauthorized {
		t.Fatalf("a user the file does not have: %d, want 401", code)
	}
	writeFile(t, webPath, orig+"  viewer-lately: "+bcryptHash(t, reverse("viewer-lately"))+"\n")
	waitFor(t, "the user added to the file let in", func() bool {
		code, _ := httpsDo(t, p, r, "GET", "/healthz", "viewer-lately", "")
		return code == http.StatusOK
	})

	proto := func() string {
		c, err := tls.Dial("tcp", r.srv.HTTPAddr(), &tls.Config{RootCAs: p.ca.Pool(), ServerName: "localhost", NextProtos: []string{"h2", "http/1.1"}})
		if err != nil {
			t.Fatal(err)
		}
		defer c.Close()
		return c.ConnectionState().NegotiatedProtocol
	}
	if got := proto(); got != "h2" {
		t.Errorf("negotiated %q, want h2 (the toolkit's default)", got)
	}
	writeFile(t, webPath, orig+"http_server_config:\n  http2: false\n")
	waitFor(t, "HTTP/2 turned off", func() bool { return proto() == "http/1.1" })

	c, err := net.Dial("tcp", r.srv.HTTPAddr())
	if err != nil {
		t.Fatal(err)
	}
	defer c.Close()
	c.SetDeadline(time.Now().Add(waitLong))
	io.WriteString(c, "GET / HTTP/1.1\r\nHost: localhost\r\n\r\n")
	if b, _ := io.ReadAll(c); !strings.HasPrefix(string(b), "HTTP/1.0 400 Bad Request") {
		t.Errorf("plain HTTP on the TLS port answered %q", b)
	}

	if err := os.Remove(webPath); err != nil {
		t.Fatal(err)
	}
	client := &http.Client{Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: p.ca.Pool(), ServerName: "localhost"}}}
	defer client.CloseIdleConnections()
	req, _ := http.NewRequest("GET", r.base+"/healthz", nil)
	req.SetBasicAuth("viewer-all", reverse("viewer-all"))
	if resp, err := client.Do(req); err == nil {
		resp.Body.Close()
		t.Errorf("with the web configuration gone: %d, want the connection refused", resp.StatusCode)
	}
}

// The toolkit's copy of the web configuration lies beside the state file
// (writable in every install, where a read-only root filesystem has no
// writable /tmp), in a private directory, without the TLS part and
// without anything else lost; it is removed when the server stops.
func TestWebConfigCopyBesideState(t *testing.T) {
	p := newPKI(t)
	stateDir := t.TempDir()
	r, _ := secureServer(t, p, func(c *server.Config) { c.StatePath = filepath.Join(stateDir, "state.bin") })
	if code, body := httpsDo(t, p, r, "GET", "/healthz", "viewer-all", ""); code != http.StatusOK {
		t.Fatalf("GET /healthz: %d %s", code, body)
	}
	dir := filepath.Join(stateDir, ".genvelope-web")
	fi, err := os.Stat(dir)
	if err != nil || fi.Mode().Perm() != 0o700 {
		t.Fatalf("the copy's directory: %v %v, want mode 0700", fi, err)
	}
	copied := readFile(t, filepath.Join(dir, "web-config-http.yml"))
	if strings.Contains(copied, "tls_server_config") || strings.Contains(copied, "server.key") {
		t.Errorf("the copy keeps the TLS part:\n%s", copied)
	}
	for _, user := range []string{"viewer-all:", "admin:", "viewer-larchwater:", "$2a$"} {
		if !strings.Contains(copied, user) {
			t.Errorf("the copy lacks %q:\n%s", user, copied)
		}
	}
	r.cancel()
	err = <-r.done
	r.done <- err // for the cleanup
	if _, err := os.Stat(filepath.Join(dir, "web-config-http.yml")); !os.IsNotExist(err) {
		t.Errorf("the copy is still there after the stop: %v", err)
	}
}
