package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"
	"os/signal"
	"strings"
	"sync"
	"syscall"
	"time"

	"github.com/genvelope/genvelope/service/replay"
)

// replayOptions are the flags of genvelope replay.
type replayOptions struct {
	target, file string
	backfill     bool   // evaluate locally against fleetPath, no service
	fleetPath    string // for --backfill
	speed        float64
	batch        int
	tls          *clientTLS
	// progressEvery is how often a plain progress line is written when
	// stderr is not a terminal; the bar on a terminal redraws faster.
	progressEvery time.Duration
}

func replayCommand() command {
	return command{
		name:    "replay",
		summary: "send recorded telemetry from a CSV file to a running service",
		usage:   "--target ADDR --file FILE.csv [--speed N] [--batch N] | --backfill --fleet FILE --file FILE.csv",
		about: `Reads FILE.csv (a header row, then one sample per row; columns time, unit,
p_mw, q_mvar, v_kv and optionally field_a, frequency_hz, coolant, quality,
in any order; the README gives the layout) and streams the samples to the
service at --target over TelemetryService.Stream, in batches with
acknowledgements. A row that cannot be read is reported with its line and
skipped; after a dropped connection the replay reconnects and resends what
was not acknowledged (the server answers a resent sample as a duplicate).
The summary counts every row once: accepted, duplicate, rejected by the
server (with the reason and line) or not readable.
With --backfill no service is contacted: the rows are evaluated against the
fleet file given with --fleet, as the service would evaluate them (checks,
thermal memory, alarms on the rows' own times), in a state of their own,
and a report gives each unit's least margins, peak thermal use and every
alarm change. Use it for recorded history: pushing old rows into a running
service is refused (older than the unit's newest sample, or before its
horizon).
Exit status: 0 when every row was accepted or a duplicate, 1 when some were
rejected or not readable or the replay stopped early, 2 for usage errors
and files that cannot be used.`,
		flags: func(fs *flag.FlagSet) func(e env) int {
			o := replayOptions{progressEvery: 5 * time.Second}
			fs.StringVar(&o.target, "target", "", "the service's gRPC `ADDR`, host:port (e.g. "+defaultGRPCListen+")")
			fs.StringVar(&o.file, "file", "", "the CSV `FILE` to replay")
			fs.Float64Var(&o.speed, "speed", 0, "replay at N times the pace of the recorded times; 0 as fast as the service answers")
			fs.IntVar(&o.batch, "batch", replay.DefaultBatch, fmt.Sprintf("rows per batch, 1 to %d", replay.MaxBatch))
			o.tls = addClientTLSFlags(fs)
			fs.BoolVar(&o.backfill, "backfill", false, "evaluate the file against --fleet locally, for a report, without a service and without touching live state")
			fs.StringVar(&o.fleetPath, "fleet", "", "the fleet `FILE`, for --backfill")
			return func(e env) int {
				ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
				defer stop()
				return runReplay(ctx, e, o)
			}
		},
	}
}

// runReplay replays o.file to o.target; ctx ends it early.
func runReplay(ctx context.Context, e env, o replayOptions) int {
	c := replayCommand()
	if o.backfill {
		return runBackfill(ctx, e, c, o)
	}
	switch {
	case o.target == "":
		return usageError(e, c, "missing --target ADDR, the service's gRPC address")
	case o.file == "":
		return usageError(e, c, "missing --file FILE, the CSV file to replay")
	case o.batch < 1 || o.batch > replay.MaxBatch:
		return usageError(e, c, "--batch %d: must be 1 to %d (a batch is resent whole after a dropped connection, and the service remembers the last %d times of each unit)",
			o.batch, replay.MaxBatch, replay.MaxBatch)
	case !(o.speed >= 0) || o.speed > 1e6:
		return usageError(e, c, "--speed %g: must be 0 (as fast as possible) or a positive factor", o.speed)
	}
	log := slog.New(slog.NewTextHandler(e.stderr, &slog.HandlerOptions{Level: slog.LevelWarn}))
	creds, err := o.tls.creds()
	if err != nil {
		return usageError(e, c, "%v", err)
	}
	r, err := replay.New(replay.Config{Target: o.target, File: o.file, Speed: o.speed, Batch: o.batch, Logger: log, Creds: creds})
	if err != nil {
		var fe *replay.FileError
		if errors.As(err, &fe) {
			fmt.Fprintln(e.stderr, err)
			return exitUsage
		}
		return usageError(e, c, "%v", err)
	}

	pctx, stopProgress := context.WithCancel(ctx)
	var wg sync.WaitGroup
	wg.Add(1)
	go func() {
		defer wg.Done()
		showProgress(pctx, e.stderr, isTerminal(e.stderr), o.progressEvery, r)
	}()
	sum, err := r.Run(ctx)
	stopProgress()
	wg.Wait()

	sum.Write(e.stdout)
	switch {
	case ctx.Err() != nil:
		fmt.Fprintf(e.stderr, "genvelope replay: interrupted; the rows not answered above were not sent or not acknowledged\n")
		return exitFailure
	case err != nil:
		return failf(e, c, exitFailure, "stopped early: %v", err)
	case !sum.OK():
		return exitFailure
	}
	return exitOK
}

// isTerminal reports whether w is a terminal (a character device).
func isTerminal(w io.Writer) bool {
	f, ok := w.(*os.File)
	if !ok {
		return false
	}
	fi, err := f.Stat()
	return err == nil && fi.Mode()&os.ModeCharDevice != 0
}

// showProgress reports the replay's progress on w until ctx is done: a
// bar redrawn in place on a terminal, a plain line every so often
// otherwise.
func showProgress(ctx context.Context, w io.Writer, terminal bool, every time.Duration, r *replay.Replayer) {
	if terminal {
		every = 200 * time.Millisecond
	}
	t := time.NewTicker(every)
	defer t.Stop()
	drawn := false
	for {
		select {
		case <-ctx.Done():
			if drawn {
				fmt.Fprintf(w, "\r%s\n", progressBar(r.Progress()))
			}
			return
		case <-t.C:
			p := r.Progress()
			if terminal {
				fmt.Fprintf(w, "\r%s", progressBar(p))
				drawn = true
				continue
			}
			fmt.Fprintf(w, "replay: %.0f %% of the file read, %d rows read, %d answered\n", 100*p.Fraction, p.Rows, p.Answered)
		}
	}
}

// progressBar draws p as a bar of 30 cells.
func progressBar(p replay.Progress) string {
	const width = 30
	n := int(p.Fraction*width + 0.5)
	n = max(0, min(width, n))
	return fmt.Sprintf("[%s%s] %3.0f %%  %d rows read, %d answered",
		strings.Repeat("#", n), strings.Repeat(".", width-n), 100*p.Fraction, p.Rows, p.Answered)
}

// runBackfill evaluates o.file against o.fleetPath locally.
func runBackfill(ctx context.Context, e env, c command, o replayOptions) int {
	switch {
	case o.target != "":
		return usageError(e, c, "--backfill contacts no service: leave out --target")
	case o.file == "":
		return usageError(e, c, "missing --file FILE, the CSV file to evaluate")
	}
	fl, code := loadFleet(e, c, o.fleetPath)
	if fl == nil {
		return code
	}
	f, err := os.Open(o.file)
	if err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return failf(e, c, exitUsage, "%s: no such file", o.file)
		}
		return failf(e, c, exitFailure, "%v", err)
	}
	defer f.Close()
	b, err := replay.RunBackfill(ctx, fl, o.file, f)
	var fe *replay.FileError
	switch {
	case errors.As(err, &fe):
		fmt.Fprintln(e.stderr, err)
		return exitUsage
	case err != nil:
		if b != nil {
			b.Write(e.stdout)
		}
		return failf(e, c, exitFailure, "stopped early: %v", err)
	}
	b.Write(e.stdout)
	if !b.OK() {
		return exitFailure
	}
	return exitOK
}
