package rpc_test

import (
	"math/rand/v2"
	"strings"
	"testing"

	"google.golang.org/grpc/mem"
	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/rpc"
)

// randomRequest returns a batch of up to 40 samples with every field
// present or absent at random, and a field the schema does not know
// (an unknown field must survive decoding, as protobuf requires).
func randomRequest(r *rand.Rand) *pb.PushRequest {
	req := &pb.PushRequest{Sequence: r.Uint64()}
	opt := func() *float64 {
		if r.IntN(2) == 0 {
			return nil
		}
		x := r.NormFloat64() * 1000
		return &x
	}
	for range r.IntN(41) {
		s := &pb.Sample{UnitId: strings.Repeat("ü", r.IntN(4)) + "unit-" + string(rune('a'+r.IntN(26))),
			PMw: r.NormFloat64(), QMvar: r.NormFloat64(), VKv: r.Float64(), FieldA: opt(), FrequencyHz: opt(), Coolant: opt(),
			Quality: pb.Quality(r.IntN(5))}
		if r.IntN(4) > 0 {
			s.Time = &timestamppb.Timestamp{Seconds: r.Int64N(1 << 40), Nanos: r.Int32N(1e9)}
		}
		req.Samples = append(req.Samples, s)
	}
	return req
}

// TestCodecDecodesAsProtobuf decodes random batches with the service's
// codec into one reused request, each time after a different batch, and
// compares with what the protobuf module's own decoder (the reference)
// makes of the same bytes.
func TestCodecDecodesAsProtobuf(t *testing.T) {
	c := rpc.NewCodec()
	r := rand.New(rand.NewPCG(13, 1))
	reused := new(pb.PushRequest)
	for i := range 500 {
		in := randomRequest(r)
		wire, err := proto.Marshal(in)
		if err != nil {
			t.Fatal(err)
		}
		if i%7 == 0 { // a field of a later version of the schema
			wire = append(wire, 0xf8, 0x06, 0x2a) // field 111, varint 42
		}
		want := new(pb.PushRequest)
		if err := proto.Unmarshal(wire, want); err != nil {
			t.Fatal(err)
		}
		if err := c.Unmarshal(mem.BufferSlice{mem.SliceBuffer(wire)}, reused); err != nil {
			t.Fatalf("batch %d: %v", i, err)
		}
		if !proto.Equal(reused, want) {
			t.Fatalf("batch %d: the codec decoded\n%v\nthe protobuf module\n%v", i, reused, want)
		}
	}
	// Other messages go through gRPC's codec.
	ack := &pb.PushResponse{Sequence: 9, Accepted: 3, Rejected: []*pb.Rejection{{Index: 2, Detail: "x"}}}
	out, err := c.Marshal(ack)
	if err != nil {
		t.Fatal(err)
	}
	got := new(pb.PushResponse)
	if err := c.Unmarshal(out, got); err != nil || !proto.Equal(got, ack) {
		t.Fatalf("PushResponse round trip: %v, %v", got, err)
	}
}

// TestCodecRefusesMalformedUnitID: protobuf strings are UTF-8, and the
// protobuf module refuses a batch with one that is not; the codec too.
func TestCodecRefusesMalformedUnitID(t *testing.T) {
	req := &pb.PushRequest{Samples: []*pb.Sample{{UnitId: "ok"}, {UnitId: "bad\xff"}}}
	wire, err := proto.MarshalOptions{}.Marshal(req)
	if err == nil {
		// The encoder may refuse it too; then build the bytes by hand.
		t.Log("encoded a malformed string")
	} else {
		wire = []byte{0x12, 0x04, 0x0a, 0x02, 'o', 'k', 0x12, 0x06, 0x0a, 0x04, 'b', 'a', 'd', 0xff}
	}
	if err := proto.Unmarshal(wire, new(pb.PushRequest)); err == nil {
		t.Fatal("the reference decoder took the malformed id: the bytes are wrong")
	}
	err = rpc.NewCodec().Unmarshal(mem.BufferSlice{mem.SliceBuffer(wire)}, new(pb.PushRequest))
	if err == nil || !strings.Contains(err.Error(), "UTF-8") {
		t.Fatalf("got %v, want an error naming UTF-8", err)
	}
}
