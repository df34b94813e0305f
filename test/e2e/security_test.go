package e2e

import (
	"crypto/tls"
	"fmt"
	"io"
	"net/http"
	"testing"
	"time"

	"golang.org/x/crypto/bcrypt"
	"google.golang.org/grpc/credentials"

	"github.com/genvelope/genvelope/test/testenv"
	"github.com/genvelope/genvelope/test/testpki"
)

// security is the test plant's certificates, web configuration and
// access file: a gateway certificate (CN gw-e2e, telemetry_writer) and
// a basic-auth user for Prometheus (viewer).
type security struct {
	ca                                               *testpki.CA
	caPath, serverCert, serverKey, webConfig, access string
	gateway                                          *testpki.Leaf
	client                                           *http.Client
}

const (
	promUser     = "prometheus"
	promPassword = "scrape-e2e-secret"
)

func newSecurity(t *testing.T, dir string) *security {
	t.Helper()
	s := &security{ca: testpki.NewCA(t, "e2e plant CA")}
	s.caPath = testpki.Write(t, dir, "ca.crt", s.ca.PEM)
	s.serverCert, s.serverKey = testpki.WriteLeaf(t, dir, "server", s.ca.Server(t))
	s.gateway = s.ca.Client(t, "gw-e2e")
	hash, err := bcrypt.GenerateFromPassword([]byte(promPassword), bcrypt.MinCost)
	if err != nil {
		t.Fatal(err)
	}
	s.webConfig = testpki.Write(t, dir, "web.yaml", []byte(fmt.Sprintf(
		"tls_server_config:\n  cert_file: server.crt\n  key_file: server.key\nbasic_auth_users:\n  %s: %s\n", promUser, hash)))
	s.access = testpki.Write(t, dir, "access.yaml", []byte(`identities:
  - {name: gw-e2e, grants: [{role: telemetry_writer}]}
  - {name: prometheus, grants: [{role: viewer}]}
`))
	s.client = &http.Client{Timeout: testenv.WaitLong, Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: s.ca.Pool(), ServerName: "localhost"}}}
	t.Cleanup(s.client.CloseIdleConnections)
	return s
}

func (s *security) grpcCreds() credentials.TransportCredentials {
	return credentials.NewTLS(&tls.Config{RootCAs: s.ca.Pool(), ServerName: "localhost", Certificates: []tls.Certificate{s.gateway.TLS}})
}

// scrapeConfig is the scrape job's TLS and basic-auth settings.
func (s *security) scrapeConfig() string {
	return fmt.Sprintf(`    scheme: https
    tls_config:
      ca_file: %q
      server_name: localhost
    basic_auth:
      username: %s
      password: %s
`, s.caPath, promUser, promPassword)
}

// do GETs u over TLS as Prometheus' user.
func (s *security) do(u string) (*http.Response, error) {
	req, err := http.NewRequest("GET", u, nil)
	if err != nil {
		return nil, err
	}
	req.SetBasicAuth(promUser, promPassword)
	return s.client.Do(req)
}

func (s *security) get(t *testing.T, p *testenv.Proc, u string) []byte {
	t.Helper()
	resp, err := s.do(u)
	if err != nil {
		p.Failf(t, "GET %s: %v", u, err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil || resp.StatusCode != http.StatusOK {
		p.Failf(t, "GET %s: %s, %v", u, resp.Status, err)
	}
	return b
}

// waitReady waits until u answers 200 over TLS with the credentials.
func (s *security) waitReady(t *testing.T, p *testenv.Proc, u string) {
	t.Helper()
	deadline := time.Now().Add(testenv.WaitLong)
	for {
		resp, err := s.do(u)
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				return
			}
		}
		if p.Exited() || time.Now().After(deadline) {
			p.Failf(t, "GET %s: not ready (%v)", u, err)
		}
		time.Sleep(50 * time.Millisecond)
	}
}
