package rpc

import (
	"context"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/ingest"
)

// PushFrom is what Stream does with one batch: push with the stream's
// resolver.
func (t *Telemetry) PushFrom(ctx context.Context, req *pb.PushRequest, units *ingest.Resolver) (*pb.PushResponse, error) {
	return t.push(ctx, req, units)
}
