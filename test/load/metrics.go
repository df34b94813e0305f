package main

import (
	"bufio"
	"bytes"
	"compress/gzip"
	"context"
	"fmt"
	"io"
	"net/http"
	"os"
	"strconv"
	"strings"
	"time"
)

// scrape is one GET /metrics.
type scrape struct {
	Encoding  string  `json:"encoding"` // what the server sent: gzip or identity
	MS        float64 `json:"ms"`       // request sent to the last byte read
	WireBytes int     `json:"wire_bytes"`
	BodyBytes int     `json:"body_bytes"` // after decompression
	Series    int     `json:"series"`
	// Units with a genvelope_unit_samples_accepted_total above zero.
	UnitsWithSamples int `json:"units_with_samples"`
	// Some of the Go runtime's own figures, as the service exports them.
	Runtime map[string]float64 `json:"go_runtime,omitempty"`
}

// runtimeSeries are the Go runtime series a scrape keeps.
var runtimeSeries = []string{
	"go_memstats_heap_alloc_bytes", "go_memstats_heap_inuse_bytes", "go_memstats_heap_idle_bytes",
	"go_memstats_heap_released_bytes", "go_memstats_heap_sys_bytes", "go_memstats_next_gc_bytes",
	"go_memstats_sys_bytes", "go_gc_duration_seconds_count", "go_goroutines", "go_gc_gogc_percent",
	"go_gc_gomemlimit_bytes",
}

// scrapeMetrics fetches /metrics once, asking for gzip as Prometheus
// does when gz is set, and counts what it got.
func scrapeMetrics(ctx context.Context, httpAddr string, gz bool) (scrape, error) {
	client := &http.Client{Transport: &http.Transport{DisableCompression: true}, Timeout: 60 * time.Second}
	defer client.CloseIdleConnections()
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, "http://"+httpAddr+"/metrics", nil)
	if err != nil {
		return scrape{}, err
	}
	if gz {
		req.Header.Set("Accept-Encoding", "gzip")
	} else {
		req.Header.Set("Accept-Encoding", "identity")
	}
	start := time.Now()
	resp, err := client.Do(req)
	if err != nil {
		return scrape{}, err
	}
	defer resp.Body.Close()
	wire, err := io.ReadAll(resp.Body)
	took := time.Since(start)
	if err != nil {
		return scrape{}, err
	}
	if resp.StatusCode != http.StatusOK {
		return scrape{}, fmt.Errorf("GET /metrics: %s", resp.Status)
	}
	s := scrape{Encoding: "identity", MS: ms(took), WireBytes: len(wire)}
	body := wire
	if resp.Header.Get("Content-Encoding") == "gzip" {
		s.Encoding = "gzip"
		zr, err := gzip.NewReader(bytes.NewReader(wire))
		if err != nil {
			return scrape{}, err
		}
		if body, err = io.ReadAll(zr); err != nil {
			return scrape{}, fmt.Errorf("gunzip /metrics: %w", err)
		}
	}
	s.BodyBytes = len(body)
	s.Series, s.UnitsWithSamples, s.Runtime = countSeries(body)
	return s, nil
}

// countSeries counts the samples of a text exposition and the units
// whose accepted-sample counter is above zero, and picks the runtime
// series.
func countSeries(body []byte) (series, withSamples int, rt map[string]float64) {
	rt = map[string]float64{}
	sc := bufio.NewScanner(bytes.NewReader(body))
	sc.Buffer(make([]byte, 0, 64<<10), 1<<20)
	for sc.Scan() {
		line := sc.Text()
		if line == "" || line[0] == '#' {
			continue
		}
		series++
		i := strings.LastIndexByte(line, ' ')
		if i < 0 {
			continue
		}
		name, value := line[:i], line[i+1:]
		switch {
		case strings.HasPrefix(name, "genvelope_unit_samples_accepted_total{"):
			if v, err := strconv.ParseFloat(value, 64); err == nil && v > 0 {
				withSamples++
			}
		case strings.HasPrefix(name, "go_"):
			for _, n := range runtimeSeries {
				if name == n {
					if v, err := strconv.ParseFloat(value, 64); err == nil {
						rt[n] = v
					}
				}
			}
		}
	}
	return series, withSamples, rt
}

// fetchToFile saves GET url into path, for the pprof endpoints.
func fetchToFile(ctx context.Context, url, path string) error {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, url, nil)
	if err != nil {
		return err
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		return err
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		b, _ := io.ReadAll(io.LimitReader(resp.Body, 512))
		return fmt.Errorf("GET %s: %s: %s", url, resp.Status, bytes.TrimSpace(b))
	}
	f, err := os.Create(path)
	if err != nil {
		return err
	}
	if _, err := io.Copy(f, resp.Body); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}

// metricValues returns the values of the named series (without labels)
// in the service's /metrics, 0 for one it does not show.
func metricValues(ctx context.Context, httpAddr string, names ...string) ([]float64, error) {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, "http://"+httpAddr+"/metrics", nil)
	if err != nil {
		return nil, err
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		return nil, err
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		return nil, err
	}
	vals := make([]float64, len(names))
	for line := range bytes.SplitSeq(body, []byte("\n")) {
		name, v, ok := bytes.Cut(line, []byte(" "))
		if !ok {
			continue
		}
		for i, n := range names {
			if string(name) == n {
				if vals[i], err = strconv.ParseFloat(string(v), 64); err != nil {
					return nil, fmt.Errorf("/metrics %s: %w", n, err)
				}
			}
		}
	}
	return vals, nil
}
