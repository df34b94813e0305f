package durable

import (
	"bufio"
	"context"
	"encoding/json"
	"fmt"
	"math"
	"net/http"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/backoff"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/test/testenv"
)

var (
	buildOnce sync.Once
	binPath   string
	binDir    string
)

func TestMain(m *testing.M) {
	code := m.Run()
	if binDir != "" {
		os.RemoveAll(binDir)
	}
	os.Exit(code)
}

// genvelope builds the binary once for all tests of the package.
func genvelope(t *testing.T) string {
	t.Helper()
	buildOnce.Do(func() {
		var err error
		if binDir, err = os.MkdirTemp("", "genvelope-durable-"); err != nil {
			t.Fatal(err)
		}
		binPath = testenv.BuildGenvelope(t, testenv.ModuleRoot(t), binDir)
	})
	if binPath == "" {
		t.Fatal("genvelope was not built")
	}
	return binPath
}

// natsServer needs the nats-server program.
func natsServer(t *testing.T) string {
	t.Helper()
	return testenv.NeedTool(t, "nats-server", "apt-get install nats-server")
}

// natsNode is one nats-server process with JetStream.
type natsNode struct {
	name, bin, conf string
	port, mport     int
	proc            *testenv.Proc
}

func (n *natsNode) url() string { return fmt.Sprintf("nats://127.0.0.1:%d", n.port) }

// startNATS starts a single JetStream node with its store in dir.
func startNATS(t *testing.T, dir string) *natsNode {
	t.Helper()
	return startNodes(t, dir, 1)[0]
}

// startNodes starts n JetStream nodes; more than one form a cluster.
// It returns once JetStream is usable (the cluster has a meta leader).
// A node that exits at start (a port taken meanwhile by another program
// on a shared machine: FreePort only finds one free at the moment) makes
// it start them all again, on other ports, with stores of their own.
func startNodes(t *testing.T, dir string, n int) []*natsNode {
	t.Helper()
	const attempts = 3
	for a := 1; ; a++ {
		sub := dir
		if a > 1 {
			sub = filepath.Join(dir, fmt.Sprintf("attempt%d", a))
		}
		nodes, err := tryStartNodes(t, sub, n)
		if err == nil {
			return nodes
		}
		if a == attempts {
			t.Fatal(err)
		}
		t.Logf("nodes not started (%v); again on other ports", err)
	}
}

func tryStartNodes(t *testing.T, dir string, n int) ([]*natsNode, error) {
	t.Helper()
	bin := natsServer(t)
	nodes := make([]*natsNode, n)
	routes := make([]string, n)
	cports := make([]int, n)
	for i := range nodes {
		cports[i] = testenv.FreePort(t)
		routes[i] = fmt.Sprintf("nats-route://127.0.0.1:%d", cports[i])
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	for i := range nodes {
		nd := &natsNode{name: fmt.Sprintf("n%d", i+1), bin: bin, port: testenv.FreePort(t), mport: testenv.FreePort(t)}
		store := filepath.Join(dir, nd.name)
		conf := fmt.Sprintf("server_name: %s\nlisten: 127.0.0.1:%d\nhttp: 127.0.0.1:%d\njetstream {store_dir: %q}\n",
			nd.name, nd.port, nd.mport, store)
		if n > 1 {
			conf += fmt.Sprintf("cluster {name: gvtest, listen: 127.0.0.1:%d, routes: [%s]}\n", cports[i], strings.Join(routes, ", "))
		}
		nd.conf = filepath.Join(dir, nd.name+".conf")
		if err := os.WriteFile(nd.conf, []byte(conf), 0o644); err != nil {
			t.Fatal(err)
		}
		nodes[i] = nd
		nd.start(t)
	}
	var err error
	for _, nd := range nodes {
		if err = nd.untilJetStream(n > 1); err != nil {
			break
		}
	}
	if err == nil && n > 1 {
		err = untilPeers(nodes)
	}
	if err != nil {
		for _, o := range nodes {
			o.proc.Kill()
		}
		return nil, err
	}
	return nodes, nil
}

// untilPeers waits until the meta leader counts every other node a
// current peer: before, a stream with as many replicas as nodes is
// refused ("no suitable peers").
func untilPeers(nodes []*natsNode) error {
	deadline := time.Now().Add(testenv.WaitLong)
	for {
		for _, nd := range nodes {
			body, err := get(fmt.Sprintf("http://127.0.0.1:%d/jsz", nd.mport))
			if err != nil {
				continue
			}
			var jsz struct {
				Meta struct {
					Leader   string `json:"leader"`
					Replicas []struct {
						Current bool `json:"current"`
					} `json:"replicas"`
				} `json:"meta_cluster"`
			}
			if json.Unmarshal([]byte(body), &jsz) != nil || jsz.Meta.Leader != nd.name || len(jsz.Meta.Replicas) != len(nodes)-1 {
				continue
			}
			current := true
			for _, r := range jsz.Meta.Replicas {
				current = current && r.Current
			}
			if current {
				return nil
			}
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("the meta leader does not count all %d nodes current peers within %s", len(nodes), testenv.WaitLong)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

func (n *natsNode) start(t *testing.T) {
	t.Helper()
	n.proc = testenv.StartProc(t, "nats-server "+n.name, n.bin, "-c", n.conf)
}

// waitJetStream waits until the node's JetStream answers, and in a
// cluster until it knows the meta leader.
func (n *natsNode) waitJetStream(t *testing.T, cluster bool) {
	t.Helper()
	if err := n.untilJetStream(cluster); err != nil {
		n.proc.Failf(t, "%v", err)
	}
}

// untilJetStream is waitJetStream's wait: an error when the node exits
// or JetStream is not up within WaitLong.
func (n *natsNode) untilJetStream(cluster bool) error {
	deadline := time.Now().Add(testenv.WaitLong)
	for {
		_, err := get(fmt.Sprintf("http://127.0.0.1:%d/healthz", n.mport))
		var body string
		if err == nil {
			body, err = get(fmt.Sprintf("http://127.0.0.1:%d/jsz", n.mport))
		}
		if err == nil && (!cluster || strings.Contains(body, `"leader": "n`)) {
			return nil
		}
		if n.proc.Exited() {
			return fmt.Errorf("nats-server %s exited at start: %s", n.name, lastLine(n.proc.Output(1)))
		}
		if time.Now().After(deadline) {
			return fmt.Errorf("JetStream not up on %s: %v %s", n.name, err, body)
		}
		time.Sleep(100 * time.Millisecond)
	}
}

func lastLine(s string) string {
	s = strings.TrimSpace(s)
	if i := strings.LastIndexByte(s, '\n'); i >= 0 {
		return s[i+1:]
	}
	return s
}

func get(url string) (string, error) {
	resp, err := http.Get(url)
	if err != nil {
		return "", err
	}
	defer resp.Body.Close()
	var b strings.Builder
	sc := bufio.NewScanner(resp.Body)
	sc.Buffer(make([]byte, 1<<20), 1<<24)
	for sc.Scan() {
		b.WriteString(sc.Text())
		b.WriteByte('\n')
	}
	if resp.StatusCode != http.StatusOK {
		return b.String(), fmt.Errorf("GET %s: %s", url, resp.Status)
	}
	return b.String(), sc.Err()
}

// replica is one genvelope serve process on fixed loopback ports, so that
// a restart keeps its addresses.
type replica struct {
	args       []string
	grpc, http string
	proc       *testenv.Proc
	conn       *grpc.ClientConn
	tel        pb.TelemetryServiceClient
	fleet      pb.FleetServiceClient
	alarms     pb.AlarmServiceClient
}

// startReplica starts genvelope serve with the fleet, the state file and
// extra arguments, and waits until it is ready (caught up with the log).
func startReplica(t *testing.T, fleetPath, statePath string, extra ...string) *replica {
	t.Helper()
	r := &replica{grpc: testenv.Addr(testenv.FreePort(t)), http: testenv.Addr(testenv.FreePort(t))}
	r.args = append([]string{"serve", "--fleet", fleetPath, "--state", statePath, "--journal", statePath + ".journal",
		"--grpc-listen", r.grpc, "--http-listen", r.http}, extra...)
	r.start(t)
	conn, err := grpc.NewClient(r.grpc, grpc.WithTransportCredentials(insecure.NewCredentials()),
		grpc.WithConnectParams(grpc.ConnectParams{Backoff: backoff.Config{BaseDelay: 50 * time.Millisecond,
			Multiplier: 1.2, MaxDelay: 300 * time.Millisecond}, MinConnectTimeout: 2 * time.Second}))
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { conn.Close() })
	r.conn, r.tel, r.fleet, r.alarms = conn, pb.NewTelemetryServiceClient(conn), pb.NewFleetServiceClient(conn), pb.NewAlarmServiceClient(conn)
	return r
}

func (r *replica) start(t *testing.T) {
	t.Helper()
	r.proc = testenv.StartProc(t, "genvelope", genvelope(t), r.args...)
	r.proc.WaitHTTP(t, "http://"+r.http+"/readyz")
}

// metrics returns the replica's metric lines, series to value, of the
// families named.
func (r *replica) metrics(t *testing.T, families ...string) map[string]float64 {
	t.Helper()
	body, err := get("http://" + r.http + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]float64{}
	for _, line := range strings.Split(body, "\n") {
		if line == "" || line[0] == '#' {
			continue
		}
		for _, f := range families {
			if strings.HasPrefix(line, f+"{") || strings.HasPrefix(line, f+" ") {
				i := strings.LastIndexByte(line, ' ')
				v, err := strconv.ParseFloat(line[i+1:], 64)
				if err != nil {
					t.Fatalf("metric line %q: %v", line, err)
				}
				out[line[:i]] = v
			}
		}
	}
	return out
}

// metric returns one series' value, or NaN.
func (r *replica) metric(t *testing.T, series string) float64 {
	t.Helper()
	name, _, _ := strings.Cut(series, "{")
	if v, ok := r.metrics(t, name)[series]; ok {
		return v
	}
	return math.NaN()
}

// fleetFile writes a fleet of n plain round-rotor units unit-00, unit-01,
// ... (100 MVA, 11 kV, invented) and returns its path.
func fleetFile(t *testing.T, dir string, n int) string {
	t.Helper()
	var b strings.Builder
	b.WriteString("units:\n")
	for i := 0; i < n; i++ {
		fmt.Fprintf(&b, `  - id: %s
    rating: {mva: 100, kv: 11, power_factor: 0.8, frequency_hz: 50, poles: 4}
    machine: {rotor: round, xd: 1.8, xl: 0.15}
    field: {air_gap_a: 400}
    prime_mover: {p_max_mw: 80, p_min_mw: 10}
`, unitID(i))
	}
	p := filepath.Join(dir, "fleet.yaml")
	if err := os.WriteFile(p, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	return p
}

func unitID(i int) string { return fmt.Sprintf("unit-%02d", i) }

// traffic is a fixed set of samples: units × steps, one second apart,
// ending shortly before now, with the reactive power swinging past the
// field and armature ratings so that both thermal accumulators grow.
type traffic struct {
	units, steps int
	base         time.Time
}

func newTraffic(units, steps int) traffic {
	return traffic{units: units, steps: steps, base: time.Now().Add(-time.Duration(steps+30) * time.Second).Truncate(time.Second)}
}

func (tr traffic) sample(u, k int) *pb.Sample {
	q := 88 + 8*math.Sin(0.37*float64(k)+float64(u))
	return &pb.Sample{UnitId: unitID(u), Time: timestamppb.New(tr.base.Add(time.Duration(k) * time.Second)),
		PMw: 60 + 2*math.Cos(0.11*float64(k)), QMvar: q, VKv: 11}
}

// batches splits the traffic into batches of stride steps of every
// unit (only the units keep selects).
func (tr traffic) batches(stride int, keep func(u int) bool) [][]*pb.Sample {
	var out [][]*pb.Sample
	for k0 := 0; k0 < tr.steps; k0 += stride {
		var b []*pb.Sample
		for k := k0; k < min(k0+stride, tr.steps); k++ {
			for u := 0; u < tr.units; u++ {
				if keep == nil || keep(u) {
					b = append(b, tr.sample(u, k))
				}
			}
		}
		if len(b) > 0 {
			out = append(out, b)
		}
	}
	return out
}

// tryPush sends a batch once.
func tryPush(r *replica, batch []*pb.Sample) (*pb.PushResponse, error) {
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	return r.tel.Push(ctx, &pb.PushRequest{Samples: batch})
}

// pushUntilAnswered sends a batch until it is answered, resending after
// every failure (a replica killed, NATS lost), and fails the test when
// any sample is neither accepted nor a duplicate.
func pushUntilAnswered(t *testing.T, r *replica, batch []*pb.Sample) *pb.PushResponse {
	t.Helper()
	deadline := time.Now().Add(testenv.WaitLong)
	for {
		resp, err := tryPush(r, batch)
		if err == nil {
			if len(resp.Rejected) > 0 {
				t.Fatalf("batch rejected in part: %v", resp.Rejected[0])
			}
			return resp
		}
		if time.Now().After(deadline) {
			r.proc.Failf(t, "batch not answered within %s: %v", testenv.WaitLong, err)
		}
		time.Sleep(30 * time.Millisecond)
	}
}
