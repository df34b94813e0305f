package main

import (
	"flag"
	"strings"

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
	fs.Func("http-host", "a host `NAME` the HTTP listener answers to (repeat or comma-separate); loopback names and the listen address are always allowed", func(v string) error {
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
