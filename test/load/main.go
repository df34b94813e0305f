// Command load is genvelope's load harness: a benchmark tool that puts
// the real service next to a bare gRPC sink under the same telemetry
// traffic and reports what each sustains. It is not a test with timed
// assertions; harness_test.go only checks that it runs end to end.
//
// Usage, from the repository root:
//
//	go run ./test/load [flags]
//	go run ./test/load -units 1000 -batch 500          # throughput and latency
//	go run ./test/load -units 10000                    # also RSS and /metrics at fleet scale
//	go run ./test/load -json > result.json             # JSON on stdout, the table on stderr
//	go run ./test/load -cpuprofile cpu.pprof -heapprofile heap.pprof -metrics-cpuprofile metrics.pprof
//
// It writes a synthetic fleet file of -units units (copies of the three
// units of deploy/examples/fleet.yaml, ids syn-00001.., four to a site)
// into a temporary directory and checks that it parses; builds
// ./cmd/genvelope (or takes -genvelope BIN) and starts "genvelope serve"
// on loopback ports the kernel picks, with a fresh state file in the
// temporary directory (-state=false: none) and -serve-env added to its
// environment, as a child process whose memory and CPU can be read from
// /proc; and starts a bare sink, this same program run again with a
// hidden -sink flag, which answers every batch as accepted without
// looking at it: the transport limit.
//
// Each phase loads one server for -warmup (not counted) and then
// -duration, over -streams bidirectional Stream RPCs (one connection
// each) with up to -window batches of -batch samples in flight per
// stream, as fast as possible or at -rate samples/s in all. The units
// are split among the streams, and each unit's i-th sample is stamped
// base + i s with base just under 7 days ago (each server has its own
// generators), so that the service never sees a sample out of order or
// from the future; a phase that would run into the present is refused
// with an error instead. Requests are encoded from
// samples prepared before the run, so the client spends little CPU on
// them. For each phase it reports the samples/s acknowledged, the ack
// latency of a batch (sent to answered) p50/p90/p99/max, the CPU the
// server, the client and the rest of the (shared) machine used, the
// samples per server CPU second, which other load disturbs far less
// than samples/s, and checks every answer: the counts must add up to the
// batch and, for the service, nothing may be rejected. -repeat runs the
// pair of phases several times against the same two processes.
//
// Then it reads the service's VmRSS and VmHWM (after the full pass
// over all units that the phases made), times -metrics-tries GET
// /metrics (gzip, as Prometheus asks) plus one uncompressed, and stops
// both children with SIGTERM, which must end them with status 0.
//
// It prints a table, or with -json the results as JSON on standard
// output and the table on standard error. It exits 1 when a check
// fails (a rejection, counts that do not add up, a child that did not
// exit cleanly), and 2 on bad flags; missing a target is only reported.
// All traffic goes to 127.0.0.1, and every phase ends by itself.
package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"os"
	"os/signal"
	"path/filepath"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"syscall"
	"time"

	"google.golang.org/protobuf/proto"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

// config is what one run does.
type config struct {
	Units    int           `json:"units"`
	AVR      float64       `json:"avr_share"` // share of units with a regulator, on the avr basis
	Streams  int           `json:"streams"`
	Window   int           `json:"window"`
	Batch    int           `json:"batch"`
	Rate     float64       `json:"rate"` // samples/s over all streams, 0 = as fast as possible
	Duration time.Duration `json:"-"`
	Warmup   time.Duration `json:"-"`
	Repeat   int           `json:"repeat"`
	Servers  []string      `json:"servers"` // "bare", "full", "nats", in the order loaded
	// NATSServer is the nats-server program of the "nats" phase.
	NATSServer string `json:"-"`
	// NATSCPUProfile is a CPU profile of nats-server during the first
	// nats phase; "" for none.
	NATSCPUProfile string `json:"-"`

	RSS          bool `json:"rss"`
	Metrics      bool `json:"metrics"`
	MetricsTries int  `json:"metrics_tries"`

	Seed        uint64 `json:"seed"`
	Genvelope   string `json:"-"` // a prebuilt genvelope binary; "" builds one
	Root        string `json:"-"` // the module root; "" asks go env
	Keep        bool   `json:"-"`
	Pprof       bool   `json:"pprof"`
	TLS         bool   `json:"tls"` // TLS on gRPC for both the service and the bare sink
	tls         *loadTLS
	State       bool   `json:"state"` // give the service a state file (when it has --state)
	CPUProfile  string `json:"-"`
	CPUSeconds  int    `json:"-"`
	HeapProfile string `json:"-"`
	// Added to the environment of genvelope serve (GOGC=..., GODEBUG=...).
	ServeEnv []string `json:"serve_env,omitempty"`
	// A CPU profile of the service answering GET /metrics back to back.
	MetricsCPUProfile string        `json:"-"`
	StartWait         time.Duration `json:"-"` // how long a child may take to be ready
	StopWait          time.Duration `json:"-"` // how long a child may take to exit after SIGTERM
}

func defaultConfig() config {
	return config{
		Units: 1000, Streams: 4, Window: 4, Batch: 500,
		Duration: 15 * time.Second, Warmup: 2 * time.Second, Repeat: 1,
		Servers: []string{"bare", "full"},
		RSS:     true, Metrics: true, MetricsTries: 3, State: true,
		Seed: 1, CPUSeconds: 10, StartWait: 2 * time.Minute, StopWait: 20 * time.Second,
	}
}

func (c *config) check() error {
	var errs []error
	if c.Units < 1 {
		errs = append(errs, errors.New("-units must be at least 1"))
	}
	if !(c.AVR >= 0 && c.AVR <= 1) {
		errs = append(errs, errors.New("-avr must be between 0 and 1"))
	}
	if c.Streams < 1 || c.Streams > c.Units {
		errs = append(errs, fmt.Errorf("-streams must be between 1 and -units (%d): each stream sends units of its own", c.Units))
	}
	if c.Window < 1 {
		errs = append(errs, errors.New("-window must be at least 1"))
	}
	if c.Batch < 1 || c.Batch > 10000 {
		errs = append(errs, errors.New("-batch must be between 1 and 10000, the service's default limit"))
	}
	if c.Rate < 0 {
		errs = append(errs, errors.New("-rate must not be negative"))
	}
	if c.Duration <= 0 || c.Warmup < 0 {
		errs = append(errs, errors.New("-duration must be positive and -warmup not negative"))
	}
	if c.Repeat < 1 {
		errs = append(errs, errors.New("-repeat must be at least 1"))
	}
	if len(c.Servers) == 0 {
		errs = append(errs, errors.New("-servers must name bare, full or both"))
	}
	for _, s := range c.Servers {
		if s != "bare" && s != "full" && s != "nats" {
			errs = append(errs, fmt.Errorf("-servers: %q is none of bare, full, nats", s))
		}
	}
	if c.MetricsTries < 1 {
		errs = append(errs, errors.New("-metrics-tries must be at least 1"))
	}
	return errors.Join(errs...)
}

func (c *config) has(server string) bool { return slices.Contains(c.Servers, server) }

func main() {
	if len(os.Args) >= 3 && os.Args[1] == sinkFlag {
		os.Exit(runSink(os.Args[2], os.Args[3:]...))
	}
	os.Exit(mainRun(os.Args[1:], os.Stdout, os.Stderr))
}

func mainRun(args []string, stdout, stderr io.Writer) int {
	cfg := defaultConfig()
	fs := flag.NewFlagSet("load", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		fmt.Fprintf(stderr, "usage: go run ./test/load [flags]\n\nLoads genvelope serve and a bare gRPC sink with the same telemetry and reports both.\n\n")
		fs.PrintDefaults()
	}
	fs.IntVar(&cfg.Units, "units", cfg.Units, "units in the synthetic fleet")
	fs.Float64Var(&cfg.AVR, "avr", cfg.AVR, "share (0 to 1) of the units given an invented voltage regulator (four designs), so evaluated on the avr stability basis; the rest on the manual basis")
	fs.IntVar(&cfg.Streams, "streams", cfg.Streams, "concurrent client streams (one connection each)")
	fs.IntVar(&cfg.Window, "window", cfg.Window, "batches in flight per stream")
	fs.IntVar(&cfg.Batch, "batch", cfg.Batch, "samples per batch")
	fs.Float64Var(&cfg.Rate, "rate", cfg.Rate, "target samples/s over all streams; 0 = as fast as possible")
	fs.DurationVar(&cfg.Duration, "duration", cfg.Duration, "measured time per phase")
	fs.DurationVar(&cfg.Warmup, "warmup", cfg.Warmup, "unmeasured time at the start of each phase")
	fs.IntVar(&cfg.Repeat, "repeat", cfg.Repeat, "times to run the phases (against the same processes)")
	servers := fs.String("servers", strings.Join(cfg.Servers, ","), "servers to load, in order: bare, full, nats (the service over JetStream)")
	withNATS := fs.Bool("nats", false, "add a phase of the full service over JetStream (serve --nats, a local nats-server started by the harness) after the others: the cost of durability")
	fs.StringVar(&cfg.NATSServer, "nats-server", "", "nats-server program for -nats (default: from PATH)")
	fs.BoolVar(&cfg.RSS, "rss", cfg.RSS, "report the service's VmRSS and VmHWM after the phases")
	fs.BoolVar(&cfg.Metrics, "metrics", cfg.Metrics, "time GET /metrics after the phases")
	fs.IntVar(&cfg.MetricsTries, "metrics-tries", cfg.MetricsTries, "GET /metrics tries (gzip); one uncompressed try follows")
	jsonOut := fs.Bool("json", false, "print the results as JSON on stdout (the table goes to stderr)")
	fs.Uint64Var(&cfg.Seed, "seed", cfg.Seed, "seed of the synthetic operating points")
	fs.StringVar(&cfg.Genvelope, "genvelope", "", "use this genvelope binary instead of building ./cmd/genvelope")
	fs.StringVar(&cfg.Root, "root", "", "repository root (default: the module of the working directory)")
	fs.BoolVar(&cfg.Keep, "keep", false, "keep the temporary directory (fleet file, binaries' logs, profiles)")
	fs.BoolVar(&cfg.State, "state", cfg.State, "give the service a fresh state file in the temporary directory, as in production (when serve has --state); false runs it with none")
	fs.BoolVar(&cfg.TLS, "tls", false, "serve gRPC over TLS on both the service and the bare sink (certificates made for the run)")
	fs.BoolVar(&cfg.Pprof, "pprof", false, "run the service with --pprof (implied by -cpuprofile and -heapprofile)")
	fs.StringVar(&cfg.CPUProfile, "cpuprofile", "", "write a CPU profile of the service, taken during the first full phase (of the service over JetStream when -servers has nats and not full, e.g. -servers bare,nats), to this file")
	fs.StringVar(&cfg.NATSCPUProfile, "nats-cpuprofile", "", "write a CPU profile of nats-server (started with --profile), taken during the first nats phase, to this file")
	fs.IntVar(&cfg.CPUSeconds, "cpuprofile-seconds", cfg.CPUSeconds, "length of the CPU profile, s (at most -duration)")
	fs.StringVar(&cfg.HeapProfile, "heapprofile", "", "write a heap profile of the service, taken after the phases, to this file")
	fs.StringVar(&cfg.MetricsCPUProfile, "metrics-cpuprofile", "", "write a CPU profile of the service answering GET /metrics, after the timed tries, to this file")
	fs.DurationVar(&cfg.StartWait, "start-wait", cfg.StartWait, "how long a child may take to be ready (a fleet of 100,000 units takes a while to build)")
	fs.Func("serve-env", "`KEY=VALUE` added to the environment of genvelope serve, e.g. GOGC=200 or GODEBUG=gctrace=1 (repeatable)", func(v string) error {
		if k, _, ok := strings.Cut(v, "="); !ok || k == "" {
			return errors.New("want KEY=VALUE")
		}
		cfg.ServeEnv = append(cfg.ServeEnv, v)
		return nil
	})
	verbose := fs.Bool("v", false, "log debug detail")
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return 0
		}
		return 2
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(stderr, "load: unexpected arguments %q\n", fs.Args())
		return 2
	}
	cfg.Servers = nil
	for s := range strings.SplitSeq(*servers, ",") {
		if s = strings.TrimSpace(s); s != "" {
			cfg.Servers = append(cfg.Servers, s)
		}
	}
	if *withNATS && !slices.Contains(cfg.Servers, "nats") {
		cfg.Servers = append(cfg.Servers, "nats")
	}
	if cfg.CPUProfile != "" || cfg.HeapProfile != "" || cfg.MetricsCPUProfile != "" {
		cfg.Pprof = true
	}
	if err := cfg.check(); err != nil {
		fmt.Fprintf(stderr, "load: %v\n", err)
		return 2
	}
	level := slog.LevelInfo
	if *verbose {
		level = slog.LevelDebug
	}
	log := slog.New(slog.NewTextHandler(stderr, &slog.HandlerOptions{Level: level}))

	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	rep, err := run(ctx, log, cfg)
	if rep != nil && err != nil {
		rep.finish()
		rep.problem("the run failed: %v", err)
		rep.Checks.OK = false
	}
	if rep != nil {
		table := stdout
		if *jsonOut {
			table = stderr
		}
		rep.writeTable(table)
		if *jsonOut {
			enc := json.NewEncoder(stdout)
			enc.SetIndent("", "  ")
			if err := enc.Encode(rep); err != nil {
				log.Error("write JSON", "err", err)
				return 1
			}
		}
	}
	if err != nil {
		log.Error("load run failed", "err", err)
		return 1
	}
	if !rep.Checks.OK {
		log.Error("checks failed", "problems", len(rep.Checks.Problems))
		return 1
	}
	return 0
}

// run does one whole run. It returns the report so far even when it
// fails part way.
func run(ctx context.Context, log *slog.Logger, cfg config) (*report, error) {
	if err := cfg.check(); err != nil {
		return nil, err
	}
	dir, err := os.MkdirTemp("", "genvelope-load-")
	if err != nil {
		return nil, err
	}
	if cfg.Keep {
		log.Info("keeping the temporary directory", "dir", dir)
	} else {
		defer os.RemoveAll(dir)
	}
	rep := newReport(cfg)

	fi, err := writeFleet(dir, cfg.Units, cfg.AVR)
	if err != nil {
		return nil, err
	}
	rep.Fleet = fi
	log.Info("synthetic fleet", "units", fi.Units, "avr_basis", fi.AVR, "sites", fi.Sites, "bytes", fi.Bytes, "parse", fi.parse.Round(time.Millisecond))

	enc := encodeUnits(fi.Fleet, cfg.Seed)
	// Each server has generators of its own, so that a fast bare sink does
	// not use up the service's time: a unit's k-th round is stamped
	// base + k s, and at millions of samples a second a shared clock ran
	// past the service's 5 s future limit within one run of 1,000 units.
	base := time.Now().Add(-loadAge).Truncate(time.Second).Unix()
	gensOf := make(map[string][]*generator, len(cfg.Servers))
	for _, server := range cfg.Servers {
		gensOf[server] = partition(enc, cfg.Streams, base)
	}
	gens := gensOf[cfg.Servers[0]]
	if err := selfCheck(gens[0], cfg.Batch); err != nil {
		return nil, fmt.Errorf("the request encoder is broken: %w", err)
	}

	// The children. Whatever happens, they are stopped before run
	// returns; the normal path stops them itself to check the status.
	var sinkProc, serveProc, natsProc, durableProc *proc
	defer func() {
		for _, p := range []*proc{sinkProc, serveProc, durableProc, natsProc} {
			if p != nil && !p.exited() {
				_, _ = p.stop(cfg.StopWait)
			}
		}
	}()
	if cfg.TLS {
		if cfg.tls, err = makeLoadTLS(dir); err != nil {
			return rep, err
		}
	}
	if cfg.has("bare") {
		if sinkProc, err = startSink(ctx, log, dir, cfg.StartWait, cfg.tls.sinkArgs()...); err != nil {
			return rep, err
		}
	}
	bin := cfg.Genvelope
	if cfg.has("full") || cfg.has("nats") {
		if bin == "" {
			root := cfg.Root
			if root == "" {
				if root, err = moduleRoot(ctx); err != nil {
					return rep, err
				}
			}
			t := time.Now()
			if bin, err = buildGenvelope(ctx, root, dir); err != nil {
				return rep, err
			}
			log.Info("built genvelope", "bin", bin, "took", time.Since(t).Round(time.Millisecond))
		}
	}
	// The service caps connections per client (address, here) at 32 by
	// default; more streams need a higher cap (the flag is left out
	// otherwise, so that older builds given with -genvelope still run).
	extra := cfg.tls.serveArgs()
	if cfg.Streams+8 > 32 {
		extra = append(extra, "--grpc-conns-per-client", strconv.Itoa(cfg.Streams+8))
	}
	if cfg.has("nats") {
		var url string
		var pprofAddr string
		if natsProc, url, pprofAddr, err = startNATS(ctx, log, cfg.NATSServer, dir, cfg.NATSCPUProfile != "", cfg.StartWait); err != nil {
			return rep, err
		}
		if durableProc, _, err = startServe(ctx, log, "serve-nats", bin, fi.Path, dir, cfg.Pprof, true, cfg.ServeEnv,
			append([]string{"--nats", url}, extra...), cfg.StartWait); err != nil {
			return rep, err
		}
		durableProc.companion, durableProc.companionPprof = natsProc.pid(), pprofAddr
	}
	if cfg.has("full") {
		var took time.Duration
		if serveProc, took, err = startServe(ctx, log, "serve", bin, fi.Path, dir, cfg.Pprof, cfg.State, cfg.ServeEnv, extra, cfg.StartWait); err != nil {
			return rep, err
		}
		rep.Service = &serviceReport{StartupMS: ms(took)}
		if m, err := readMemory(serveProc.pid()); err == nil {
			rep.Service.Ready = &m
		}
	}

	fullRounds := make([]uint64, len(gens)) // rounds each stream made against the service
	for r := 1; r <= cfg.Repeat; r++ {
		rr := &repetition{Run: r}
		for _, server := range cfg.Servers {
			gens := gensOf[server]
			if err := timeLeft(gens, time.Now()); err != nil {
				rep.Runs = append(rep.Runs, rr)
				return rep, fmt.Errorf("run %d, %s: %w", r, server, err)
			}
			p := sinkProc
			switch server {
			case "full":
				p = serveProc
			case "nats":
				p = durableProc
			}
			before := make([]uint64, len(gens))
			for i, g := range gens {
				before[i] = g.k
			}
			profile := ""
			// The profile is of the first phase of the in-process service,
			// or of the one over JetStream when that is the only one.
			if r == 1 && cfg.CPUProfile != "" && (server == "full" || server == "nats" && !cfg.has("full")) {
				profile = cfg.CPUProfile
			}
			natsProfile := ""
			if r == 1 && server == "nats" {
				natsProfile = cfg.NATSCPUProfile
			}
			res, err := runPhase(ctx, log, cfg, server, p, gens, profile, natsProfile)
			if res != nil {
				if server == "nats" {
					rr.NATS = res
				} else if server == "full" {
					rr.Full = res
					for i, g := range gens {
						fullRounds[i] += (g.k - before[i]) / uint64(len(g.units))
					}
				} else {
					rr.Bare = res
				}
			}
			if err != nil {
				rep.Runs = append(rep.Runs, rr)
				return rep, fmt.Errorf("run %d, %s: %w", r, server, err)
			}
		}
		if rr.Bare != nil && rr.Full != nil && rr.Bare.SamplesPerS > 0 {
			rr.Ratio = rr.Full.SamplesPerS / rr.Bare.SamplesPerS
		}
		if rr.Bare != nil && rr.NATS != nil && rr.Bare.SamplesPerS > 0 {
			rr.RatioNATS = rr.NATS.SamplesPerS / rr.Bare.SamplesPerS
		}
		if rr.Full != nil && rr.NATS != nil && rr.Full.SamplesPerS > 0 {
			rr.NATSOverFull = rr.NATS.SamplesPerS / rr.Full.SamplesPerS
		}
		if rr.Bare != nil && rr.Full != nil && rr.Bare.SamplesPerCPUS > 0 {
			rr.CPURatio = rr.Full.SamplesPerCPUS / rr.Bare.SamplesPerCPUS
		}
		rep.Runs = append(rep.Runs, rr)
	}
	var last int64
	for _, gens := range gensOf {
		for _, g := range gens {
			last = max(last, g.lastTime())
		}
	}
	rep.LastSampleAgeS = time.Since(time.Unix(last, 0)).Seconds()

	if serveProc != nil {
		s := rep.Service
		s.FullPassRounds = slices.Min(fullRounds)
		if cfg.RSS {
			if m, err := readMemory(serveProc.pid()); err == nil {
				s.AfterPass = &m
			} else {
				log.Warn("read the service's memory", "err", err)
			}
		}
		if cfg.HeapProfile != "" {
			if err := fetchToFile(ctx, "http://"+serveProc.httpAddr+"/debug/pprof/heap?gc=1", cfg.HeapProfile); err != nil {
				log.Warn("heap profile", "err", err)
			} else {
				log.Info("wrote heap profile", "file", cfg.HeapProfile)
			}
		}
		if cfg.Metrics {
			for i := range cfg.MetricsTries + 1 {
				sc, err := scrapeMetrics(ctx, serveProc.httpAddr, i < cfg.MetricsTries)
				if err != nil {
					return rep, fmt.Errorf("GET /metrics: %w", err)
				}
				log.Debug("scraped /metrics", "try", i+1, "encoding", sc.Encoding, "ms", sc.MS, "series", sc.Series)
				s.Scrapes = append(s.Scrapes, sc)
			}
			if cfg.RSS {
				if m, err := readMemory(serveProc.pid()); err == nil {
					s.AfterMetrics = &m
				}
			}
		}
		if cfg.MetricsCPUProfile != "" {
			if err := profileScrapes(ctx, log, serveProc.httpAddr, cfg.CPUSeconds, cfg.MetricsCPUProfile); err != nil {
				log.Warn("CPU profile of /metrics", "err", err)
			}
		}
	}

	// Stop them all and check that they ended well.
	for _, p := range []*proc{sinkProc, serveProc, durableProc, natsProc} {
		if p == nil {
			continue
		}
		code, err := p.stop(cfg.StopWait)
		switch p {
		case sinkProc:
			rep.SinkExit = &code
		case serveProc:
			rep.Service.ExitCode = &code
		case durableProc:
			rep.DurableExit = &code
		case natsProc:
			err = nil // nats-server ends with status 1 on SIGTERM by design
		}
		if err != nil {
			rep.problem("%v", err)
		}
	}
	rep.finish()
	return rep, nil
}

// runPhase loads one server for warm-up plus duration and measures it.
func runPhase(ctx context.Context, log *slog.Logger, cfg config, server string, p *proc, gens []*generator, cpuProfile, companionProfile string) (*phaseResult, error) {
	spec := phaseSpec{
		server: server, addr: p.grpcAddr, streams: cfg.Streams, window: cfg.Window, batch: cfg.Batch,
		rate: cfg.Rate, warmup: cfg.Warmup, duration: cfg.Duration, grace: 30 * time.Second,
		creds: cfg.tls.clientCreds(),
	}
	start := time.Now()
	from := start.Add(cfg.Warmup)
	to := from.Add(cfg.Duration)
	log.Info("phase", "server", server, "warmup", cfg.Warmup, "duration", cfg.Duration)

	type outcome struct {
		rs  []*streamResult
		err error
	}
	done := make(chan outcome, 1)
	go func() {
		rs, err := runStreams(ctx, log, spec, gens, start, to)
		done <- outcome{rs, err}
	}()

	// waitUntil waits for t, or for the streams to end; it reports
	// whether t has come. The streams end just after the window does,
	// or before it on an error.
	var ended *outcome
	var endedEarly bool
	waitUntil := func(t time.Time) bool {
		if ended == nil {
			timer := time.NewTimer(time.Until(t))
			defer timer.Stop()
			select {
			case <-timer.C:
			case o := <-done:
				ended = &o
				endedEarly = time.Now().Before(to)
			}
		}
		return !time.Now().Before(t)
	}
	var srv0, cli0, all0, srv1, cli1, all1, comp0, comp1 time.Duration
	type profile struct {
		file string
		err  chan error
	}
	var profiles []profile
	// Over JetStream: the telemetry messages written and the samples they
	// carried, so samples per message.
	written := []string{"genvelope_log_telemetry_messages_written_total", "genvelope_log_samples_written_total"}
	var written0, written1 []float64
	if waitUntil(from) {
		if p.companion != 0 {
			written0, _ = metricValues(ctx, p.httpAddr, written...)
		}
		srv0, comp0 = p.cpu()
		cli0 = selfCPU()
		all0, _ = machineCPU()
		secs := max(1, min(cfg.CPUSeconds, int(cfg.Duration/time.Second)))
		for _, pr := range []struct{ addr, file string }{{p.httpAddr, cpuProfile}, {p.companionPprof, companionProfile}} {
			if pr.file == "" || pr.addr == "" {
				continue
			}
			errc := make(chan error, 1)
			profiles = append(profiles, profile{pr.file, errc})
			go func() {
				errc <- fetchToFile(ctx, fmt.Sprintf("http://%s/debug/pprof/profile?seconds=%d", pr.addr, secs), pr.file)
			}()
		}
	}
	if waitUntil(to) {
		if p.companion != 0 {
			written1, _ = metricValues(ctx, p.httpAddr, written...)
		}
		srv1, comp1 = p.cpu()
		cli1 = selfCPU()
		all1, _ = machineCPU()
	}
	o := ended
	if o == nil {
		got := <-done
		o = &got
	}
	for _, pr := range profiles {
		if err := <-pr.err; err != nil {
			log.Warn("CPU profile", "file", pr.file, "err", err)
		} else {
			log.Info("wrote CPU profile", "file", pr.file)
		}
	}
	if o.rs == nil {
		return nil, o.err
	}
	res := summarize(server, o.rs, from, to)
	if srv1 > 0 {
		res.ServerCPU = float64(srv1-srv0) / float64(cfg.Duration)
		res.CompanionCPU = float64(comp1-comp0) / float64(cfg.Duration)
		res.ClientCPU = float64(cli1-cli0) / float64(cfg.Duration)
		if all1 > 0 {
			res.OtherCPU = max(0, float64(all1-all0)/float64(cfg.Duration)-res.ServerCPU-res.ClientCPU)
		}
		if res.ServerCPU > 0 {
			res.SamplesPerCPUS = res.SamplesPerS / res.ServerCPU
		}
		if res.SamplesPerS > 0 && p.companion != 0 {
			res.ServiceUSPerSample = 1e6 * (res.ServerCPU - res.CompanionCPU) / res.SamplesPerS
			res.CompanionUSPerSample = 1e6 * res.CompanionCPU / res.SamplesPerS
		}
	}
	log.Info("phase done", "server", server, "samples/s", int(res.SamplesPerS), "p50_ms", res.LatencyP50MS,
		"p99_ms", res.LatencyP99MS, "max_ms", res.LatencyMaxMS, "server_cpu", fmt.Sprintf("%.2f", res.ServerCPU),
		"client_cpu", fmt.Sprintf("%.2f", res.ClientCPU), "other_cpu", fmt.Sprintf("%.2f", res.OtherCPU))
	if len(written0) == 2 && len(written1) == 2 && written1[0] > written0[0] {
		res.SamplesPerMessage = (written1[1] - written0[1]) / (written1[0] - written0[0])
	}
	if p.companion != 0 {
		log.Info("server CPU per sample", "server", server, "genvelope_us", fmt.Sprintf("%.2f", res.ServiceUSPerSample),
			"nats_server_us", fmt.Sprintf("%.2f", res.CompanionUSPerSample), "samples_per_message", fmt.Sprintf("%.1f", res.SamplesPerMessage))
	}
	if o.err == nil && endedEarly {
		o.err = errors.New("the streams ended before the measured window did")
	}
	return res, o.err
}

// profileScrapes takes a CPU profile of the service while it answers
// GET /metrics (gzip) back to back. It runs after the timed scrapes, so
// the profile does not slow them.
func profileScrapes(ctx context.Context, log *slog.Logger, httpAddr string, secs int, path string) error {
	profErr := make(chan error, 1)
	go func() {
		profErr <- fetchToFile(ctx, fmt.Sprintf("http://%s/debug/pprof/profile?seconds=%d", httpAddr, secs), path)
	}()
	n := 0
	for {
		select {
		case err := <-profErr:
			if err == nil {
				log.Info("wrote CPU profile of /metrics", "file", path, "scrapes", n)
			}
			return err
		default:
		}
		if _, err := scrapeMetrics(ctx, httpAddr, true); err != nil {
			<-profErr
			return err
		}
		n++
	}
}

// selfCheck decodes two batches of a copy of g and checks that they are
// the PushRequests intended.
func selfCheck(g *generator, batch int) error {
	c := *g
	for seq := uint64(1); seq <= 2; seq++ {
		k0 := c.k
		var req pb.PushRequest
		if err := proto.Unmarshal(c.appendBatch(nil, seq, batch), &req); err != nil {
			return err
		}
		if req.Sequence != seq || len(req.Samples) != batch {
			return fmt.Errorf("batch %d decodes as sequence %d with %d samples", seq, req.Sequence, len(req.Samples))
		}
		n := uint64(len(c.units))
		for j, s := range req.Samples {
			k := k0 + uint64(j)
			want := c.base + int64(k/n)
			if id := unitID(c.units[k%n]); s.UnitId != id || s.Time.GetSeconds() != want || s.Time.GetNanos() != 0 {
				return fmt.Errorf("batch %d sample %d is %s at %d, want %s at %d", seq, j, s.UnitId, s.Time.GetSeconds(), id, want)
			}
			if s.VKv <= 0 || s.FrequencyHz == nil {
				return fmt.Errorf("batch %d sample %d lacks values: %v", seq, j, s)
			}
		}
	}
	return nil
}

// hostInfo describes where the run happened.
type hostInfo struct {
	CPUs       int    `json:"cpus"`
	GOMAXPROCS int    `json:"gomaxprocs"`
	GoVersion  string `json:"go_version"`
	Hostname   string `json:"hostname,omitempty"`
}

func host() hostInfo {
	h, _ := os.Hostname()
	return hostInfo{CPUs: runtime.NumCPU(), GOMAXPROCS: runtime.GOMAXPROCS(0), GoVersion: runtime.Version(), Hostname: filepath.Base(h)}
}
