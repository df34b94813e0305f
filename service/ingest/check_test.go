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
