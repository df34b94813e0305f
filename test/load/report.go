package main

import (
	"fmt"
	"io"
	"maps"
	"math"
	"slices"
	"strings"
	"text/tabwriter"
)

// The targets of issue 13, for this machine with client and servers on
// it together, weighed on the median of the runs (-repeat 5 or more).
const (
	targetRatioSmall = 0.8   // full/bare samples/s at 1,000 units (and below 10,000)
	targetRatioLarge = 0.7   // full/bare samples/s at 10,000 units and more
	targetRatioNATS  = 0.5   // the service over one local JetStream node
	targetP99MS      = 50    // ack latency, every mode
	targetRSSMiB     = 200   // VmRSS after a full pass, 10,000 units
	targetHWMMiB     = 256   // VmHWM, 10,000 units
	targetMetricsMS  = 250   // GET /metrics, 10,000 units
	targetFleetUnits = 10000 // the large-fleet ratio and the RSS, VmHWM and /metrics targets are for this many units
)

// targetRatio returns the full/bare target for a fleet of units units.
func targetRatio(units int) float64 {
	if units >= targetFleetUnits {
		return targetRatioLarge
	}
	return targetRatioSmall
}

// report is the result of one run; it is also the JSON output.
type report struct {
	Config    config   `json:"config"`
	DurationS float64  `json:"duration_s"`
	WarmupS   float64  `json:"warmup_s"`
	Host      hostInfo `json:"host"`

	Fleet   *fleetInfo     `json:"fleet"`
	Runs    []*repetition  `json:"runs"`
	Summary *summary       `json:"summary,omitempty"`
	Service *serviceReport `json:"service,omitempty"`
	// Exit status of the bare sink after SIGTERM.
	SinkExit *int `json:"sink_exit_code,omitempty"`
	// Exit status of the service over JetStream after SIGTERM.
	DurableExit *int `json:"nats_service_exit_code,omitempty"`
	// How old the newest sample timestamp was at the end, s (it must stay
	// positive, or the service rejects samples as from the future).
	LastSampleAgeS float64 `json:"last_sample_age_s"`

	Targets []target `json:"targets"`
	Checks  checks   `json:"checks"`
}

// repetition is one pair of phases.
type repetition struct {
	Run   int          `json:"run"`
	Bare  *phaseResult `json:"bare,omitempty"`
	Full  *phaseResult `json:"full,omitempty"`
	Ratio float64      `json:"ratio_full_over_bare,omitempty"`
	// Full over bare of samples per server CPU second.
	CPURatio float64 `json:"cpu_ratio_full_over_bare,omitempty"`
	// The service over JetStream (-nats): its server CPU is genvelope's
	// and nats-server's together.
	NATS         *phaseResult `json:"nats,omitempty"`
	RatioNATS    float64      `json:"ratio_nats_over_bare,omitempty"`
	NATSOverFull float64      `json:"ratio_nats_over_full,omitempty"` // 1 minus the cost of durability
}

// spread is the minimum, median and maximum of a figure over the runs.
type spread struct {
	Min    float64 `json:"min"`
	Median float64 `json:"median"`
	Max    float64 `json:"max"`
}

func spreadOf(xs []float64) *spread {
	if len(xs) == 0 {
		return nil
	}
	s := slices.Clone(xs)
	slices.Sort(s)
	m := s[len(s)/2]
	if len(s)%2 == 0 {
		m = (s[len(s)/2-1] + s[len(s)/2]) / 2
	}
	return &spread{Min: s[0], Median: m, Max: s[len(s)-1]}
}

func (s *spread) String() string {
	if s == nil {
		return "-"
	}
	return fmt.Sprintf("%s / %s / %s", num(s.Min), num(s.Median), num(s.Max))
}

type summary struct {
	BareSamplesPerS *spread `json:"bare_samples_per_s,omitempty"`
	FullSamplesPerS *spread `json:"full_samples_per_s,omitempty"`
	Ratio           *spread `json:"ratio_full_over_bare,omitempty"`
	// The same ratio of samples per server CPU second.
	CPURatio  *spread `json:"cpu_ratio_full_over_bare,omitempty"`
	FullP99MS *spread `json:"full_ack_latency_p99_ms,omitempty"`
	// Server CPU per sample, µs: what the noise of a shared machine
	// moves least.
	BareCPUUS *spread `json:"bare_server_cpu_us_per_sample,omitempty"`
	FullCPUUS *spread `json:"full_server_cpu_us_per_sample,omitempty"`

	NATSSamplesPerS *spread `json:"nats_samples_per_s,omitempty"`
	RatioNATS       *spread `json:"ratio_nats_over_bare,omitempty"`
	NATSOverFull    *spread `json:"ratio_nats_over_full,omitempty"`
	NATSP99MS       *spread `json:"nats_ack_latency_p99_ms,omitempty"`
}

// serviceReport is what was seen of the genvelope serve process.
type serviceReport struct {
	StartupMS float64 `json:"startup_ms"` // start to /readyz answering
	Ready     *memory `json:"memory_ready,omitempty"`
	// Memory after the phases, in which every stream went over all its
	// units FullPassRounds times at least.
	AfterPass      *memory  `json:"memory_after_pass,omitempty"`
	FullPassRounds uint64   `json:"full_pass_rounds"`
	AfterMetrics   *memory  `json:"memory_after_metrics,omitempty"`
	Scrapes        []scrape `json:"metrics_scrapes,omitempty"`
	MetricsMinMS   float64  `json:"metrics_gzip_min_ms,omitempty"`
	MetricsMaxMS   float64  `json:"metrics_gzip_max_ms,omitempty"`
	ExitCode       *int     `json:"exit_code,omitempty"`
}

// target is one target of the issue and how this run did.
type target struct {
	Name   string  `json:"name"`
	Want   string  `json:"want"`
	Got    float64 `json:"got"`
	Status string  `json:"status"` // met, missed, or n/a with the reason
}

type checks struct {
	OK       bool     `json:"ok"`
	Problems []string `json:"problems"`
}

func newReport(cfg config) *report {
	return &report{Config: cfg, DurationS: cfg.Duration.Seconds(), WarmupS: cfg.Warmup.Seconds(), Host: host(),
		Checks: checks{Problems: []string{}}}
}

func (r *report) problem(format string, args ...any) {
	r.Checks.Problems = append(r.Checks.Problems, fmt.Sprintf(format, args...))
}

// finish checks the counts, totals the runs and weighs the targets.
func (r *report) finish() {
	var bare, full, ratio, cpuRatio, p99, natsS, natsRatio, natsOverFull, natsP99, bareUS, fullUS []float64
	for _, rr := range r.Runs {
		if p := rr.Bare; p != nil && p.SamplesPerCPUS > 0 {
			bareUS = append(bareUS, 1e6/p.SamplesPerCPUS)
		}
		if p := rr.Full; p != nil && p.SamplesPerCPUS > 0 {
			fullUS = append(fullUS, 1e6/p.SamplesPerCPUS)
		}
		if p := rr.Bare; p != nil {
			bare = append(bare, p.SamplesPerS)
			if p.TotalAccepted != p.TotalSent || p.Duplicates != 0 || len(p.Rejected) != 0 {
				r.problem("run %d, bare sink: %d samples sent, %d accepted", rr.Run, p.TotalSent, p.TotalAccepted)
			}
			r.checkPhase(rr.Run, p)
		}
		if p := rr.NATS; p != nil {
			natsS = append(natsS, p.SamplesPerS)
			natsP99 = append(natsP99, p.LatencyP99MS)
			r.checkService(rr.Run, p)
		}
		if rr.RatioNATS > 0 {
			natsRatio = append(natsRatio, rr.RatioNATS)
		}
		if rr.NATSOverFull > 0 {
			natsOverFull = append(natsOverFull, rr.NATSOverFull)
		}
		if p := rr.Full; p != nil {
			full = append(full, p.SamplesPerS)
			p99 = append(p99, p.LatencyP99MS)
			r.checkService(rr.Run, p)
		}
		if rr.Ratio > 0 {
			ratio = append(ratio, rr.Ratio)
		}
		if rr.CPURatio > 0 {
			cpuRatio = append(cpuRatio, rr.CPURatio)
		}
	}
	r.Summary = &summary{BareSamplesPerS: spreadOf(bare), FullSamplesPerS: spreadOf(full), Ratio: spreadOf(ratio), CPURatio: spreadOf(cpuRatio), FullP99MS: spreadOf(p99),
		NATSSamplesPerS: spreadOf(natsS), RatioNATS: spreadOf(natsRatio), NATSOverFull: spreadOf(natsOverFull), NATSP99MS: spreadOf(natsP99),
		BareCPUUS: spreadOf(bareUS), FullCPUUS: spreadOf(fullUS)}
	r.finishService()
}

// checkService checks the answers of a phase of the service (in
// process or over JetStream).
func (r *report) checkService(run int, p *phaseResult) {
	rejected := 0
	for _, n := range p.Rejected {
		rejected += n
	}
	if got := p.TotalAccepted + p.Duplicates + rejected; got != p.TotalSent {
		r.problem("run %d, %s: %d samples sent, %d answered (accepted %d + duplicates %d + rejected %d)",
			run, p.Server, p.TotalSent, got, p.TotalAccepted, p.Duplicates, rejected)
	}
	if rejected > 0 {
		r.problem("run %d, %s: %d samples rejected: %v; first: %s", run, p.Server, rejected, p.Rejected, strings.Join(p.Rejections, "; "))
	}
	if p.Duplicates > 0 {
		r.problem("run %d, %s: %d samples taken as duplicates", run, p.Server, p.Duplicates)
	}
	r.checkPhase(run, p)
}

// finishService checks the service's exit and scrapes, and weighs the
// targets.
func (r *report) finishService() {
	// A child's exit status was checked, and a problem added, when it
	// was stopped.
	if s := r.Service; s != nil {
		if s.FullPassRounds < 1 && len(r.Runs) > 0 {
			r.problem("the phases did not make a full pass over the units of every stream")
		}
		var gz []float64
		for _, sc := range s.Scrapes {
			if sc.Encoding == "gzip" {
				gz = append(gz, sc.MS)
			}
			if sc.UnitsWithSamples != r.Config.Units {
				r.problem("/metrics shows %d units with accepted samples, want %d", sc.UnitsWithSamples, r.Config.Units)
			}
		}
		if len(gz) > 0 {
			s.MetricsMinMS, s.MetricsMaxMS = slices.Min(gz), slices.Max(gz)
		}
	}
	if r.LastSampleAgeS < 300 && len(r.Runs) > 0 {
		r.problem("the newest sample was stamped %.0f s before the end: the 30-day time budget ran out (use more -units or shorter phases)", r.LastSampleAgeS)
	}
	r.weighTargets()
	r.Checks.OK = len(r.Checks.Problems) == 0
}

func (r *report) checkPhase(run int, p *phaseResult) {
	if p.Mismatches > 0 {
		r.problem("run %d, %s: %d answers whose counts do not add up to their batch", run, p.Server, p.Mismatches)
	}
	if p.SeqErrors > 0 {
		r.problem("run %d, %s: %d answers out of sequence", run, p.Server, p.SeqErrors)
	}
	if p.Batches == 0 {
		r.problem("run %d, %s: no batch was answered in the measured window", run, p.Server)
	}
}

func (r *report) weighTargets() {
	s := r.Summary
	status := func(ok bool) string {
		if ok {
			return "met"
		}
		return "missed"
	}
	if s.Ratio != nil {
		want := targetRatio(r.Config.Units)
		r.Targets = append(r.Targets, target{Name: fmt.Sprintf("full/bare samples/s (median of %d)", len(r.Runs)), Want: fmt.Sprintf(">= %.1f", want),
			Got: s.Ratio.Median, Status: status(s.Ratio.Median >= want)})
	}
	if s.RatioNATS != nil {
		r.Targets = append(r.Targets, target{Name: "nats/bare samples/s (median)", Want: fmt.Sprintf(">= %.1f", targetRatioNATS),
			Got: s.RatioNATS.Median, Status: status(s.RatioNATS.Median >= targetRatioNATS)})
	}
	if s.NATSP99MS != nil {
		r.Targets = append(r.Targets, target{Name: "nats ack latency p99, ms (median)", Want: fmt.Sprintf("<= %d", targetP99MS),
			Got: s.NATSP99MS.Median, Status: status(s.NATSP99MS.Median <= targetP99MS)})
	}
	if s.FullP99MS != nil {
		r.Targets = append(r.Targets, target{Name: "service ack latency p99, ms (median)", Want: fmt.Sprintf("<= %d", targetP99MS),
			Got: s.FullP99MS.Median, Status: status(s.FullP99MS.Median <= targetP99MS)})
	}
	sv := r.Service
	if sv == nil {
		return
	}
	scale := func(ok bool) string {
		if r.Config.Units < targetFleetUnits {
			return fmt.Sprintf("n/a: the target is for %d units", targetFleetUnits)
		}
		return status(ok)
	}
	if m := sv.AfterPass; m != nil {
		mib := float64(m.RSSKiB) / 1024
		r.Targets = append(r.Targets, target{Name: "service VmRSS after a full pass, MiB", Want: fmt.Sprintf("<= %d", targetRSSMiB),
			Got: mib, Status: scale(mib <= targetRSSMiB)})
	}
	if m := sv.AfterMetrics; m != nil {
		mib := float64(m.HWMKiB) / 1024
		r.Targets = append(r.Targets, target{Name: "service VmHWM, MiB", Want: fmt.Sprintf("<= %d", targetHWMMiB),
			Got: mib, Status: scale(mib <= targetHWMMiB)})
	}
	if sv.MetricsMaxMS > 0 {
		r.Targets = append(r.Targets, target{Name: "GET /metrics, ms (slowest gzip try)", Want: fmt.Sprintf("<= %d", targetMetricsMS),
			Got: sv.MetricsMaxMS, Status: scale(sv.MetricsMaxMS <= targetMetricsMS)})
	}
}

// writeTable prints the report for people.
func (r *report) writeTable(w io.Writer) {
	c := r.Config
	rate := "as fast as possible"
	if c.Rate > 0 {
		rate = num(c.Rate) + " samples/s"
	}
	fmt.Fprintf(w, "\ngenvelope load: %d units, %d streams x window %d, batch %d, %s, %s per phase (+%s warm-up); %d CPUs, %s\n",
		c.Units, c.Streams, c.Window, c.Batch, rate, c.Duration, c.Warmup, r.Host.CPUs, r.Host.GoVersion)
	if len(r.Runs) > 0 {
		tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "run\tserver\tsamples/s\tbatches\tp50 ms\tp90 ms\tp99 ms\tmax ms\tsrv cores\tcli cores\tother cores\tsamples/srv cpu s\trejected\tratio\tcpu ratio\t")
		for _, rr := range r.Runs {
			for _, p := range []*phaseResult{rr.Bare, rr.Full, rr.NATS} {
				if p == nil {
					continue
				}
				ratio, cpuRatio := "", ""
				if p == rr.Full && rr.Ratio > 0 {
					ratio = fmt.Sprintf("%.2f", rr.Ratio)
				}
				if p == rr.NATS && rr.RatioNATS > 0 {
					ratio = fmt.Sprintf("%.2f", rr.RatioNATS)
				}
				if p == rr.Full && rr.CPURatio > 0 {
					cpuRatio = fmt.Sprintf("%.2f", rr.CPURatio)
				}
				rej := 0
				for _, n := range p.Rejected {
					rej += n
				}
				fmt.Fprintf(tw, "%d\t%s\t%s\t%d\t%.1f\t%.1f\t%.1f\t%.1f\t%.2f\t%.2f\t%.2f\t%s\t%d\t%s\t%s\t\n", rr.Run, p.Server, num(p.SamplesPerS), p.Batches,
					p.LatencyP50MS, p.LatencyP90MS, p.LatencyP99MS, p.LatencyMaxMS, p.ServerCPU, p.ClientCPU, p.OtherCPU, num(p.SamplesPerCPUS), rej, ratio, cpuRatio)
			}
		}
		tw.Flush()
	}
	if s := r.Summary; s != nil && len(r.Runs) > 1 {
		fmt.Fprintf(w, "spread over %d runs (min / median / max): bare %s samples/s, full %s samples/s, ratio %s, cpu ratio %s, full p99 %s ms\n",
			len(r.Runs), s.BareSamplesPerS, s.FullSamplesPerS, s.Ratio, s.CPURatio, s.FullP99MS)
	}
	if s := r.Summary; s != nil && (s.FullCPUUS != nil || s.BareCPUUS != nil) {
		fmt.Fprintf(w, "medians of %d runs: ", len(r.Runs))
		if s.BareSamplesPerS != nil {
			fmt.Fprintf(w, "bare %s samples/s (%.3f µs of server CPU a sample); ", num(s.BareSamplesPerS.Median), medianOf(s.BareCPUUS))
		}
		if s.FullSamplesPerS != nil {
			fmt.Fprintf(w, "full %s samples/s (%.3f µs of server CPU a sample)", num(s.FullSamplesPerS.Median), medianOf(s.FullCPUUS))
		}
		if s.Ratio != nil {
			fmt.Fprintf(w, "; ratio %.3f, cpu ratio %.3f", s.Ratio.Median, medianOf(s.CPURatio))
		}
		fmt.Fprintln(w)
	}
	for _, rr := range r.Runs {
		if rr.NATSOverFull > 0 {
			fmt.Fprintf(w, "run %d: the service over JetStream takes %.2f of the in-process service's samples/s (cost of durability %.0f %%; its server cores are genvelope's and nats-server's)\n",
				rr.Run, rr.NATSOverFull, 100*(1-rr.NATSOverFull))
		}
		if p := rr.NATS; p != nil && p.SamplesPerS > 0 {
			fmt.Fprintf(w, "run %d: CPU per acknowledged sample over JetStream: genvelope %.2f µs, nats-server %.2f µs; %.1f samples per message in the stream\n",
				rr.Run, p.ServiceUSPerSample, p.CompanionUSPerSample, p.SamplesPerMessage)
		}
	}
	if sv := r.Service; sv != nil {
		fmt.Fprintf(w, "service: ready in %.0f ms", sv.StartupMS)
		for _, m := range []struct {
			what string
			m    *memory
		}{{"at ready", sv.Ready}, {"after pass", sv.AfterPass}, {"after /metrics", sv.AfterMetrics}} {
			if m.m != nil {
				fmt.Fprintf(w, "; %s VmRSS %s (VmHWM %s)", m.what, mib(m.m.RSSKiB), mib(m.m.HWMKiB))
			}
		}
		fmt.Fprintln(w)
		for i, sc := range sv.Scrapes {
			fmt.Fprintf(w, "GET /metrics #%d (%s): %.0f ms, %s on the wire, %s body, %s series, %d units with samples\n",
				i+1, sc.Encoding, sc.MS, mib(int64(sc.WireBytes)/1024), mib(int64(sc.BodyBytes)/1024), num(float64(sc.Series)), sc.UnitsWithSamples)
		}
		if sv.MetricsMaxMS > 0 {
			fmt.Fprintf(w, "GET /metrics gzip: min %.0f ms, max %.0f ms\n", sv.MetricsMinMS, sv.MetricsMaxMS)
		}
		if len(sv.Scrapes) > 0 && len(sv.Scrapes[0].Runtime) > 0 {
			rt := sv.Scrapes[0].Runtime
			b := func(k string) string { return mib(int64(rt["go_memstats_"+k+"_bytes"]) / 1024) }
			fmt.Fprintf(w, "service Go runtime at the first scrape: heap alloc %s, inuse %s, idle %s (released %s), next GC %s, sys %s; %.0f GCs, GOGC %.0f\n",
				b("heap_alloc"), b("heap_inuse"), b("heap_idle"), b("heap_released"), b("next_gc"), b("sys"),
				rt["go_gc_duration_seconds_count"], rt["go_gc_gogc_percent"])
		}
	}
	if len(r.Targets) > 0 {
		fmt.Fprintln(w, "targets:")
		for _, t := range r.Targets {
			got := num(t.Got)
			if t.Got < 10 {
				got = fmt.Sprintf("%.3f", t.Got)
			}
			fmt.Fprintf(w, "  %-40s %-8s got %-10s %s\n", t.Name, t.Want, got, t.Status)
		}
	}
	if r.Checks.OK {
		fmt.Fprintln(w, "checks: ok (every answer adds up, nothing rejected, both children exited 0)")
	} else {
		fmt.Fprintf(w, "checks: %d problems\n", len(r.Checks.Problems))
		for _, p := range r.Checks.Problems {
			fmt.Fprintf(w, "  - %s\n", p)
		}
	}
	for _, rr := range r.Runs {
		for _, p := range []*phaseResult{rr.Bare, rr.Full, rr.NATS} {
			if p != nil && len(p.Rejected) > 0 {
				fmt.Fprintf(w, "run %d %s rejections by reason:", rr.Run, p.Server)
				for _, k := range slices.Sorted(maps.Keys(p.Rejected)) {
					fmt.Fprintf(w, " %s=%d", k, p.Rejected[k])
				}
				fmt.Fprintln(w)
			}
		}
	}
}

// medianOf returns the median of s, or NaN.
func medianOf(s *spread) float64 {
	if s == nil {
		return math.NaN()
	}
	return s.Median
}

// num formats a figure with thousands separators, or with decimals
// when it is small.
func num(x float64) string {
	if x < 100 && x > -100 {
		return strings.TrimRight(strings.TrimRight(fmt.Sprintf("%.2f", x), "0"), ".")
	}
	s := fmt.Sprintf("%.0f", x)
	neg := strings.HasPrefix(s, "-")
	s = strings.TrimPrefix(s, "-")
	var b strings.Builder
	for i, c := range s {
		if i > 0 && (len(s)-i)%3 == 0 {
			b.WriteByte(',')
		}
		b.WriteRune(c)
	}
	if neg {
		return "-" + b.String()
	}
	return b.String()
}

func mib(kib int64) string { return fmt.Sprintf("%.1f MiB", float64(kib)/1024) }
