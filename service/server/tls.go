package server

import (
	"context"
	"crypto/tls"
	"errors"
	"fmt"
	"net"
	"os"
	"strings"
	"time"

	"github.com/prometheus/exporter-toolkit/web"
	"go.yaml.in/yaml/v3"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/tls/certprovider"
	"google.golang.org/grpc/credentials/tls/certprovider/pemfile"
	"google.golang.org/grpc/security/advancedtls"

	"github.com/genvelope/genvelope/service/access"
)

// Security configures transport security, identities and rights.
type Security struct {
	// GRPCTLSCert and GRPCTLSKey are the gRPC server's certificate chain
	// and key (PEM). With GRPCClientCA (PEM roots) every client must
	// present a certificate that chains to it (mutual TLS). The files are
	// read again every CertRefresh, so a renewed certificate is served
	// without a restart.
	GRPCTLSCert, GRPCTLSKey, GRPCClientCA string
	// CertRefresh is how often the gRPC certificate files are checked;
	// default 1 min.
	CertRefresh time.Duration

	// WebConfig is the HTTP listener's web configuration file (the
	// Prometheus exporter-toolkit format: tls_server_config,
	// basic_auth_users with bcrypt hashes, http_server_config).
	WebConfig string

	// AccessFile maps identities to roles (package access); "" grants
	// everything to everyone, as before access control.
	AccessFile string
	// Auditor receives audit entries besides the log.
	Auditor access.Auditor

	// InsecurePlaintext allows a listener on a non-loopback address
	// without TLS. Without it such a configuration is refused at start.
	InsecurePlaintext bool

	// HTTPHosts are the names the HTTP listener answers to (the Host
	// header, port ignored); the loopback names and the listen address'
	// own host are always allowed. A request naming another host is
	// refused (DNS rebinding).
	HTTPHosts []string

	// PprofListen, when set, serves /debug/pprof/ on a listener of its
	// own (same web configuration), for the admin role only.
	PprofListen string
}

// isLoopback reports whether a listen address binds to loopback only.
func isLoopback(addr string) bool {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return false
	}
	if strings.EqualFold(host, "localhost") {
		return true
	}
	ip := net.ParseIP(strings.Trim(host, "[]"))
	return ip != nil && ip.IsLoopback()
}

// plaintextCheck refuses a plaintext listener on a non-loopback address
// unless insecure is given; it reports whether the listener is
// plaintext on a non-loopback address.
func plaintextCheck(what, addr string, hasTLS, insecure bool) (bool, error) {
	if hasTLS || addr == "" || isLoopback(addr) {
		return false, nil
	}
	if !insecure {
		return false, fmt.Errorf("%s listen address %s is not loopback and has no TLS: give %s, or --insecure-plaintext to accept that anyone on the network may read and send everything", what, addr, tlsHint(what))
	}
	return true, nil
}

func tlsHint(what string) string {
	if what == "gRPC" {
		return "--grpc-tls-cert and --grpc-tls-key"
	}
	return "--web-config with tls_server_config"
}

// grpcCreds returns the gRPC server's transport credentials, reloading
// the certificate files through grpc-go's pemfile certificate provider,
// or nil for plaintext. close stops the providers' watchers.
func grpcCreds(sec *Security) (creds credentials.TransportCredentials, closeFn func(), err error) {
	if sec.GRPCTLSCert == "" && sec.GRPCTLSKey == "" {
		if sec.GRPCClientCA != "" {
			return nil, nil, errors.New("--grpc-client-ca needs --grpc-tls-cert and --grpc-tls-key")
		}
		return nil, func() {}, nil
	}
	if sec.GRPCTLSCert == "" || sec.GRPCTLSKey == "" {
		return nil, nil, errors.New("--grpc-tls-cert and --grpc-tls-key go together")
	}
	refresh := sec.CertRefresh
	if refresh <= 0 {
		refresh = time.Minute
	}
	var provs []certprovider.Provider
	closeAll := func() {
		for _, p := range provs {
			p.Close()
		}
	}
	id, err := newProvider(pemfile.Options{CertFile: sec.GRPCTLSCert, KeyFile: sec.GRPCTLSKey, RefreshDuration: refresh}, "gRPC certificate "+sec.GRPCTLSCert)
	if err != nil {
		return nil, nil, err
	}
	provs = append(provs, id)
	opts := &advancedtls.Options{
		IdentityOptions: advancedtls.IdentityCertificateOptions{IdentityProvider: id},
		MinTLSVersion:   tls.VersionTLS12,
		MaxTLSVersion:   tls.VersionTLS13,
	}
	if sec.GRPCClientCA != "" {
		roots, err := newProvider(pemfile.Options{RootFile: sec.GRPCClientCA, RefreshDuration: refresh}, "gRPC client CA "+sec.GRPCClientCA)
		if err != nil {
			closeAll()
			return nil, nil, err
		}
		provs = append(provs, roots)
		opts.RootOptions = advancedtls.RootCertificateOptions{RootProvider: roots}
		opts.RequireClientCert = true
		opts.VerificationType = advancedtls.CertVerification
	}
	creds, err = advancedtls.NewServerCreds(opts)
	if err != nil {
		closeAll()
		return nil, nil, fmt.Errorf("gRPC TLS: %w", err)
	}
	return creds, closeAll, nil
}

// newProvider starts a pemfile provider and waits for its first key
// material, so that a missing or bad file fails the start with its name
// instead of hanging the first handshake.
func newProvider(o pemfile.Options, what string) (certprovider.Provider, error) {
	for _, f := range []string{o.CertFile, o.KeyFile, o.RootFile} {
		if f == "" {
			continue
		}
		if _, err := os.Stat(f); err != nil {
			return nil, fmt.Errorf("%s: %w", what, err)
		}
	}
	p, err := pemfile.NewProvider(o)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", what, err)
	}
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	if _, err := p.KeyMaterial(ctx); err != nil {
		p.Close()
		return nil, fmt.Errorf("%s: the files could not be read as PEM certificates and key: %w", what, err)
	}
	return p, nil
}

// webConfig is what the server needs to know of the web configuration
// file: whether it turns TLS on and has basic-auth users.
type webConfig struct {
	TLS   bool
	Users bool
}

// readWebConfig checks a web configuration file with the toolkit's own
// validation and reports what it turns on.
func readWebConfig(path string) (webConfig, error) {
	if path == "" {
		return webConfig{}, nil
	}
	if err := web.Validate(path); err != nil {
		return webConfig{}, fmt.Errorf("web config %s: %w", path, err)
	}
	data, err := os.ReadFile(path)
	if err != nil {
		return webConfig{}, fmt.Errorf("web config: %w", err)
	}
	var c web.Config
	if err := yaml.Unmarshal(data, &c); err != nil {
		return webConfig{}, fmt.Errorf("web config %s: %w", path, err)
	}
	return webConfig{TLS: c.TLSConfig.TLSCertPath != "" || c.TLSConfig.TLSCert != "", Users: len(c.Users) > 0}, nil
}
