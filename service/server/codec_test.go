package server

import (
	"testing"

	"github.com/genvelope/genvelope/service/rpc"
)

// grpc-go keeps only the last ForceServerCodecV2 option: the strict
// codec (malformed messages answered INVALID_ARGUMENT, held by
// test/bounds) must itself decode with rpc.Codec, or one of the two is
// silently lost.
func TestStrictCodecDecodesWithGeneratedCode(t *testing.T) {
	if _, ok := newStrictCodec().CodecV2.(rpc.Codec); !ok {
		t.Fatalf("strict codec wraps %T, want rpc.Codec", newStrictCodec().CodecV2)
	}
}
