package durable

import (
	"context"
	"fmt"
	"hash/fnv"
	"maps"
	"math/rand/v2"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/test/testenv"
)

// sampleDriven are the metric families that follow from the samples
// alone: two replicas of one log export them equal.
var sampleDriven = []string{
	"genvelope_reactive_headroom_vars", "genvelope_limit_margin_ratio", "genvelope_reactive_limit_vars",
	"genvelope_thermal_capacity_used_ratio", "genvelope_active_power_watts", "genvelope_reactive_power_vars",
	"genvelope_sample_timestamp_seconds", "genvelope_alarm_level", "genvelope_alarm_acknowledged",
	`genvelope_samples_total{result="accepted"}`, "genvelope_log_applied_sequence",
}

// waitSameSequence waits until every replica has applied the log to the
// same sequence and says it is caught up.
func waitSameSequence(t *testing.T, rs ...*replica) {
	t.Helper()
	deadline := time.Now().Add(testenv.WaitLong)
	for {
		seqs := map[float64]bool{}
		ready := true
		for _, r := range rs {
			seqs[r.metric(t, "genvelope_log_applied_sequence")] = true
			ready = ready && r.metric(t, "genvelope_log_caught_up") == 1
		}
		if len(seqs) == 1 && ready {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("replicas did not reach the same sequence: %v", seqs)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// sameMoment reads what read returns from both replicas at one place in
// the log: both caught up at the same sequence, which did not move while
// reading (a sweep a second goes on arriving).
func sameMoment[T any](t *testing.T, a, b *replica, read func(*replica) T) (T, T) {
	t.Helper()
	deadline := time.Now().Add(testenv.WaitLong)
	for {
		waitSameSequence(t, a, b)
		before := appliedSeq(t, a)
		ra, rb := read(a), read(b)
		if appliedSeq(t, a) == before && appliedSeq(t, b) == before {
			return ra, rb
		}
		if time.Now().After(deadline) {
			t.Fatal("the replicas never held still at one sequence")
		}
	}
}

// TestTwoReplicas: two serve processes on one stream, telemetry sent to
// either in turn: they export the same sample-driven series, and an
// acknowledgement made on one is visible on the other.
func TestTwoReplicas(t *testing.T) {
	if testing.Short() {
		t.Skip("starts nats-server and genvelope processes")
	}
	dir := t.TempDir()
	nd := startNATS(t, dir)
	const units = 4
	fleetPath := fleetFile(t, dir, units)
	a := startReplica(t, fleetPath, filepath.Join(dir, "a.json"), "--nats", nd.url())
	b := startReplica(t, fleetPath, filepath.Join(dir, "b.json"), "--nats", nd.url())
	batches := newTraffic(units, 60).batches(3, nil)
	for i, batch := range batches {
		pushUntilAnswered(t, []*replica{a, b}[i%2], batch)
	}
	// A client resending through the other replica what one of them
	// acknowledged counts nothing twice.
	for i, batch := range batches[len(batches)-4:] {
		if resp := pushUntilAnswered(t, []*replica{b, a}[i%2], batch); resp.Duplicates != uint32(len(batch)) {
			t.Errorf("resend through the other replica: %v, want %d duplicates", resp, len(batch))
		}
	}
	ma, mb := sameMoment(t, a, b, func(r *replica) map[string]float64 { return r.metrics(t, sampleDriven...) })
	if len(ma) < units*10 {
		t.Fatalf("only %d sample-driven series", len(ma))
	}
	if got := ma[`genvelope_samples_total{result="accepted"}`]; got != float64(units*60) {
		t.Errorf("accepted samples: %v, want %d", got, units*60)
	}
	if !maps.Equal(ma, mb) {
		for k, v := range ma {
			if mb[k] != v {
				t.Errorf("%s: %v on one replica, %v on the other", k, v, mb[k])
			}
		}
		for k := range mb {
			if _, ok := ma[k]; !ok {
				t.Errorf("%s only on the second replica", k)
			}
		}
	}

	// The traffic overloads the field: its alarm is active on both.
	ctx, cancel := context.WithTimeout(context.Background(), testenv.WaitLong)
	defer cancel()
	if _, err := a.alarms.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: unitID(1), Limit: "field", Operator: "desk 2"}); err != nil {
		t.Fatalf("AcknowledgeAlarm on the first replica: %v", err)
	}
	deadline := time.Now().Add(testenv.WaitLong)
	for {
		resp, err := b.alarms.ListAlarms(ctx, &pb.ListAlarmsRequest{})
		if err != nil {
			t.Fatal(err)
		}
		acked := false
		for _, ev := range resp.Alarms {
			acked = acked || ev.UnitId == unitID(1) && ev.Limit == "field" && ev.Acknowledged
		}
		if acked {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("the acknowledgement on the first replica is not visible on the second: %v", resp.Alarms)
		}
		time.Sleep(50 * time.Millisecond)
	}
	if got := b.metric(t, fmt.Sprintf(`genvelope_alarm_acknowledged{unit=%q,site="",limit="field"}`, unitID(1))); got != 1 {
		t.Logf("note: acknowledged series on the second replica: %v", got)
	}
}

// partitionOf is the partition of id among 8: 32-bit FNV-1a (hash/fnv)
// modulo 8, as the README documents.
func partitionOf(id string) int {
	h := fnv.New32a()
	h.Write([]byte(id))
	return int(h.Sum32() % 8)
}

var unitLabel = regexp.MustCompile(`unit="([^"]+)"`)

// unitsIn returns the units that have series of the given families.
func unitsIn(m map[string]float64) map[string]bool {
	out := map[string]bool{}
	for k := range m {
		if sm := unitLabel.FindStringSubmatch(k); sm != nil {
			out[sm[1]] = true
		}
	}
	return out
}

// TestPartitionsSplit: two processes serving partitions 0-3 and 4-7 of
// one stream serve every unit exactly once, and each refuses the units
// of the other with the partition named.
func TestPartitionsSplit(t *testing.T) {
	if testing.Short() {
		t.Skip("starts nats-server and genvelope processes")
	}
	dir := t.TempDir()
	nd := startNATS(t, dir)
	const units = 16
	fleetPath := fleetFile(t, dir, units)
	a := startReplica(t, fleetPath, filepath.Join(dir, "a.json"), "--nats", nd.url(), "--partitions", "0-3")
	b := startReplica(t, fleetPath, filepath.Join(dir, "b.json"), "--nats", nd.url(), "--partitions", "4-7")
	tr := newTraffic(units, 20)
	inA := func(u int) bool { return partitionOf(unitID(u)) <= 3 }
	for _, batch := range tr.batches(2, inA) {
		pushUntilAnswered(t, a, batch)
	}
	for _, batch := range tr.batches(2, func(u int) bool { return !inA(u) }) {
		pushUntilAnswered(t, b, batch)
	}
	// A unit of the other half, sent to the wrong process, is refused.
	wrong := -1
	for u := 0; u < units && wrong < 0; u++ {
		if !inA(u) {
			wrong = u
		}
	}
	resp, err := tryPush(a, []*pb.Sample{tr.sample(wrong, 0)})
	if err != nil || len(resp.Rejected) != 1 || resp.Rejected[0].Reason != pb.RejectReason_REJECT_REASON_UNKNOWN_UNIT ||
		!strings.Contains(resp.Rejected[0].Detail, "partition") {
		t.Errorf("a unit of partitions 4-7 sent to the replica of 0-3: %v, %v; want UNKNOWN_UNIT naming the partition", resp, err)
	}

	all := []string{"genvelope_sample_timestamp_seconds", "genvelope_alarm_level", "genvelope_telemetry_age_seconds"}
	ua, ub := unitsIn(a.metrics(t, all...)), unitsIn(b.metrics(t, all...))
	for u := 0; u < units; u++ {
		id := unitID(u)
		if ua[id] == ub[id] {
			t.Errorf("%s (partition %d) served by the first replica %v, by the second %v: want exactly one", id, partitionOf(id), ua[id], ub[id])
		}
		if ua[id] != inA(u) {
			t.Errorf("%s (partition %d) on the replica of 0-3: %v", id, partitionOf(id), ua[id])
		}
	}
	if len(ua) == 0 || len(ub) == 0 {
		t.Fatalf("the fleet of %d units is not split: %d and %d", units, len(ua), len(ub))
	}
}

// TestClusterNodeLoss: a 3-node JetStream cluster with the stream on
// three replicas; one node is killed with SIGKILL under load. Ingest
// goes on, and every acknowledged sample is applied.
func TestClusterNodeLoss(t *testing.T) {
	if testing.Short() {
		t.Skip("starts a nats-server cluster and genvelope")
	}
	dir := t.TempDir()
	nodes := startNodes(t, dir, 3)
	const units = 6
	fleetPath := fleetFile(t, dir, units)
	statePath := filepath.Join(dir, "replica.json")
	var urls []string
	for _, n := range nodes {
		urls = append(urls, n.url())
	}
	r := startReplica(t, fleetPath, statePath, "--nats", strings.Join(urls, ","), "--nats-replicas", "3")
	batches := newTraffic(units, 240).batches(2, nil)
	seed := uint64(time.Now().UnixNano())
	t.Logf("random seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 1))
	killAt := len(batches)/4 + rng.IntN(len(batches)/2)
	victim := nodes[rng.IntN(3)]
	killed := make(chan struct{})
	var killedAt time.Time
	for i, b := range batches {
		if i == killAt {
			go func() {
				defer close(killed)
				victim.proc.Kill()
				killedAt = time.Now()
			}()
		}
		pushUntilAnswered(t, r, b)
	}
	<-killed // the last batches can be answered before the kill is over
	if !victim.proc.Exited() {
		t.Fatal("the node was not killed")
	}
	// Ready again (caught up), whichever node held its consumer.
	r.proc.WaitHTTP(t, "http://"+r.http+"/readyz")
	t.Logf("node %s killed before batch %d of %d at %s; consumer restarts by the watchdog: %g",
		victim.name, killAt, len(batches), killedAt.UTC().Format("15:04:05.000"), r.metric(t, "genvelope_log_consumer_restarts_total"))
	for _, line := range strings.Split(r.proc.Output(200), "\n") {
		if strings.Contains(line, "level=WARN") || strings.Contains(line, "level=ERROR") || strings.Contains(line, "NATS connection") {
			t.Log(strings.TrimSpace(line))
		}
	}
	checkLedger(t, r, statePath, ledgerOf(batches))
}
