package server_test

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	dto "github.com/prometheus/client_model/go"
	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"
	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/protobuf/reflect/protoreflect"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/server"
)

// exampleFleet is the fleet file the service ships as its example.
const exampleFleet = "../../deploy/examples/fleet.yaml"

// waitLong bounds every wait of these tests. It is generous on purpose:
// nothing is asserted about how fast anything is, only that it happens.
const waitLong = 60 * time.Second

// running is one in-process server on loopback ports, with a real gRPC
// client over loopback.
type running struct {
	srv    *server.Server
	conn   *grpc.ClientConn
	tel    pb.TelemetryServiceClient
	fleet  pb.FleetServiceClient
	base   string // http://host:port of the HTTP listener
	cancel context.CancelFunc
	done   chan error // receives Run's result once
}

// start runs a server over cfg, with loopback port-0 listeners unless
// cfg names others. The server is stopped when the test ends.
func start(t *testing.T, cfg server.Config) *running {
	t.Helper()
	if cfg.FleetPath == "" {
		cfg.FleetPath = exampleFleet
	}
	if cfg.GRPCListen == "" {
		cfg.GRPCListen = "127.0.0.1:0"
	}
	if cfg.HTTPListen == "" {
		cfg.HTTPListen = "127.0.0.1:0"
	}
	if cfg.Logger == nil {
		cfg.Logger = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	srv, err := server.New(cfg)
	if err != nil {
		t.Fatalf("server.New: %v", err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	r := &running{srv: srv, base: "http://" + srv.HTTPAddr(), cancel: cancel, done: make(chan error, 1)}
	go func() { r.done <- srv.Run(ctx) }()
	conn, err := grpc.NewClient(srv.GRPCAddr(), grpc.WithTransportCredentials(insecure.NewCredentials()))
	if err != nil {
		cancel()
		t.Fatalf("grpc client: %v", err)
	}
	r.conn, r.tel, r.fleet = conn, pb.NewTelemetryServiceClient(conn), pb.NewFleetServiceClient(conn)
	t.Cleanup(func() {
		conn.Close()
		cancel()
		select {
		case <-r.done:
		case <-time.After(waitLong):
			t.Errorf("server did not stop within %s", waitLong)
		}
	})
	r.waitReady(t)
	return r
}

// waitReady waits until /readyz answers 200.
func (r *running) waitReady(t *testing.T) {
	t.Helper()
	deadline := time.Now().Add(waitLong)
	for {
		resp, err := http.Get(r.base + "/readyz")
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				return
			}
		}
		if time.Now().After(deadline) {
			t.Fatalf("server not ready within %s: last error %v", waitLong, err)
		}
		time.Sleep(10 * time.Millisecond)
	}
}

// stop cancels Run's context and returns what Run returned.
func (r *running) stop(t *testing.T) error {
	t.Helper()
	r.cancel()
	select {
	case err := <-r.done:
		r.done <- err // for the cleanup
		return err
	case <-time.After(waitLong):
		t.Fatalf("Run did not return within %s of its context ending", waitLong)
		return nil
	}
}

func ctxT(t *testing.T) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), waitLong)
	t.Cleanup(cancel)
	return ctx
}

// scrape fetches /metrics and parses it.
func (r *running) scrape(t *testing.T) map[string]*dto.MetricFamily {
	t.Helper()
	resp, err := http.Get(r.base + "/metrics")
	if err != nil {
		t.Fatalf("GET /metrics: %v", err)
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		t.Fatalf("GET /metrics: %s", resp.Status)
	}
	p := expfmt.NewTextParser(model.UTF8Validation)
	fams, err := p.TextToMetricFamilies(resp.Body)
	if err != nil {
		t.Fatalf("parse /metrics: %v", err)
	}
	return fams
}

// metricValue returns the value of the series of family name whose
// labels include every pair of labels, and whether there is exactly one.
func metricValue(fams map[string]*dto.MetricFamily, name string, labels map[string]string) (float64, bool) {
	f := fams[name]
	if f == nil {
		return 0, false
	}
	var found []float64
	for _, m := range f.Metric {
		if !hasLabels(m, labels) {
			continue
		}
		switch {
		case m.Gauge != nil:
			found = append(found, m.Gauge.GetValue())
		case m.Counter != nil:
			found = append(found, m.Counter.GetValue())
		case m.Untyped != nil:
			found = append(found, m.Untyped.GetValue())
		}
	}
	if len(found) != 1 {
		return 0, false
	}
	return found[0], true
}

func hasLabels(m *dto.Metric, want map[string]string) bool {
	n := 0
	for _, lp := range m.Label {
		if v, ok := want[lp.GetName()]; ok {
			if v != lp.GetValue() {
				return false
			}
			n++
		}
	}
	return n == len(want)
}

func post(t *testing.T, url string) (int, string) {
	t.Helper()
	resp, err := http.Post(url, "text/plain", nil)
	if err != nil {
		t.Fatalf("POST %s: %v", url, err)
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, string(b)
}

// loadFleet parses a fleet file the way the test's own reference
// computations need it, independently of the server.
func loadFleet(t *testing.T, path string) *fleet.Fleet {
	t.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	fl, ds := fleet.Parse(filepath.Base(path), data)
	if ds.HasErrors() {
		t.Fatalf("%s: %v", path, ds)
	}
	return fl
}

// sample builds a sample of a unit at time at.
func sample(unit string, at time.Time, pMW, qMvar, vKV float64) *pb.Sample {
	return &pb.Sample{UnitId: unit, Time: timestamppb.New(at), PMw: pMW, QMvar: qMvar, VKv: vKV}
}

func f64(x float64) *float64 { return &x }

func ts(t time.Time) *timestamppb.Timestamp { return timestamppb.New(t) }

// approxEqual compares two messages field by field: doubles within a
// relative tolerance, everything else exactly. It returns the first
// difference found, or "".
func approxEqual(got, want protoreflect.Message, tol float64, path string) string {
	if got.Descriptor().FullName() != want.Descriptor().FullName() {
		return fmt.Sprintf("%s: message %s, want %s", path, got.Descriptor().FullName(), want.Descriptor().FullName())
	}
	fields := got.Descriptor().Fields()
	for i := 0; i < fields.Len(); i++ {
		fd := fields.Get(i)
		p := path + "." + string(fd.Name())
		if got.Has(fd) != want.Has(fd) {
			return fmt.Sprintf("%s: present %v, want %v", p, got.Has(fd), want.Has(fd))
		}
		if !got.Has(fd) {
			continue
		}
		gv, wv := got.Get(fd), want.Get(fd)
		if fd.IsList() {
			gl, wl := gv.List(), wv.List()
			if gl.Len() != wl.Len() {
				return fmt.Sprintf("%s: %d entries, want %d", p, gl.Len(), wl.Len())
			}
			for j := 0; j < gl.Len(); j++ {
				if d := approxValue(fd, gl.Get(j), wl.Get(j), tol, fmt.Sprintf("%s[%d]", p, j)); d != "" {
					return d
				}
			}
			continue
		}
		if d := approxValue(fd, gv, wv, tol, p); d != "" {
			return d
		}
	}
	return ""
}

func approxValue(fd protoreflect.FieldDescriptor, g, w protoreflect.Value, tol float64, p string) string {
	switch fd.Kind() {
	case protoreflect.MessageKind:
		return approxEqual(g.Message(), w.Message(), tol, p)
	case protoreflect.DoubleKind:
		a, b := g.Float(), w.Float()
		if !closeTo(a, b, tol) {
			return fmt.Sprintf("%s: %.12g, want %.12g", p, a, b)
		}
		return ""
	}
	if !g.Equal(w) {
		return fmt.Sprintf("%s: %v, want %v", p, g.Interface(), w.Interface())
	}
	return ""
}

// closeTo reports whether a and b agree within tol relative to the
// larger of them, or within tol absolutely near zero.
func closeTo(a, b, tol float64) bool {
	if a == b {
		return true
	}
	return math.Abs(a-b) <= tol*math.Max(1, math.Max(math.Abs(a), math.Abs(b)))
}

// recvAll reads a stream until it ends and returns the responses and
// the error that ended it (nil for a clean end).
func recvAll(st grpc.BidiStreamingClient[pb.PushRequest, pb.PushResponse]) ([]*pb.PushResponse, error) {
	var out []*pb.PushResponse
	for {
		resp, err := st.Recv()
		if errors.Is(err, io.EOF) {
			return out, nil
		}
		if err != nil {
			return out, err
		}
		out = append(out, resp)
	}
}

// writeFile writes content to path, failing the test on error.
func writeFile(t *testing.T, path, content string) {
	t.Helper()
	if err := os.WriteFile(path, []byte(content), 0o644); err != nil {
		t.Fatal(err)
	}
}

func readFile(t *testing.T, path string) string {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

// replaceOnce replaces the single occurrence of old in s, failing the
// test when old is not there exactly once.
func replaceOnce(t *testing.T, s, old, new string) string {
	t.Helper()
	if n := strings.Count(s, old); n != 1 {
		t.Fatalf("%q occurs %d times in the fleet file, want 1", old, n)
	}
	return strings.Replace(s, old, new, 1)
}
