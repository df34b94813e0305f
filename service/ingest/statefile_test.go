package ingest

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
)

// decodeAll decodes a whole binary state stream into a Snapshot.
func decodeAll(t testing.TB, b []byte) *Snapshot {
	t.Helper()
	sn, err := ReadSnapshot(bytes.NewReader(b))
	if err != nil {
		t.Fatal(err)
	}
	return sn
}

// cloneFleet is a fleet of n copies of the example fleet's harrowmere-1,
// ids u00000...
func cloneFleet(t testing.TB, n int) *fleet.Fleet {
	ex := exampleFleet(t).Unit("harrowmere-1")
	fl := &fleet.Fleet{}
	for i := range n {
		c := *ex
		c.ID = fmt.Sprintf("u%05d", i)
		fl.Units = append(fl.Units, &c)
	}
	return fl
}

func steady(n int, t0, step int64) []int64 {
	ts := make([]int64, n)
	for i := range ts {
		ts[i] = t0 + int64(i)*step
	}
	return ts
}

// The binary state decodes to what was encoded, field for field, for
// entries from empty to every field set and times at the ends of int64
// (the differences wrap; the decoder undoes them exactly).
func TestStateFileRoundTrip(t *testing.T) {
	at := time.Date(2026, 6, 1, 12, 0, 0, 123456789, time.UTC)
	full := UnitSnapshot{
		Times: steady(ringSize, at.UnixNano()-255e9, 1e9), ArmatureH: 12.5, FieldH: 3.25, XArmature: 1.07, XField: 1.46,
		ThermalNS: at.UnixNano() + 7, OELUsed: 0.25, SCLUsed: 1, Suspect: true, Stale: true,
		Heat: []HeatSnapshot{{TimeUnixNS: at.UnixNano() - 1e9, ArmatureS: 0.5, FieldS: -0.25, Discardable: true}, {TimeUnixNS: at.UnixNano(), FieldS: 1e-9}},
		Latest: &SampleSnapshot{Sample: Sample{UnitID: "b", Time: at, PMW: -12.5, QMvar: 80, VKV: 20.1, FieldA: 2400, HasFieldA: true,
			FrequencyHz: 49.9, HasFreq: true, Coolant: 38, HasCoolant: true, Quality: QualityQuestionable}, ReceivedUnixNS: at.UnixNano() + 3e6},
		Alarms: map[string]alarm.Machine{
			alarm.FieldCurrentMismatch.String(): {Level: alarm.Warning, Raising: [2]bool{true, false}, RaiseSince: [2]int64{5, -7},
				Clearing: [2]bool{false, true}, ClearSince: [2]int64{math.MinInt64, math.MaxInt64}, Acknowledged: true, ShelvedUntil: 99, Since: -1, Value: 0.3},
			alarm.Kind(0).String(): {Level: alarm.Critical, Value: math.Inf(1)},
		},
	}
	sn := &Snapshot{Format: "genvelope-state", Version: BinarySnapshotVersion, Written: at.Add(time.Second), Units: map[string]UnitSnapshot{
		"a":                      {},
		"b":                      full,
		"irregular":              {Times: []int64{math.MinInt64, -1, 0, 1, math.MaxInt64, 3, 3}, ArmatureH: math.SmallestNonzeroFloat64},
		"one time":               {Times: []int64{42}},
		"two times":              {Times: []int64{42, 40}},
		"ünïcode id":             {XArmature: math.Copysign(0, -1)},
		strings.Repeat("x", 300): {},
	}}
	var buf bytes.Buffer
	if err := sn.WriteBinary(&buf); err != nil {
		t.Fatal(err)
	}
	back := decodeAll(t, buf.Bytes())
	if len(back.Bad) > 0 || !back.Written.Equal(sn.Written) || back.Version != BinarySnapshotVersion {
		t.Fatalf("header %v %d, bad %v", back.Written, back.Version, back.Bad)
	}
	for id, want := range sn.Units {
		got, ok := back.Units[id]
		if !ok {
			t.Errorf("%q missing", id)
			continue
		}
		if want.Latest != nil {
			want.Latest.UnitID = id // the record's id
		}
		wj, _ := json.Marshal(want)
		gj, _ := json.Marshal(got)
		if !bytes.Equal(wj, gj) {
			t.Errorf("%q:\n got %s\nwant %s", id, gj, wj)
		}
		if len(want.Times) != len(got.Times) {
			continue
		}
		for i := range want.Times {
			if want.Times[i] != got.Times[i] {
				t.Errorf("%q: time %d is %d, want %d", id, i, got.Times[i], want.Times[i])
			}
		}
	}
	if len(back.Units) != len(sn.Units) {
		t.Errorf("%d units back, want %d", len(back.Units), len(sn.Units))
	}
}

// A unit sampled at a steady rate costs one byte a timestamp: its
// record holds the 256-time window in 256 + a few bytes beyond the other
// fields (the JSON of version 2 spent 20 bytes a timestamp).
func TestStateFileSteadyWindowSize(t *testing.T) {
	at := time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC).UnixNano()
	for _, step := range []int64{1e9, 1e8, 2e9 + 1} {
		base := appendUnit(nil, "u", &UnitSnapshot{})
		rec := appendUnit(nil, "u", &UnitSnapshot{Times: steady(ringSize, at, step)})
		// count (2 bytes), first (9), first difference (≤ 5), 254 zeros.
		if extra := len(rec) - len(base); extra > 2+9+5+254 {
			t.Errorf("step %d ns: the window costs %d bytes, want at most %d", step, extra, 2+9+5+254)
		}
	}
}

// Any single byte changed, any truncation and anything appended make
// the stream unusable as a whole (the checksum), never a silently
// different state.
func TestStateFileDamage(t *testing.T) {
	at := time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)
	sn := &Snapshot{Written: at, Units: map[string]UnitSnapshot{
		"a": {Times: steady(20, at.UnixNano(), 1e9), FieldH: 2, Latest: &SampleSnapshot{Sample: Sample{Time: at, VKV: 20}}},
		"b": {ArmatureH: 1},
	}}
	var buf bytes.Buffer
	if err := sn.WriteBinary(&buf); err != nil {
		t.Fatal(err)
	}
	good := buf.Bytes()
	fails := func(b []byte) bool {
		d, err := NewStateDecoder(bytes.NewReader(b))
		if err != nil {
			return true
		}
		for {
			var us UnitSnapshot
			_, err := d.Next(&us)
			var bad *BadEntryError
			if errors.Is(err, io.EOF) {
				return false
			}
			if err != nil && !errors.As(err, &bad) {
				return true
			}
		}
	}
	if fails(good) {
		t.Fatal("the good stream fails")
	}
	for i := range good {
		b := bytes.Clone(good)
		b[i] ^= 0x10
		if !fails(b) {
			t.Errorf("byte %d changed: the stream still decodes", i)
		}
	}
	for n := range len(good) {
		if !fails(good[:n]) {
			t.Errorf("cut to %d bytes: the stream still decodes", n)
		}
	}
	if !fails(append(bytes.Clone(good), 0)) {
		t.Error("a byte appended: the stream still decodes")
	}
}

// A record that does not decode (here, written by hand with a valid
// checksum) is one bad entry: the entries around it are read.
func TestStateFileBadEntryAlone(t *testing.T) {
	var buf bytes.Buffer
	e := NewStateEncoder(&buf, time.Unix(1, 0))
	if err := e.Unit("before", &UnitSnapshot{FieldH: 1}); err != nil {
		t.Fatal(err)
	}
	e.rec = appendString(nil, "broken")
	e.rec = append(e.rec, 0, 1, 2) // the flags, then too few bytes for a float
	if err := e.writeRecord(); err != nil {
		t.Fatal(err)
	}
	if err := e.Unit("after", &UnitSnapshot{FieldH: 2}); err != nil {
		t.Fatal(err)
	}
	if err := e.Close(); err != nil {
		t.Fatal(err)
	}
	sn := decodeAll(t, buf.Bytes())
	if len(sn.Units) != 2 || sn.Units["before"].FieldH != 1 || sn.Units["after"].FieldH != 2 {
		t.Errorf("units %v, want before and after", sn.Units)
	}
	if len(sn.Bad) != 1 || !strings.Contains(sn.Bad[0].Error(), `"broken"`) {
		t.Errorf("bad entries %v, want the broken one", sn.Bad)
	}
}

// Encoding the store's state allocates per save, not per unit or per
// timestamp: 300 units with full windows take as many allocations as
// one.
func TestEncodeStateAllocations(t *testing.T) {
	now := t0.Add(time.Hour)
	allocs := func(units int) float64 {
		fl := cloneFleet(t, units)
		s := NewStore(fl, Options{})
		for i := range 300 {
			for _, c := range fl.Units {
				if r, d := s.Accept(now, ptr(good(c.ID, t0.Add(time.Duration(i)*time.Second)))); r != Accepted {
					t.Fatalf("%v %s", r, d)
				}
			}
		}
		var buf bytes.Buffer
		n := testing.AllocsPerRun(5, func() {
			buf.Reset()
			if err := s.EncodeState(&buf, now); err != nil {
				t.Fatal(err)
			}
		})
		sn := decodeAll(t, buf.Bytes())
		for _, c := range fl.Units {
			if got := len(sn.Units[c.ID].Times); got != ringSize {
				t.Fatalf("%s: %d times, want %d", c.ID, got, ringSize)
			}
		}
		return n
	}
	if one, many := allocs(1), allocs(300); many > one+2 {
		t.Errorf("%.0f allocations a save of 300 units, %.0f of one: want no more per unit", many, one)
	}
}
