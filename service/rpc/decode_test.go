package rpc

import (
	"fmt"
	"math/rand/v2"
	"testing"
	"unsafe"

	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

// wireRequest is the encoding of a batch of up to n samples with every
// field present or absent at random, a few unit ids repeated.
func wireRequest(t testing.TB, r *rand.Rand, n int) []byte {
	req := &pb.PushRequest{Sequence: r.Uint64() >> r.IntN(64)}
	opt := func() *float64 {
		if r.IntN(2) == 0 {
			return nil
		}
		x := r.NormFloat64() * 1000
		return &x
	}
	for range r.IntN(n + 1) {
		s := &pb.Sample{UnitId: "unit-" + string(rune('a'+r.IntN(4))), PMw: r.NormFloat64(), QMvar: r.NormFloat64(), VKv: r.Float64(),
			FieldA: opt(), FrequencyHz: opt(), Coolant: opt(), Quality: pb.Quality(r.IntN(5) - 1)}
		if r.IntN(4) > 0 {
			s.Time = &timestamppb.Timestamp{Seconds: r.Int64N(1<<40) - 1<<39, Nanos: r.Int32N(2e9) - 1e9}
		}
		req.Samples = append(req.Samples, s)
	}
	b, err := proto.Marshal(req)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// agree decodes b with decodePush into reused (which holds whatever an
// earlier batch left) and, when decodePush takes it, holds the result
// to what the generated decoder makes of the same bytes in a new
// message: it must take them too and decode the same. (When decodePush
// refuses, the codec hands the bytes to the generated decoder.)
func agree(t testing.TB, b []byte, reused *pb.PushRequest, ids *StreamIDs) bool {
	t.Helper()
	if !decodePush(b, reused, ids) {
		return false
	}
	want := new(pb.PushRequest)
	if err := want.UnmarshalVT(b); err != nil {
		t.Fatalf("decodePush took bytes the generated decoder refuses (%v): % x", err, b)
	}
	if !proto.Equal(reused, want) {
		t.Fatalf("decodePush decoded\n%v\nthe generated decoder\n%v\nfrom % x", reused, want, b)
	}
	return true
}

// TestDecodePushAgreesWithGenerated: random batches, then the same
// bytes mutated (bytes changed, cut, inserted, a field of another wire
// type or number), decoded into one reused request one after the other.
// Every batch decodePush takes is decoded as the generated code does;
// the unchanged batches are all taken.
func TestDecodePushAgreesWithGenerated(t *testing.T) {
	r := rand.New(rand.NewPCG(13, 2))
	reused := new(pb.PushRequest)
	taken, mutated := 0, 0
	for i := range 3000 {
		var ids *StreamIDs
		if i%2 == 0 {
			ids = NewStreamIDs(3) // fewer than the ids sent
		}
		b := wireRequest(t, r, 12)
		if !agree(t, b, reused, ids) {
			t.Fatalf("batch %d: decodePush refused a batch of the schema: % x", i, b)
		}
		for range 4 {
			m := append([]byte(nil), b...)
			switch k := r.IntN(5); {
			case len(m) == 0:
				m = append(m, byte(r.IntN(256)))
			case k == 0:
				m[r.IntN(len(m))] = byte(r.IntN(256))
			case k == 1:
				m = m[:r.IntN(len(m))]
			case k == 2:
				at := r.IntN(len(m))
				m = append(m[:at], append([]byte{byte(r.IntN(256))}, m[at:]...)...)
			case k == 3:
				m[r.IntN(len(m))] ^= 1 << r.IntN(8)
			default:
				m = append(m, byte(r.IntN(16)<<3|r.IntN(8)), byte(r.IntN(256)), byte(r.IntN(256)))
			}
			if agree(t, m, reused, ids) {
				mutated++
			}
		}
		taken++
	}
	if mutated == 0 {
		t.Errorf("no mutated batch was decoded: the comparison saw only refusals")
	}
	t.Logf("%d batches, %d mutated ones decoded alike", taken, mutated)
}

// FuzzDecodePush: whatever decodePush takes, the generated decoder
// takes and decodes the same.
func FuzzDecodePush(f *testing.F) {
	r := rand.New(rand.NewPCG(13, 3))
	for range 8 {
		f.Add(wireRequest(f, r, 3))
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		reused := new(pb.PushRequest)
		ids := NewStreamIDs(2)
		agree(t, wireRequest(t, rand.New(rand.NewPCG(uint64(len(b)), 4)), 3), reused, ids)
		agree(t, b, reused, ids)
	})
}

// TestDecodePushReuses: a stream's next batches allocate nothing per
// sample, also when its 400 units come round in batches of 100 (each
// sample's id differs from the one decoded into its place before).
func TestDecodePushReuses(t *testing.T) {
	x := 1.5
	var batches [][]byte
	for k := range 4 {
		req := &pb.PushRequest{Sequence: uint64(k)}
		for i := range 100 {
			req.Samples = append(req.Samples, &pb.Sample{UnitId: fmt.Sprintf("unit-%03d", 100*k+i), Time: timestamppb.Now(),
				PMw: 1, QMvar: 2, VKv: 3, FieldA: &x, FrequencyHz: &x, Coolant: &x, Quality: pb.Quality_QUALITY_GOOD})
		}
		b, err := proto.Marshal(req)
		if err != nil {
			t.Fatal(err)
		}
		batches = append(batches, b)
	}
	reused, ids := new(pb.PushRequest), NewStreamIDs(1000)
	for _, b := range batches { // the first round makes the ids
		if !decodePush(b, reused, ids) {
			t.Fatal("refused")
		}
	}
	if n := testing.AllocsPerRun(20, func() {
		for _, b := range batches {
			if !decodePush(b, reused, ids) {
				t.Fatal("refused")
			}
		}
	}); n != 0 {
		t.Errorf("%v allocations a round of 4 batches of 100 samples, want 0", n)
	}
}

// StreamIDs gives the same string for the same id, in any order, and
// keeps no more ids than its bound.
func TestStreamIDs(t *testing.T) {
	ids := NewStreamIDs(3)
	first := map[string]string{}
	for _, id := range []string{"a", "b", "c", "a", "b", "c", "c", "a", "b", "d", "a"} {
		got := ids.intern([]byte(id))
		if got != id {
			t.Fatalf("intern(%q) = %q", id, got)
		}
		if f, ok := first[id]; ok && unsafe.StringData(f) != unsafe.StringData(got) && id != "d" {
			t.Errorf("intern(%q) made a new string the second time", id)
		}
		if _, ok := first[id]; !ok {
			first[id] = got
		}
	}
	if len(ids.ids) != 3 || len(ids.pos) != 3 {
		t.Errorf("%d ids kept (%d in the map), want the bound 3", len(ids.ids), len(ids.pos))
	}
}
