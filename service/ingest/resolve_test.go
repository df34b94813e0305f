package ingest

import (
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/fleet"
)

// TestResolverFindsTheUnits sends one stream's samples through a
// Resolver in the order a gateway repeats, out of that order, with
// unknown ids, and across reloads (a unit removed, a unit added back),
// and checks every answer against the fleet's map (Store.Accept on a
// twin store fed the same samples).
func TestResolverFindsTheUnits(t *testing.T) {
	ids := []string{"harrowmere-1", "larchwater-2", "brindle-gt3"}
	full := exampleFleet(t)
	without := exampleFleet(t)
	without.Units = without.Units[1:] // harrowmere-1 removed
	steps := []struct {
		name  string
		fleet *fleet.Fleet // reload to it before the samples (nil: none)
		order []string
	}{
		{"first round", nil, ids},
		{"the same order again", nil, append(append([]string{}, ids...), ids...)},
		{"another order", nil, []string{"brindle-gt3", "harrowmere-1", "larchwater-2", "larchwater-2"}},
		{"unknown ids among them", nil, []string{"harrowmere-1", "nowhere-9", "larchwater-2", "", "brindle-gt3"}},
		{"after a reload without harrowmere-1", without, ids},
		{"harrowmere-1 back", full, append(append([]string{}, ids...), ids...)},
	}
	via := NewStore(exampleFleet(t), Options{})
	twin := NewStore(exampleFleet(t), Options{})
	var r Resolver
	now := t0.Add(time.Hour)
	sec := 0
	for _, st := range steps {
		if st.fleet != nil {
			via.Replace(st.fleet)
			twin.Replace(st.fleet)
		}
		for _, id := range st.order {
			sec++
			smp := rated(full, id, t0.Add(time.Duration(sec)*time.Second))
			gotR, gotD := via.AcceptFrom(&r, now, ptr(smp))
			wantR, wantD := twin.Accept(now, ptr(smp))
			if id == ids[1] && gotR != Accepted && st.fleet == nil {
				t.Fatalf("%s: %v %s", id, gotR, gotD) // the check must compare accepted samples
			}
			if gotR != wantR || gotD != wantD {
				t.Errorf("%s, %q: through the resolver %v %q, through the map %v %q", st.name, id, gotR, gotD, wantR, wantD)
			}
		}
	}
	for _, id := range ids {
		if a, b := via.Unit(id).View().Accepted, twin.Unit(id).View().Accepted; a != b {
			t.Errorf("%s: %d accepted through the resolver, %d through the map", id, a, b)
		}
	}
}

// rated returns a plausible sample of unit id of fl at time at (half
// the rated MVA, rated voltage); an unknown id gets made-up values.
func rated(fl *fleet.Fleet, id string, at time.Time) Sample {
	u := fl.Unit(id)
	if u == nil {
		return good(id, at)
	}
	r := u.Rating
	return Sample{UnitID: id, Time: at, PMW: 0.5 * r.MVA * r.PowerFactor, QMvar: 0.1 * r.MVA, VKV: r.KV}
}

// TestAcceptFromDoesNotAllocate: once a stream's units are resolved,
// a sample through the resolver allocates nothing.
func TestAcceptFromDoesNotAllocate(t *testing.T) {
	s := NewStore(exampleFleet(t), Options{})
	var r Resolver
	ids := []string{"harrowmere-1", "larchwater-2", "brindle-gt3"}
	now := t0.Add(time.Hour)
	i := 0
	send := func() {
		for _, id := range ids {
			smp := rated(s.Fleet(), id, t0.Add(time.Duration(i)*time.Second))
			if res, d := s.AcceptFrom(&r, now, &smp); res != Accepted {
				t.Fatalf("%s: %v %s", id, res, d)
			}
		}
		i++
	}
	send()
	if n := testing.AllocsPerRun(100, send); n != 0 {
		t.Errorf("%.1f allocations a round of %d samples, want 0", n, len(ids))
	}
}
