package restart

import (
	"io"
	"math"
	"net/http"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

// oelUsed scrapes the OEL's used fraction of unit id from /metrics.
func (s *service) oelUsed(t *testing.T, id string) float64 {
	t.Helper()
	resp, err := http.Get(s.http + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	re := regexp.MustCompile(`(?m)^genvelope_limiter_delay_used_ratio\{([^}]*)\} (\S+)$`)
	for _, m := range re.FindAllStringSubmatch(string(body), -1) {
		if strings.Contains(m[1], `limiter="oel"`) && strings.Contains(m[1], `unit="`+id+`"`) {
			v, err := strconv.ParseFloat(m[2], 64)
			if err != nil {
				t.Fatal(err)
			}
			return v
		}
	}
	t.Fatalf("no OEL series for %s in /metrics", id)
	return 0
}

// A kill -9 while the OEL is timing does not give it its delay back:
// brindle-gt3's OEL (example fleet: pickup 1.05, k_s 15) held at 1.2 pu
// field current acts after t = 15 / ((1.2/1.05)^2 - 1) = 49.0 s of
// sample time (coordination.md); 20 s of it before the kill are kept in
// the state file, and it acts at 49 s ± 1 s of overload in total.
func TestKillDuringOELTiming(t *testing.T) {
	if testing.Short() {
		t.Skip("builds and runs the binary; skipped under -short")
	}
	const id, ratedA, x = "brindle-gt3", 1610.0, 1.2
	law := 15 / ((x/1.05)*(x/1.05) - 1)
	sample := func(at time.Time) *pb.Sample {
		f := x * ratedA
		return &pb.Sample{UnitId: id, Time: timestamppb.New(at), PMw: 100, QMvar: 40, VKv: 15, FieldA: &f}
	}
	dir := t.TempDir()
	statePath := filepath.Join(dir, "state.json")
	example, err := os.ReadFile(exampleFleet)
	if err != nil {
		t.Fatal(err)
	}
	fleetPath := filepath.Join(dir, "fleet.yaml")
	if err := os.WriteFile(fleetPath, append([]byte("alarms:\n  limits:\n    stale_telemetry: {warning: 2, critical: 120}\n"), example...), 0o644); err != nil {
		t.Fatal(err)
	}
	const heldS = 20 + 2 // the pushed overload and the 2 s carried on by the wall clock until the unit is stale
	s1 := serve(t, fleetPath, statePath)
	t0 := time.Now().Add(-10 * time.Minute).Truncate(time.Second)
	at := func(i int) time.Time { return t0.Add(time.Duration(i) * time.Second) }
	var batch []*pb.Sample
	for i := -1; i <= 20; i++ { // the sample at -1 s confirms the current (a first sample is suspect)
		batch = append(batch, sample(at(i)))
	}
	if resp := s1.push(t, batch...); resp.Accepted != 22 {
		t.Fatalf("pushing 20 s at 1.2 pu: %v", resp)
	}
	want := heldS / law
	deadline := time.Now().Add(waitLong)
	var written float64
	for {
		if us := waitSnapshot(t, statePath, id, at(20)); math.Abs(us.OELUsed-want) < 1e-9 {
			written = us.OELUsed
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("no state file with the OEL at %g used within %s", want, waitLong)
		}
		time.Sleep(50 * time.Millisecond)
	}
	before := s1.oelUsed(t, id)
	if before != written {
		t.Fatalf("OEL used %g before the kill, %g in the state file; want both %g (%d s of %.2f s)", before, written, want, heldS, law)
	}
	s1.kill(t)

	s2 := serve(t, fleetPath, statePath)
	if got := s2.oelUsed(t, id); got != before {
		t.Errorf("OEL used %g after kill -9 and restart, want %g as before it", got, before)
	}
	// The accumulators had reached 22 s of sample time; from there on
	// each second counts again.
	acted := -1
	for i := 21; i <= 70 && acted < 0; i++ {
		if resp := s2.push(t, sample(at(i))); resp.Accepted != 1 {
			t.Fatalf("sample at %d s: %v", i, resp)
		}
		if s2.oelUsed(t, id) >= 1 {
			acted = i
		}
	}
	if math.Abs(float64(acted)-law) > 1 {
		t.Errorf("the OEL acted at %d s of overload in total, want %.1f s ± 1 s counting the %d s before the kill", acted, law, heldS)
	}
}
