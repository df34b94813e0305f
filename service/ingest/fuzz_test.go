package ingest

import (
	"bytes"
	"encoding/json"
	"testing"
	"time"
)

// FuzzAccept interleaves arbitrary samples (any time, any values) with
// a unit's real-time feed: whatever the arbitrary sample is and whether
// it is accepted, the real-time sample after it is accepted, and the
// state always encodes (the state file can always be written).
func FuzzAccept(f *testing.F) {
	now := time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)
	year1000 := time.Date(1000, 6, 1, 12, 0, 0, 0, time.UTC)
	f.Add(year1000.Unix(), int64(0), 250.0, 80.0, 20.1, 2000.0, true, uint8(0))        // the year-1000 typo
	f.Add(now.Unix()+4, int64(0), 250.0, 80.0, 20.1, 0.0, false, uint8(0))             // 4 s ahead, within the skew
	f.Add(now.Unix()+240, int64(0), 250.0, 80.0, 20.1, 0.0, false, uint8(0))           // 4 minutes ahead
	f.Add(now.Unix()-1, int64(999999999), 250.0, 80.0, 1.02, 0.0, false, uint8(1))     // voltage in pu
	f.Add(int64(-1)<<62, int64(0), 1e308, -1e308, 5e-324, 1e300, true, uint8(0))       // extremes
	f.Add(int64(1)<<62, int64(-5), 250.0, 80.0, 20.1, 0.0, false, uint8(7))            // far future, odd quality
	f.Add(now.Unix()-7*24*3600-1, int64(0), 250.0, 80.0, 20.1, 3000.0, true, uint8(2)) // just before the horizon
	f.Add(now.Unix(), int64(500000000), 600.0, 550.0, 14.0, 9000.0, true, uint8(0))    // overload, field high
	fl := exampleFleet(f)                                                              // immutable: shared by every run
	f.Fuzz(func(t *testing.T, sec, nsec int64, p, q, v, fa float64, hasFA bool, quality uint8) {
		s := NewStore(fl, Options{Now: func() time.Time { return now }})
		wall := now
		real := func(i int) {
			t.Helper()
			smp := Sample{UnitID: "harrowmere-1", Time: wall, PMW: 250, QMvar: 80 + float64(i), VKV: 20.1, FieldA: 2400, HasFieldA: true}
			if r, d := s.Accept(wall, &smp); r != Accepted {
				t.Fatalf("real-time sample %d at %s: %v %s", i, wall.Format(time.RFC3339Nano), r, d)
			}
		}
		real(0)
		for i := 1; i <= 3; i++ {
			smp := Sample{UnitID: "harrowmere-1", Time: time.Unix(sec, nsec), PMW: p, QMvar: q, VKV: v, FieldA: fa, HasFieldA: hasFA,
				Quality: Quality(quality % 4)}
			s.Accept(wall, &smp)
			s.Sweep(wall)
			wall = wall.Add(time.Duration(i) * 700 * time.Millisecond)
			real(i)
			wall = wall.Add(time.Second)
			s.Sweep(wall)
		}
		sn := s.Snapshot(wall)
		if err := sn.Seal(); err != nil {
			t.Fatalf("state does not encode: %v", err)
		}
		want, err := json.Marshal(sn)
		if err != nil {
			t.Fatalf("state does not encode: %v", err)
		}
		// The binary state the saver writes decodes to the same snapshot.
		var file bytes.Buffer
		if err := s.EncodeState(&file, wall); err != nil {
			t.Fatalf("state does not encode: %v", err)
		}
		back := decodeAll(t, file.Bytes())
		back.Checksum = sn.Checksum
		if got, _ := json.Marshal(back); !bytes.Equal(got, want) {
			t.Fatalf("binary state decodes to\n%s\nwant\n%s", got, want)
		}
		s2 := NewStore(fl, Options{})
		if _, _, bad := s2.Restore(sn); len(bad) > 0 {
			t.Fatalf("own state not restorable: %v", bad)
		}
	})
}
