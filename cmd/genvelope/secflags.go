package main

import (
	"crypto/tls"
	"crypto/x509"
	"errors"
	"flag"
	"fmt"
	"os"
	"strings"

	"google.golang.org/grpc/credentials"

	"github.com/genvelope/genvelope/service/server"
)

// addSecurityFlags adds serve's TLS, access and exposure flags.
func addSecurityFlags(fs *flag.FlagSet) *server.Security {
	sec := &server.Security{}
	fs.StringVar(&sec.GRPCTLSCert, "grpc-tls-cert", "", "gRPC server certificate chain `FILE` (PEM); re-read when it changes")
	fs.StringVar(&sec.GRPCTLSKey, "grpc-tls-key", "", "gRPC server private key `FILE` (PEM)")
	fs.StringVar(&sec.GRPCClientCA, "grpc-client-ca", "", "CA certificates `FILE` (PEM): every gRPC client must present a certificate from them (mutual TLS)")
	fs.DurationVar(&sec.CertRefresh, "cert-refresh", 0, "how often the gRPC certificate files are checked for changes (default 1m)")
	fs.StringVar(&sec.WebConfig, "web-config", "", "HTTP web configuration `FILE` (Prometheus exporter-toolkit format: tls_server_config, basic_auth_users with bcrypt hashes)")
	fs.StringVar(&sec.AccessFile, "access", "", "access `FILE` (YAML): identities and their roles over sites and units; re-read with the fleet. Without it everyone may do everything")
	fs.BoolVar(&sec.InsecurePlaintext, "insecure-plaintext", false, "allow listening on a non-loopback address without TLS (refused otherwise)")
	fs.Func("http-host", "a host `NAME` the HTTP listener answers to (repeat or comma-separate); IP addresses, localhost and the listen address are always allowed", func(v string) error {
		for _, h := range strings.Split(v, ",") {
			if h = strings.TrimSpace(h); h != "" {
				sec.HTTPHosts = append(sec.HTTPHosts, h)
			}
		}
		return nil
	})
	fs.StringVar(&sec.PprofListen, "pprof-listen", "", "serve /debug/pprof/ on this `ADDR` of its own (admin role, same web configuration)")
	return sec
}

// clientTLS is a gRPC client's TLS settings (replay).
type clientTLS struct {
	ca, cert, key, serverName string
}

// addClientTLSFlags adds a client's TLS flags.
func addClientTLSFlags(fs *flag.FlagSet) *clientTLS {
	c := &clientTLS{}
	fs.StringVar(&c.ca, "tls-ca", "", "connect over TLS, trusting the CA certificates in `FILE` (PEM)")
	fs.StringVar(&c.cert, "tls-cert", "", "client certificate `FILE` (PEM) for mutual TLS; its CN or SAN is the identity in the service's access file")
	fs.StringVar(&c.key, "tls-key", "", "client key `FILE` (PEM)")
	fs.StringVar(&c.serverName, "tls-server-name", "", "the name the service's certificate must carry (default: the target's host)")
	return c
}

// creds returns the transport credentials, or nil for plaintext.
func (c *clientTLS) creds() (credentials.TransportCredentials, error) {
	if c == nil || (c.ca == "" && c.cert == "" && c.key == "") {
		return nil, nil
	}
	if c.ca == "" {
		return nil, errors.New("--tls-cert and --tls-key need --tls-ca, the CA that signed the service's certificate")
	}
	pem, err := os.ReadFile(c.ca)
	if err != nil {
		return nil, fmt.Errorf("--tls-ca: %w", err)
	}
	roots := x509.NewCertPool()
	if !roots.AppendCertsFromPEM(pem) {
		return nil, fmt.Errorf("--tls-ca %s: no PEM certificate in it", c.ca)
	}
	tc := &tls.Config{RootCAs: roots, ServerName: c.serverName, MinVersion: tls.VersionTLS12}
	if c.cert != "" || c.key != "" {
		kp, err := tls.LoadX509KeyPair(c.cert, c.key)
		if err != nil {
			return nil, fmt.Errorf("--tls-cert/--tls-key: %w", err)
		}
		tc.Certificates = []tls.Certificate{kp}
	}
	return credentials.NewTLS(tc), nil
}
