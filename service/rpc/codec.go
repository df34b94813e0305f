package rpc

import (
	"fmt"
	"unicode/utf8"

	"google.golang.org/grpc"
	"google.golang.org/grpc/encoding"
	protoenc "google.golang.org/grpc/encoding/proto"
	"google.golang.org/grpc/mem"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

// Codec is the gRPC codec of the service: the telemetry requests
// (PushRequest) are decoded into the message given, whose samples a
// stream reuses from one batch to the next (see Stream), by decodePush
// (the fields of this schema, reusing each sample's time, optional
// values and unit id: no allocation per sample) or, for anything else
// (unknown fields, malformed bytes), by the code vtprotobuf generates
// (no reflection either); every other message goes
// through gRPC's protobuf codec. The wire format is protobuf either way
// (content subtype "proto"), so clients see no difference.
//
// The generated decoder does not check that strings are UTF-8, which
// protobuf requires and gRPC's codec enforces; this codec checks the
// unit ids itself, so that a batch with a malformed id fails as it
// always did.
type Codec struct {
	std encoding.CodecV2
}

// NewCodec returns the codec.
func NewCodec() Codec { return Codec{std: encoding.GetCodecV2(protoenc.Name)} }

// ServerOption makes a gRPC server use the codec.
func (c Codec) ServerOption() grpc.ServerOption { return grpc.ForceServerCodecV2(c) }

// Name is "proto": the wire format is protobuf.
func (Codec) Name() string { return protoenc.Name }

// Marshal encodes v with gRPC's protobuf codec.
func (c Codec) Marshal(v any) (mem.BufferSlice, error) { return c.std.Marshal(v) }

// Unmarshal decodes data into v, replacing what v held.
func (c Codec) Unmarshal(data mem.BufferSlice, v any) error {
	var req *pb.PushRequest
	var ids *StreamIDs
	switch m := v.(type) {
	case *pb.PushRequest:
		req = m
	case *StreamBatch:
		req, ids = m.PushRequest, m.IDs
	default:
		return c.std.Unmarshal(data, v)
	}
	buf := data.MaterializeToBuffer(mem.DefaultBufferPool())
	defer buf.Free()
	if b := buf.ReadOnlyData(); !decodePush(b, req, ids) {
		// Unknown fields or malformed: the generated decoder decides,
		// into samples all reset (it merges into those it reuses).
		req.Samples = req.Samples[:cap(req.Samples)]
		req.ResetVT() // keeps the samples for reuse
		if err := req.UnmarshalVT(b); err != nil {
			return err
		}
	}
	for i, s := range req.Samples {
		if !utf8.ValidString(s.UnitId) {
			return fmt.Errorf("proto: sample %d: string field genvelope.v1.Sample.unit_id contains invalid UTF-8", i)
		}
	}
	return nil
}
