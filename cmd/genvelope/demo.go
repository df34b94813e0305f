package main

import (
	"context"
	"flag"
	"fmt"
	"log/slog"
	"os"
	"os/signal"
	"path/filepath"
	"syscall"
	"time"

	"github.com/genvelope/genvelope/service/demo"
	"github.com/genvelope/genvelope/service/fleet"
)

// defaultDemoState is the demo's state file: in the temporary directory,
// so that a demo never writes into the working directory, and the same
// on every run, so that a restarted demo keeps its thermal memory and
// alarms.
func defaultDemoState() string {
	return filepath.Join(os.TempDir(), "genvelope-demo", "state.json")
}

// demoOptions are the flags of genvelope demo.
type demoOptions struct {
	grpcListen, httpListen string
	speed                  float64
	day                    time.Duration
	statePath              string
}

func demoCommand() command {
	return command{
		name:    "demo",
		summary: "run the service on an invented fleet with simulated live telemetry",
		usage:   "[--grpc-listen ADDR] [--http-listen ADDR] [--speed N] [--day DURATION] [--state FILE]",
		about: `Runs the full service (as serve does) on a built-in, invented fleet of eight
units at four sites, and a simulator that pushes one sample a second per
unit over gRPC, stamped with the wall clock: a daily load cycle, voltage
excursions, a hydro unit drifting onto its underexcited limit at light
load, a field overload that fills the thermal memory and then recovers, a
frozen field-current transducer and a unit whose telemetry stops for two
minutes. One simulated day lasts --day; --speed runs the script faster
(alarm delays, thermal memory and stale telemetry still run on real
seconds, so at higher speeds some alarms may not reach their thresholds).
Open the printed addresses to watch it; SIGINT or SIGTERM stops it.`,
		advises: true,
		flags: func(fs *flag.FlagSet) func(e env) int {
			var o demoOptions
			fs.StringVar(&o.grpcListen, "grpc-listen", defaultGRPCListen, "gRPC listen address")
			fs.StringVar(&o.httpListen, "http-listen", defaultHTTPListen, "HTTP listen address (web pages, metrics, health)")
			fs.Float64Var(&o.speed, "speed", 1, "how many times faster than the script's own pace the simulated day runs (above 0, at most 1000)")
			fs.DurationVar(&o.day, "day", demo.DefaultDay, fmt.Sprintf("how long one simulated day lasts at speed 1 (%s to %s)", demo.MinDay, demo.MaxDay))
			fs.StringVar(&o.statePath, "state", defaultDemoState(), "state `FILE` of the demo's service; \"\" keeps none")
			return func(e env) int {
				ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
				defer stop()
				return runDemo(ctx, e, o)
			}
		},
	}
}

// runDemo runs the demo until ctx is done.
func runDemo(ctx context.Context, e env, o demoOptions) int {
	c := demoCommand()
	switch {
	case !(o.speed > 0) || o.speed > 1000:
		return usageError(e, c, "--speed %g: must be above 0 and at most 1000", o.speed)
	case o.day < demo.MinDay || o.day > demo.MaxDay:
		return usageError(e, c, "--day %s: must be %s to %s", o.day, demo.MinDay, demo.MaxDay)
	}
	if o.statePath == defaultDemoState() {
		if err := os.MkdirAll(filepath.Dir(o.statePath), 0o700); err != nil {
			return failf(e, c, exitFailure, "state directory: %v", err)
		}
	}
	log := slog.New(slog.NewTextHandler(e.stderr, nil))
	d, err := demo.New(demo.Config{GRPCListen: o.grpcListen, HTTPListen: o.httpListen, StatePath: o.statePath,
		Speed: o.speed, DayLength: o.day, Logger: log})
	if err != nil {
		return failf(e, c, exitFailure, "%v", err)
	}
	printDemo(e, d)
	if err := d.Run(ctx); err != nil {
		log.Error("demo", "err", err)
		return exitFailure
	}
	return exitOK
}

// printDemo tells where to look and what will happen when.
func printDemo(e env, d *demo.Demo) {
	w := e.stdout
	fl := d.Fleet()
	sites := map[string]bool{}
	for _, u := range fl.Units {
		sites[u.Site] = true
	}
	web := "http://" + d.HTTPAddr()
	fmt.Fprintf(w, "genvelope demo: %d invented units at %d sites, with simulated live telemetry.\n\n", len(fl.Units), len(sites))
	fmt.Fprintf(w, "  web pages  %s/  (each unit at %s/units/ID)\n", web, web)
	fmt.Fprintf(w, "  metrics    %s/metrics\n", web)
	fmt.Fprintf(w, "  gRPC       %s  (telemetry, fleet and alarm services; server reflection on)\n\n", d.GRPCAddr())
	sc := d.Scenario()
	cycle := time.Duration(float64(sc.Day()) / d.Speed())
	fmt.Fprintf(w, "One simulated day passes every %s; each day repeats this script (times from the start of the day):\n", cycle.Round(time.Second))
	for _, ep := range sc.Episodes() {
		from := time.Duration(ep.From * float64(cycle)).Round(time.Second)
		to := time.Duration(ep.To * float64(cycle)).Round(time.Second)
		who := ep.Unit
		if who == "" {
			who = "site " + ep.Site
		}
		fmt.Fprintf(w, "  %8s to %8s  %s: %s\n", from, to, who, ep.About)
	}
	fmt.Fprintf(w, "\nStop with Ctrl-C.\n\n%s\n", fleet.Caution)
}
