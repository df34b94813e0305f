package main

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/server"
	"github.com/genvelope/genvelope/test/testpki"
)

// Replay over mutual TLS to a service with an access file: the
// gateway's certificate may push for harrowmere only, so the larchwater
// rows come back as unknown_unit (a unit outside the gateway's view is
// answered as one not in the fleet) and the others are accepted.
func TestReplayMutualTLS(t *testing.T) {
	dir := t.TempDir()
	ca := testpki.NewCA(t, "replay test CA")
	caPath := testpki.Write(t, dir, "ca.crt", ca.PEM)
	srvCert, srvKey := testpki.WriteLeaf(t, dir, "server", ca.Server(t))
	gwCert, gwKey := testpki.WriteLeaf(t, dir, "gw", ca.Client(t, "gw-harrowmere"))
	access := testpki.Write(t, dir, "access.yaml", []byte("identities: [{name: gw-harrowmere, grants: [{role: telemetry_writer, sites: [harrowmere]}]}]\n"))
	srv, err := server.New(server.Config{FleetPath: example, GRPCListen: "127.0.0.1:0", HTTPListen: "127.0.0.1:0",
		Logger:   slog.New(slog.NewTextHandler(io.Discard, nil)),
		Security: server.Security{GRPCTLSCert: srvCert, GRPCTLSKey: srvKey, GRPCClientCA: caPath, AccessFile: access}})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- srv.Run(ctx) }()
	defer func() { cancel(); <-done }()

	t0 := time.Now().Add(-time.Hour).Truncate(time.Second)
	lines := []string{"time,unit,p_mw,q_mvar,v_kv"}
	for i := range 4 {
		at := t0.Add(time.Duration(i) * time.Second).UTC().Format(time.RFC3339)
		lines = append(lines, fmt.Sprintf("%s,harrowmere-1,300,100,20.2", at), fmt.Sprintf("%s,larchwater-2,80,10,13.8", at))
	}
	path := csvFile(t, lines...)
	var stdout, stderr lockedBuffer
	code := runReplay(context.Background(), env{stdout: &stdout, stderr: &stderr},
		replayOptions{target: srv.GRPCAddr(), file: path, batch: 10, progressEvery: time.Hour,
			tls: &clientTLS{ca: caPath, cert: gwCert, key: gwKey, serverName: "localhost"}})
	if code != exitFailure {
		t.Errorf("exit %d, want %d (some rows rejected)\n%s\n%s", code, exitFailure, stdout.String(), stderr.String())
	}
	if out := stdout.String(); !strings.Contains(out, "4 accepted") || !strings.Contains(out, `unit "larchwater-2": unknown_unit`) {
		t.Errorf("summary lacks 4 accepted and the larchwater rows as unknown_unit:\n%s", out)
	}
}
