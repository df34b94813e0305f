package main

import (
	"context"
	"flag"
	"log/slog"
	"os"
	"os/signal"
	"syscall"
	"time"

	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/server"
)

// Default listen addresses: loopback, so that a first run exposes
// nothing; set them to reach the service from elsewhere.
const (
	defaultGRPCListen = "127.0.0.1:9470"
	defaultHTTPListen = "127.0.0.1:9471"
	// defaultStatePath is relative to the working directory; an installed
	// service sets --state under its state directory (/var/lib/genvelope).
	defaultStatePath = "genvelope-state.json"
	// defaultJournalPath likewise: the alarm journal.
	defaultJournalPath = "genvelope-journal.jsonl"
)

func serveCommand() command {
	return command{
		name:    "serve",
		summary: "run the service: telemetry over gRPC, metrics and health over HTTP",
		usage:   "--fleet FILE [--grpc-listen ADDR] [--http-listen ADDR] [--nats URL[,URL...] [--partitions 0-7]]",
		about: `Serves TelemetryService and FleetService (with the gRPC health protocol and
server reflection) on --grpc-listen, and /metrics, /healthz, /readyz and
POST /-/reload on --http-listen. SIGHUP or POST /-/reload reads the fleet
file again; a file with errors is refused and the running fleet kept.
SIGTERM or SIGINT stops: in-flight batches are finished and answered.
AlarmService watches, acknowledges and shelves limit-approach alarms. The
state file (--state) keeps thermal memory and alarms across restarts; the
journal (--journal) records every alarm change and operator action, read
with JournalService, on the page /journal or as CSV. Samples stamped more
than --max-future ahead or --horizon behind the server clock are refused.
With --nats, accepted samples and operator actions are written to a NATS
JetStream stream before they are acknowledged, every replica builds its
state from that log, and --state is its checkpoint (the state and the
stream sequence it includes); --partitions splits the fleet across
replicas by the FNV-1a hash of the unit id.`,
		advises: true,
		flags: func(fs *flag.FlagSet) func(e env) int {
			fleetPath := fs.String("fleet", "", "fleet file (YAML)")
			grpcListen := fs.String("grpc-listen", defaultGRPCListen, "gRPC listen address")
			httpListen := fs.String("http-listen", defaultHTTPListen, "HTTP listen address (metrics, health, reload)")
			maxBatch := fs.Int("max-batch", 10000, "most samples one request may carry")
			maxFuture := fs.Duration("max-future", 5*time.Second, "how far ahead of the server clock a sample may be stamped (clock skew)")
			horizon := fs.Duration("horizon", 7*24*time.Hour, "how far behind the server clock a sample may be stamped; older history: genvelope replay --backfill")
			journalPath := fs.String("journal", defaultJournalPath, "alarm journal `FILE`: every alarm change and operator action, rotated (FILE.1 ... FILE.4) past --journal-max-bytes; \"\" keeps none")
			journalMax := fs.Int64("journal-max-bytes", 8<<20, "size at which the journal is rotated")
			pprof := fs.Bool("pprof", false, "serve /debug/pprof/ on the HTTP listener (admin role under --access; see --pprof-listen)")
			sec := addSecurityFlags(fs)
			var lim server.Limits
			fs.IntVar(&lim.GRPCConnsPerCaller, "grpc-conns-per-client", 32, "gRPC connections one client (certificate identity, else address) may hold open; more are answered RESOURCE_EXHAUSTED and closed")
			fs.IntVar(&lim.HTTPConnsPerCaller, "http-conns-per-client", 32, "HTTP connections one client (certificate or basic-auth identity, else address) may hold open; more are answered 429")
			gc := addGCFlags(fs)
			statePath := fs.String("state", defaultStatePath, "state `FILE`: thermal memory, alarm states, acknowledgements, shelves and recent timestamps, written every few seconds and at stop, restored at start; \"\" keeps none")
			nf := addNATSFlags(fs)
			logFormat := &choice{v: "text", allowed: []string{"text", "json"}}
			fs.Var(logFormat, "log-format", "log format: text or json")
			return func(e env) int {
				c := serveCommand()
				if *fleetPath == "" {
					return usageError(e, c, "--fleet is required")
				}
				var h slog.Handler = slog.NewTextHandler(e.stderr, nil)
				if logFormat.v == "json" {
					h = slog.NewJSONHandler(e.stderr, nil)
				}
				log := slog.New(h)
				cfg := server.Config{
					FleetPath: *fleetPath, GRPCListen: *grpcListen, HTTPListen: *httpListen,
					Ingest: ingest.Options{MaxFuture: *maxFuture, Horizon: *horizon}, MaxBatch: *maxBatch, Pprof: *pprof, Logger: log,
					StatePath: *statePath, JournalPath: *journalPath, JournalMaxBytes: *journalMax,
					Security: *sec, Limits: lim,
				}
				if nf.enabled() {
					dl, err := nf.open(*statePath, log)
					if err != nil {
						log.Error("cannot start", "err", err)
						return exitFailure
					}
					defer dl.Close()
					cfg.Log = dl
				}
				srv, err := server.New(cfg)
				if err != nil {
					log.Error("cannot start", "err", err)
					return exitUsage
				}
				gc.apply(len(srv.Store().Units()), log)
				log.Warn(fleet.Caution)
				ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
				defer stop()
				hup := make(chan os.Signal, 1)
				signal.Notify(hup, syscall.SIGHUP)
				defer signal.Stop(hup)
				go func() {
					for {
						select {
						case <-hup:
							_ = srv.Reload() // logged and counted by Reload
						case <-ctx.Done():
							return
						}
					}
				}()
				if err := srv.Run(ctx); err != nil {
					log.Error("serve", "err", err)
					return exitFailure
				}
				return exitOK
			}
		},
	}
}
