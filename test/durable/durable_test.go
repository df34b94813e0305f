package durable

import (
	"context"
	"encoding/binary"
	"hash/fnv"
	"math/rand/v2"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/durable"
	"github.com/genvelope/genvelope/test/testenv"
)

// digest is the identity of a sample as the checkpoint's ledger sums it:
// 64-bit FNV-1a (hash/fnv) of the unit id and the time in Unix ns, 8
// bytes little endian.
func digest(s *pb.Sample) uint64 {
	h := fnv.New64a()
	h.Write([]byte(s.UnitId))
	var b [8]byte
	binary.LittleEndian.PutUint64(b[:], uint64(s.Time.AsTime().UnixNano()))
	h.Write(b[:])
	return h.Sum64()
}

// ledgerOf is what a replica must have applied after the batches: every
// sample once.
func ledgerOf(batches [][]*pb.Sample) map[string]durable.Ledger {
	out := map[string]durable.Ledger{}
	for _, b := range batches {
		for _, s := range b {
			l := out[s.UnitId]
			l.Count++
			l.Digest += digest(s)
			out[s.UnitId] = l
		}
	}
	return out
}

// checkLedger stops r (SIGTERM: it writes its checkpoint) and compares
// the checkpoint's ledger with want, unit by unit.
func checkLedger(t *testing.T, r *replica, statePath string, want map[string]durable.Ledger) *durable.Checkpoint {
	t.Helper()
	if err := r.proc.Stop(testenv.WaitLong); err != nil {
		r.proc.Failf(t, "stop: %v", err)
	}
	cp, err := durable.ReadCheckpoint(statePath)
	if err != nil {
		t.Fatal(err)
	}
	if len(cp.Ledger) != len(want) {
		t.Errorf("ledger has %d units, want %d", len(cp.Ledger), len(want))
	}
	for id, w := range want {
		got := cp.Ledger[id]
		if got == nil || *got != w {
			t.Errorf("%s: applied %+v, acknowledged %+v (count and sum of identities)", id, got, w)
		}
	}
	return cp
}

// thermal returns every unit's field and armature thermal capacity used.
func thermal(t *testing.T, r *replica, units int) (field, arm []float64) {
	t.Helper()
	for u := 0; u < units; u++ {
		ctx, cancel := context.WithTimeout(context.Background(), testenv.WaitLong)
		resp, err := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: unitID(u)})
		cancel()
		if err != nil {
			t.Fatalf("GetUnit %s: %v", unitID(u), err)
		}
		field = append(field, resp.FieldThermalUsedRatio)
		arm = append(arm, resp.ArmatureThermalUsedRatio)
	}
	return field, arm
}

// TestKillNineLosesNothing pushes traffic while the genvelope process is
// killed with SIGKILL at random moments and restarted, resending every
// batch not answered. Afterwards the samples applied (count and
// identity, from the checkpoint's ledger) are exactly those acknowledged,
// and the thermal accumulators equal those of an uninterrupted run of the
// in-process service on the same traffic to 1e-9.
func TestKillNineLosesNothing(t *testing.T) {
	if testing.Short() {
		t.Skip("starts nats-server and genvelope processes")
	}
	dir := t.TempDir()
	nd := startNATS(t, dir)
	const units = 8
	fleetPath := fleetFile(t, dir, units)
	tr := newTraffic(units, 400)
	batches := tr.batches(4, nil)

	statePath := filepath.Join(dir, "replica.json")
	r := startReplica(t, fleetPath, statePath, "--nats", nd.url(), "--nats-checkpoint-interval", "50ms")
	seed := uint64(time.Now().UnixNano())
	t.Logf("random seed %d", seed)
	rng := rand.New(rand.NewPCG(seed, 1))
	kills := map[int]bool{}
	for len(kills) < 3 {
		kills[5+rng.IntN(len(batches)-10)] = true
	}
	done := make(chan struct{})
	restored := 0
	for i, b := range batches {
		if kills[i] {
			// Kill while the batch is in flight, at a random moment.
			go func() {
				time.Sleep(time.Duration(rng.IntN(3000)) * time.Microsecond)
				r.proc.Kill()
				done <- struct{}{}
			}()
			_, _ = tryPush(r, b) // may or may not be answered before the kill
			<-done
			r.start(t)
			if strings.Contains(r.proc.Output(100), "checkpoint restored") {
				restored++
			}
		}
		pushUntilAnswered(t, r, b)
		time.Sleep(time.Duration(rng.IntN(10)) * time.Millisecond)
	}
	if restored == 0 {
		t.Error("no restart restored a checkpoint: the replay from a checkpoint was not exercised")
	}
	field, arm := thermal(t, r, units)
	cp := checkLedger(t, r, statePath, ledgerOf(batches))

	// The journal of the replica killed three times holds what one
	// that applied the log once, from its start, writes: every entry
	// once, in order.
	fresh := startReplica(t, fleetPath, filepath.Join(dir, "fresh.json"), "--nats", nd.url())
	waitSequence(t, fresh, cp.Sequence)
	var want []string
	for _, e := range journalOf(t, fresh) {
		if e.LogSeq <= cp.Sequence {
			want = append(want, journalLine(e))
		}
	}
	var got []string
	for _, e := range journalFile(t, statePath+".journal") {
		got = append(got, journalLine(e))
	}
	if len(want) == 0 {
		t.Error("the traffic made no journal entry: the check would check nothing")
	}
	t.Logf("journal: %d entries from the log up to sequence %d, as one applying it once", len(got), cp.Sequence)
	if !slices.Equal(got, want) {
		t.Errorf("the journal after kill -9 and replays differs from one applying the log once: %d entries, want %d", len(got), len(want))
		for i := range min(len(got), len(want)) {
			if got[i] != want[i] {
				t.Errorf("entry %d:\n got  %s\n want %s", i, got[i], want[i])
				break
			}
		}
	}

	// The same traffic through the in-process service, uninterrupted.
	ref := startReplica(t, fleetPath, filepath.Join(dir, "ref.json"))
	for _, b := range batches {
		pushUntilAnswered(t, ref, b)
	}
	wantField, wantArm := thermal(t, ref, units)
	for u := range units {
		if wantField[u] <= 0 {
			t.Fatalf("%s: the traffic does not heat the field (%g): the check would check nothing", unitID(u), wantField[u])
		}
		if !testenv.RelClose(field[u], wantField[u], 1e-9) || !testenv.RelClose(arm[u], wantArm[u], 1e-9) {
			t.Errorf("%s: thermal used field %.15g armature %.15g after kills; uninterrupted %.15g, %.15g",
				unitID(u), field[u], arm[u], wantField[u], wantArm[u])
		}
	}
}
