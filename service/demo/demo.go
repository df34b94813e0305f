// Package demo runs genvelope on an invented fleet with simulated live
// telemetry, so that the service can be seen at work without a plant:
// the full server on loopback, and a simulator that pushes one sample a
// second per unit through the real gRPC path (TelemetryService.Stream,
// acknowledged, resent after a dropped stream), stamped with the wall
// clock.
//
// The simulated day (Episodes) has a daily load cycle, voltage
// excursions, a hydro unit drifting onto its underexcited limit at light
// load, a field overload whose thermal memory fills and empties, a frozen
// field-current transducer and a unit whose telemetry stops for a while.
// The reactive-power targets come from each unit's own envelope
// (limits.Unit.Bounds), so every episode lands where it is meant to on
// the unit's real limits.
//
// Scenario time runs Speed times as fast as the wall clock, and one
// simulated day lasts DayLength of scenario time (DefaultDay, 20
// minutes). Samples still go once a second of wall time: at higher
// speeds the script moves faster, while what runs on real seconds (alarm
// on- and off-delays, the thermal memory, stale telemetry) does not.
package demo

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"math"
	"os"
	"path/filepath"
	"sync/atomic"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/replay"
	"github.com/genvelope/genvelope/service/server"
)

// Config is what a demo needs. The zero value is a demo on loopback
// ports chosen by the system, keeping no state, at speed 1.
type Config struct {
	GRPCListen string // default "127.0.0.1:0"
	HTTPListen string // default "127.0.0.1:0"
	StatePath  string // the server's state file; "" keeps none

	Speed     float64       // scenario time per wall time, > 0; default 1
	DayLength time.Duration // one simulated day, in scenario time; default DefaultDay
	// StartAt is where in the simulated day the demo starts, a fraction
	// in [0, 1).
	StartAt float64
	// Interval is the wall time between two samples of a unit; default
	// 1 s.
	Interval time.Duration

	Logger *slog.Logger
}

// Demo is a server with the demo fleet and its simulator.
type Demo struct {
	cfg      Config
	dir      string // the temporary directory of the fleet file
	srv      *server.Server
	conn     *grpc.ClientConn
	scenario *Scenario
	stats    simStats
}

// New writes the demo fleet to a temporary directory, starts a server
// over it (listeners bound, not yet serving) and prepares the simulator.
// Run serves and simulates; a Demo whose Run is never called must be
// closed with Close.
func New(cfg Config) (*Demo, error) {
	if cfg.GRPCListen == "" {
		cfg.GRPCListen = "127.0.0.1:0"
	}
	if cfg.HTTPListen == "" {
		cfg.HTTPListen = "127.0.0.1:0"
	}
	if cfg.Speed == 0 {
		cfg.Speed = 1
	}
	if cfg.DayLength == 0 {
		cfg.DayLength = DefaultDay
	}
	if cfg.Interval <= 0 {
		cfg.Interval = time.Second
	}
	if cfg.Logger == nil {
		cfg.Logger = slog.Default()
	}
	switch {
	case !(cfg.Speed > 0) || cfg.Speed > 1000 || math.IsInf(cfg.Speed, 0):
		return nil, fmt.Errorf("speed %g: must be above 0 and at most 1000", cfg.Speed)
	case !(cfg.StartAt >= 0 && cfg.StartAt < 1):
		return nil, fmt.Errorf("start %g: must be a fraction of the day, in [0, 1)", cfg.StartAt)
	}
	fl, err := Fleet()
	if err != nil {
		return nil, err
	}
	sc, err := NewScenario(fl, cfg.DayLength)
	if err != nil {
		return nil, err
	}
	dir, err := os.MkdirTemp("", "genvelope-demo-")
	if err != nil {
		return nil, fmt.Errorf("demo fleet: %w", err)
	}
	d := &Demo{cfg: cfg, dir: dir, scenario: sc}
	path := filepath.Join(dir, FleetFileName)
	if err := os.WriteFile(path, FleetYAML(), 0o644); err != nil {
		d.Close()
		return nil, fmt.Errorf("demo fleet: %w", err)
	}
	d.srv, err = server.New(server.Config{FleetPath: path, GRPCListen: cfg.GRPCListen, HTTPListen: cfg.HTTPListen,
		StatePath: cfg.StatePath, JournalPath: filepath.Join(dir, "journal.jsonl"), Logger: cfg.Logger})
	if err != nil {
		d.Close()
		return nil, err
	}
	d.conn, err = grpc.NewClient(d.srv.GRPCAddr(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		d.Close()
		return nil, fmt.Errorf("simulator client: %w", err)
	}
	return d, nil
}

// GRPCAddr and HTTPAddr return the bound addresses.
func (d *Demo) GRPCAddr() string { return d.srv.GRPCAddr() }
func (d *Demo) HTTPAddr() string { return d.srv.HTTPAddr() }

// Fleet returns the fleet being served.
func (d *Demo) Fleet() *fleet.Fleet { return d.srv.Store().Fleet() }

// Scenario returns the script the simulator plays.
func (d *Demo) Scenario() *Scenario { return d.scenario }

// Speed returns the scenario time per wall time.
func (d *Demo) Speed() float64 { return d.cfg.Speed }

// Close removes the temporary fleet file. Run calls it; it is only
// needed for a Demo whose Run is never called.
func (d *Demo) Close() {
	if d.conn != nil {
		d.conn.Close()
	}
	if d.dir != "" {
		os.RemoveAll(d.dir)
	}
}

// Stats returns what the simulator has sent so far.
func (d *Demo) Stats() SimStats {
	return SimStats{Batches: d.stats.batches.Load(), Accepted: d.stats.accepted.Load(), Duplicates: d.stats.duplicates.Load(),
		Rejected: d.stats.rejected.Load(), Reconnects: d.stats.reconnects.Load()}
}

// SimStats counts the simulator's samples by the server's answer.
type SimStats struct {
	Batches, Accepted, Duplicates, Rejected, Reconnects uint64
}

type simStats struct {
	batches, accepted, duplicates, rejected, reconnects atomic.Uint64
}

// Run serves and simulates until ctx is done, then stops the simulator,
// then the server (which answers what is in flight and saves its
// state), and removes the temporary fleet file. It returns nil after a
// clean stop.
func (d *Demo) Run(ctx context.Context) error {
	defer d.Close()
	srvCtx, stopSrv := context.WithCancel(context.WithoutCancel(ctx))
	defer stopSrv()
	srvErr := make(chan error, 1)
	go func() { srvErr <- d.srv.Run(srvCtx) }()

	simCtx, stopSim := context.WithCancel(ctx)
	defer stopSim()
	simErr := make(chan error, 1)
	go func() { simErr <- d.simulate(simCtx) }()

	var err error
	select {
	case <-ctx.Done():
		stopSim()
		err = <-simErr
	case err = <-simErr:
		if err != nil {
			err = fmt.Errorf("simulator: %w", err)
		}
	case err = <-srvErr:
		stopSim()
		<-simErr
		if err == nil {
			err = errors.New("the server stopped")
		}
		return err
	}
	stopSrv()
	if serr := <-srvErr; err == nil {
		err = serr
	}
	return err
}

// simulate pushes the scenario's samples to the server until ctx is done.
func (d *Demo) simulate(ctx context.Context) error {
	log := d.cfg.Logger
	sender := replay.NewSender(d.conn, replay.SenderConfig{Window: 4, Retries: 20, Logger: log})
	t0 := time.Now()
	start := d.cfg.StartAt * d.scenario.day
	ticker := time.NewTicker(d.cfg.Interval)
	defer ticker.Stop()
	first := true
	src := replay.SourceFunc(func(ctx context.Context) (*replay.Batch, error) {
		if !first {
			select {
			case <-ctx.Done():
				return nil, ctx.Err()
			case <-ticker.C:
			}
		}
		first = false
		now := time.Now()
		tau := start + d.cfg.Speed*now.Sub(t0).Seconds()
		return &replay.Batch{Samples: d.scenario.Samples(tau, now.Truncate(time.Millisecond))}, nil
	})
	stats, err := sender.Run(ctx, src, func(b *replay.Batch, resp *pb.PushResponse) {
		d.stats.batches.Add(1)
		d.stats.accepted.Add(uint64(resp.Accepted))
		d.stats.duplicates.Add(uint64(resp.Duplicates))
		d.stats.rejected.Add(uint64(len(resp.Rejected)))
		for _, r := range resp.Rejected {
			log.Warn("demo sample rejected", "unit", b.Samples[r.Index].UnitId, "reason", replay.ReasonName(r.Reason), "detail", r.Detail)
		}
	})
	d.stats.reconnects.Store(uint64(stats.Reconnects))
	if ctx.Err() != nil {
		return nil
	}
	return err
}
