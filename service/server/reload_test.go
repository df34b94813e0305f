package server_test

import (
	"fmt"
	"net/http"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"google.golang.org/protobuf/proto"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/server"
)

// A new unit in the example fleet, a copy of larchwater-2 under another id.
const larchwater3 = `
  - id: larchwater-3
    name: Larchwater unit 3
    site: larchwater
    rating: {mva: 120, kv: 13.8, power_factor: 0.9, frequency_hz: 50, poles: 36}
    machine:
      rotor: salient
      xd: 1.05
      xq: 0.66
      xl: 0.15
      xp: 0.21
      ra: 0.003
      xd_transient: 0.30
      inertia_h_s: 3.2
      saturation: {s10: 0.09, s12: 0.30}
    field: {air_gap_a: 680, rated_a: 1320}
    prime_mover: {p_max_mw: 110, p_min_mw: 20}
    grid: {x_external_pu: 0.15}
`

// A good fleet file reloaded over POST /-/reload takes effect and keeps
// the state of the units that stay; a bad one is refused, the running
// fleet keeps serving, and the metrics say so.
func TestReload(t *testing.T) {
	path := filepath.Join(t.TempDir(), "fleet.yaml")
	orig := readFile(t, exampleFleet)
	writeFile(t, path, orig)
	r := start(t, server.Config{FleetPath: path})
	ctx := ctxT(t)

	at := time.Now().Add(-time.Hour).Truncate(time.Second)
	push := func(t *testing.T, unit string, kv float64) {
		t.Helper()
		at = at.Add(time.Second)
		p := 250.0
		if unit == "larchwater-3" {
			p = 100 // a smaller machine: 250 MW would be implausible
		}
		resp, err := r.tel.Push(ctx, &pb.PushRequest{Samples: []*pb.Sample{sample(unit, at, p, 60, kv)}})
		if err != nil || resp.Accepted != 1 {
			t.Fatalf("push to %s: %v, %v", unit, resp, err)
		}
	}
	ids := func(t *testing.T) []string {
		t.Helper()
		resp, err := r.fleet.ListUnits(ctx, &pb.ListUnitsRequest{})
		if err != nil {
			t.Fatalf("ListUnits: %v", err)
		}
		var out []string
		for _, u := range resp.Units {
			out = append(out, u.Id)
		}
		slices.Sort(out) // the order is TestFleetQueries' business
		return out
	}
	getUnit := func(t *testing.T, id string) *pb.GetUnitResponse {
		t.Helper()
		resp, err := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: id})
		if err != nil {
			t.Fatalf("GetUnit %s: %v", id, err)
		}
		return resp
	}
	reloadMetrics := func(t *testing.T, wantOK, wantSuccess, wantFailure float64) {
		t.Helper()
		fams := r.scrape(t)
		for _, m := range []struct {
			name   string
			labels map[string]string
			want   float64
		}{
			{"genvelope_fleet_reload_success", nil, wantOK},
			{"genvelope_fleet_reloads_total", map[string]string{"result": "success"}, wantSuccess},
			{"genvelope_fleet_reloads_total", map[string]string{"result": "failure"}, wantFailure},
		} {
			if v, ok := metricValue(fams, m.name, m.labels); !ok || v != m.want {
				t.Errorf("%s%v = %v (found %v), want %v", m.name, m.labels, v, ok, m.want)
			}
		}
	}

	push(t, "harrowmere-1", 20)
	first := getUnit(t, "harrowmere-1").Latest
	reloadMetrics(t, 1, 0, 0)

	// A good change: a new unit, and harrowmere-1's turbine derated from
	// 335 to 300 MW.
	good := replaceOnce(t, orig, "prime_mover: {p_max_mw: 335, p_min_mw: 120}", "prime_mover: {p_max_mw: 300, p_min_mw: 120}") + larchwater3
	writeFile(t, path, good)
	if code, body := post(t, r.base+"/-/reload"); code != http.StatusOK {
		t.Fatalf("reload of a good file: %d %s", code, body)
	}
	wantIDs := []string{"brindle-gt3", "harrowmere-1", "larchwater-2", "larchwater-3"}
	if got := ids(t); !slices.Equal(got, wantIDs) {
		t.Fatalf("units after reload %v, want %v", got, wantIDs)
	}
	h := getUnit(t, "harrowmere-1")
	if h.Unit.PMaxMw != 300 {
		t.Errorf("harrowmere-1 p_max_mw %g after reload, want 300", h.Unit.PMaxMw)
	}
	if !proto.Equal(h.Latest, first) {
		t.Errorf("harrowmere-1 latest after reload %v, want the sample from before %v", h.Latest, first)
	}
	// The kept sample is evaluated again against the new turbine rating:
	// prime-mover margin (p_max - p) / rated MW, as the API defines it
	// (types.proto, Margin.ratio), rated MW = 390 MVA × 0.85.
	if m := marginOf(h.Evaluation, pb.Limit_LIMIT_PRIME_MOVER); m == nil || !closeTo(*m, (300-250)/(390*0.85), 1e-12) {
		t.Errorf("prime-mover margin after reload %v, want %g", m, (300-250)/(390*0.85))
	}
	if getUnit(t, "larchwater-3").Latest != nil {
		t.Error("the new unit has a latest sample before any was pushed")
	}
	push(t, "larchwater-3", 13.8)
	reloadMetrics(t, 1, 1, 0)

	// Bad files are refused and change nothing.
	for i, bad := range []struct {
		name    string
		content string
	}{
		{"xq above xd on a salient rotor", replaceOnce(t, good, "xd: 1.05\n      xq: 0.66                # a salient-pole rotor needs xq, below xd",
			"xd: 1.05\n      xq: 1.20")},
		{"broken YAML", good + "\n  - id: [unclosed\n"},
		{"no such file", ""},
	} {
		t.Run(bad.name, func(t *testing.T) {
			if bad.content == "" {
				if err := os.Remove(path); err != nil {
					t.Fatal(err)
				}
				defer writeFile(t, path, good)
			} else {
				if _, ds := fleet.Parse("bad.yaml", []byte(bad.content)); !ds.HasErrors() {
					t.Fatalf("the bad file has no errors: the test is broken")
				}
				writeFile(t, path, bad.content)
			}
			code, body := post(t, r.base+"/-/reload")
			if code == http.StatusOK || strings.TrimSpace(body) == "" {
				t.Errorf("reload of a bad file: %d %q, want an error status and a reason", code, body)
			}
			if got := ids(t); !slices.Equal(got, wantIDs) {
				t.Errorf("units after a refused reload %v, want %v", got, wantIDs)
			}
			if h := getUnit(t, "harrowmere-1"); h.Unit.PMaxMw != 300 || h.Latest == nil {
				t.Errorf("harrowmere-1 after a refused reload: p_max_mw %g, latest %v", h.Unit.PMaxMw, h.Latest)
			}
			push(t, "harrowmere-1", 20)
			push(t, "larchwater-3", 13.8)
			reloadMetrics(t, 0, 1, float64(i+1))
		})
	}

	// A good file again clears the failure.
	writeFile(t, path, good)
	if code, body := post(t, r.base+"/-/reload"); code != http.StatusOK {
		t.Fatalf("reload of the good file again: %d %s", code, body)
	}
	reloadMetrics(t, 1, 2, 3)
}

func marginOf(e *pb.Evaluation, l pb.Limit) *float64 {
	for _, m := range e.GetMargins() {
		if m.Limit == l {
			return m.Ratio
		}
	}
	return nil
}

// Reloads while samples stream in: every sample is still taken exactly
// once, and (under -race) the reload does not race the ingest path.
func TestReloadWhilePushing(t *testing.T) {
	path := filepath.Join(t.TempDir(), "fleet.yaml")
	writeFile(t, path, readFile(t, exampleFleet))
	r := start(t, server.Config{FleetPath: path})
	ctx := ctxT(t)
	units := []string{"harrowmere-1", "larchwater-2", "brindle-gt3"}
	kv := []float64{20, 13.8, 15}
	const (
		reloads  = 50
		perBatch = 20
		most     = 2000 // batches per unit at most, should the reloads be slow
	)
	t0 := time.Now().Add(-24 * time.Hour)
	// Each pusher goes on until the reloads are done (so that the two
	// surely overlap) and reports how many batches it pushed.
	done := make(chan struct{})
	type result struct {
		batches int
		err     error
	}
	results := make(chan result, len(units))
	for j, u := range units {
		go func() {
			b := 0
			for ; b < most; b++ {
				select {
				case <-done:
					results <- result{b, nil}
					return
				default:
				}
				req := &pb.PushRequest{Sequence: uint64(b)}
				for k := range perBatch {
					req.Samples = append(req.Samples, sample(u, t0.Add(time.Duration(b*perBatch+k)*time.Second), 100, 10, kv[j]))
				}
				resp, err := r.tel.Push(ctx, req)
				if err == nil && resp.Accepted != perBatch {
					err = fmt.Errorf("%s batch %d: %v", u, b, resp)
				}
				if err != nil {
					results <- result{b, err}
					return
				}
			}
			results <- result{b, nil}
		}()
	}
	for range reloads {
		if err := r.srv.Reload(); err != nil {
			close(done)
			t.Fatalf("reload: %v", err)
		}
	}
	close(done)
	var pushed uint64
	for range units {
		res := <-results
		if res.err != nil {
			t.Error(res.err)
		}
		pushed += uint64(res.batches * perBatch)
	}
	var accepted uint64
	for _, u := range units {
		accepted += r.srv.Store().Unit(u).View().Accepted
	}
	if c := r.srv.Store().Counts(); accepted != pushed || c[ingest.Accepted] != pushed {
		t.Errorf("units accepted %d samples, store counts %d, want the %d pushed", accepted, c[ingest.Accepted], pushed)
	}
}
