package server

import (
	"context"
	"sync"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/encoding"
	"google.golang.org/grpc/mem"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	"github.com/genvelope/genvelope/service/rpc"
)

// strictCodec is the proto codec with one difference: a message that
// does not decode is answered INVALID_ARGUMENT (the client sent bad
// bytes) instead of grpc-go's INTERNAL (which says the server failed).
// grpc-go turns any codec error into INTERNAL, so the codec notes the
// failure against the message and the interceptors answer it. It wraps
// rpc.Codec (telemetry requests decoded by generated code into reused
// messages), so that both hold: grpc-go keeps only the last
// ForceServerCodecV2 option it is given.
type strictCodec struct {
	encoding.CodecV2
	bad sync.Map // message -> decode error
}

func newStrictCodec() *strictCodec {
	return &strictCodec{CodecV2: rpc.NewCodec()}
}

func (c *strictCodec) Unmarshal(data mem.BufferSlice, v any) error {
	if err := c.CodecV2.Unmarshal(data, v); err != nil {
		m, ok := v.(proto.Message)
		if !ok {
			return err
		}
		proto.Reset(m)
		c.bad.Store(v, err)
	}
	return nil
}

// malformed returns the answer to a message that did not decode, and
// forgets it.
func (c *strictCodec) malformed(v any) error {
	if e, ok := c.bad.LoadAndDelete(v); ok {
		return status.Errorf(codes.InvalidArgument, "genvelope: the request is not a valid protobuf message: %v", e)
	}
	return nil
}

// Unary is the first unary interceptor.
func (c *strictCodec) Unary(ctx context.Context, req any, info *grpc.UnaryServerInfo, handler grpc.UnaryHandler) (any, error) {
	if err := c.malformed(req); err != nil {
		return nil, err
	}
	return handler(ctx, req)
}

// Stream is the first stream interceptor.
func (c *strictCodec) Stream(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, handler grpc.StreamHandler) error {
	return handler(srv, &strictStream{ServerStream: ss, c: c})
}

type strictStream struct {
	grpc.ServerStream
	c *strictCodec
}

func (s *strictStream) RecvMsg(m any) error {
	if err := s.ServerStream.RecvMsg(m); err != nil {
		return err
	}
	return s.c.malformed(m)
}
