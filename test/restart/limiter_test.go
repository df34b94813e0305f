package restart

import (
	"io"
	"math"
	"net/http"
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
	statePath := filepath.Join(t.TempDir(), "state.json")
	s1 := serve(t, exampleFleet, statePath)
	t0 := time.Now().Add(-10 * time.Minute).Truncate(time.Second)
	at := func(i int) time.Time { return t0.Add(time.Duration(i) * time.Second) }
	var batch []*pb.Sample
	for i := 0; i <= 20; i++ {
		batch = append(batch, sample(at(i)))
	}
	if resp := s1.push(t, batch...); resp.Accepted != 21 {
		t.Fatalf("pushing 20 s at 1.2 pu: %v", resp)
	}
	written := waitSnapshot(t, statePath, id, at(20)).OELUsed
	before := s1.oelUsed(t, id)
	if want := 20 / law; math.Abs(before-want) > 1e-9 || before != written {
		t.Fatalf("OEL used %g before the kill, %g in the state file; want both %g (20 s of %.2f s)", before, written, want, law)
	}
	s1.kill(t)

	s2 := serve(t, exampleFleet, statePath)
	if got := s2.oelUsed(t, id); got != before {
		t.Errorf("OEL used %g after kill -9 and restart, want %g as before it", got, before)
	}
	acted := -1
	for i := 21; i <= 60 && acted < 0; i++ {
		if resp := s2.push(t, sample(at(i))); resp.Accepted != 1 {
			t.Fatalf("sample at %d s: %v", i, resp)
		}
		if s2.oelUsed(t, id) >= 1 {
			acted = i
		}
	}
	if math.Abs(float64(acted)-law) > 1 {
		t.Errorf("the OEL acted at %d s of overload in total, want %.1f s ± 1 s counting the 20 s before the kill", acted, law)
	}
}
