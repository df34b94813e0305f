package main

import (
	"crypto/tls"
	"errors"
	"fmt"

	"google.golang.org/grpc/credentials"

	"github.com/genvelope/genvelope/test/testpki"
)

// loadTLS is a run's certificates: a CA and a loopback server
// certificate, used by both the service and the bare sink.
type loadTLS struct {
	ca                *testpki.CA
	certPath, keyPath string
}

// fatalErr turns testpki's Fatal into an error.
type fatalErr struct{ err error }

func (f *fatalErr) Helper()           {}
func (f *fatalErr) Fatal(args ...any) { f.err = errors.New(fmt.Sprint(args...)); panic(f) }

func makeLoadTLS(dir string) (lt *loadTLS, err error) {
	f := &fatalErr{}
	defer func() {
		if r := recover(); r != nil {
			if r != f {
				panic(r)
			}
			lt, err = nil, fmt.Errorf("TLS certificates: %w", f.err)
		}
	}()
	lt = &loadTLS{ca: testpki.NewCA(f, "load harness CA")}
	lt.certPath, lt.keyPath = testpki.WriteLeaf(f, dir, "server", lt.ca.Server(f))
	return lt, nil
}

func (lt *loadTLS) sinkArgs() []string {
	if lt == nil {
		return nil
	}
	return []string{lt.certPath, lt.keyPath}
}

func (lt *loadTLS) serveArgs() []string {
	if lt == nil {
		return nil
	}
	return []string{"--grpc-tls-cert", lt.certPath, "--grpc-tls-key", lt.keyPath}
}

func (lt *loadTLS) clientCreds() credentials.TransportCredentials {
	if lt == nil {
		return nil
	}
	return credentials.NewTLS(&tls.Config{RootCAs: lt.ca.Pool(), ServerName: "localhost", MinVersion: tls.VersionTLS12})
}
