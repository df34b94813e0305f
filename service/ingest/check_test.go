package ingest

import (
	"testing"
	"time"
)

// TestCheckRecordsNothing: Check answers what Accept would, and changes
// nothing: the same sample checked twice is still new, and Accept then
// takes it.
func TestCheckRecordsNothing(t *testing.T) {
	s := NewStore(exampleFleet(t), Options{})
	now := t0.Add(time.Hour)
	if r, _ := s.Accept(now, ptr(good("harrowmere-1", t0))); r != Accepted {
		t.Fatalf("first sample: %v", r)
	}
	for _, tc := range []struct {
		name string
		smp  Sample
		want Result
	}{
		{"unknown unit", good("nowhere-9", t0.Add(time.Second)), RejectUnknownUnit},
		{"older", good("harrowmere-1", t0.Add(-time.Second)), RejectOutOfOrder},
		{"duplicate", good("harrowmere-1", t0), Duplicate},
		{"future", good("harrowmere-1", now.Add(6*time.Minute)), RejectFuture},
		{"next", good("harrowmere-1", t0.Add(time.Second)), Accepted},
		{"next again", good("harrowmere-1", t0.Add(time.Second)), Accepted},
	} {
		if r, d := s.Check(now, ptr(tc.smp)); r != tc.want {
			t.Errorf("%s: Check %v (%s), want %v", tc.name, r, d, tc.want)
		}
	}
	if got := s.Unit("harrowmere-1").View().Accepted; got != 1 {
		t.Errorf("Check recorded samples: %d accepted, want 1", got)
	}
	if r, _ := s.Accept(now, ptr(good("harrowmere-1", t0.Add(time.Second)))); r != Accepted {
		t.Errorf("Accept after Check: %v", r)
	}
}

// TestCheckAfterRestore: Check answers from the unit's accepted
// timestamps however they came, by Accept or by restoring a snapshot
// (Check reads the newest without the unit's lock): a restored unit's
// latest is a duplicate and an older one out of order, in a store that
// has applied nothing itself; an empty snapshot window leaves every time
// new.
func TestCheckAfterRestore(t *testing.T) {
	now := t0.Add(time.Hour)
	s1 := NewStore(exampleFleet(t), Options{})
	for i := range 3 {
		if r, _ := s1.Accept(now, ptr(good("harrowmere-1", t0.Add(time.Duration(i)*time.Second)))); r != Accepted {
			t.Fatalf("sample %d: %v", i, r)
		}
	}
	s2 := NewStore(exampleFleet(t), Options{})
	if _, _, bad := s2.Restore(s1.Snapshot(now)); len(bad) > 0 {
		t.Fatal(bad)
	}
	for _, tc := range []struct {
		name string
		at   time.Time
		want Result
	}{
		{"latest again", t0.Add(2 * time.Second), Duplicate},
		{"first again", t0, Duplicate},
		{"older than the window", t0.Add(-time.Second), RejectOutOfOrder},
		{"next", t0.Add(3 * time.Second), Accepted},
	} {
		if r, d := s2.Check(now, ptr(good("harrowmere-1", tc.at))); r != tc.want {
			t.Errorf("%s: Check %v (%s), want %v", tc.name, r, d, tc.want)
		}
	}
	// A unit without samples: a restored empty window takes any time.
	s3 := NewStore(exampleFleet(t), Options{})
	if _, _, bad := s3.Restore(NewStore(exampleFleet(t), Options{}).Snapshot(now)); len(bad) > 0 {
		t.Fatal(bad)
	}
	if r, d := s3.Check(now, ptr(good("harrowmere-1", t0))); r != Accepted {
		t.Errorf("no samples: Check %v (%s), want accepted", r, d)
	}
}
