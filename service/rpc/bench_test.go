package rpc_test

import (
	"context"
	"testing"
	"time"

	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/rpc"
)

// BenchmarkPush is one batch of 500 samples of the example fleet's three
// units through Push after decoding: conversion, checks, evaluation and
// alarms. Its allocs/op are per batch (the answer), not per sample.
func BenchmarkPush(b *testing.B) {
	t := rpc.NewTelemetry(exampleStore(b), rpc.TelemetryOptions{})
	const n = 500
	units := []struct {
		id          string
		pMW, qMvar  float64
		vKV, fieldA float64
	}{{"harrowmere-1", 250, 80, 20.1, 2400}, {"larchwater-2", 80, 20, 13.9, 1000}, {"brindle-gt3", 100, 30, 15.1, 1200}}
	req := &pb.PushRequest{Samples: make([]*pb.Sample, n)}
	for i := range req.Samples {
		u := units[i%len(units)]
		s := &pb.Sample{UnitId: u.id, PMw: u.pMW + float64(i%7), QMvar: u.qMvar, VKv: u.vKV, Time: &timestamppb.Timestamp{}}
		if i%2 == 0 {
			s.FieldA = &u.fieldA
		}
		req.Samples[i] = s
	}
	base := time.Now().Add(-24 * time.Hour).Unix()
	ctx := context.Background()
	b.ReportAllocs()
	for i := range b.N {
		for j, s := range req.Samples {
			ms := int64(i*n + j) // a sample every millisecond
			s.Time.Seconds, s.Time.Nanos = base+ms/1000, int32(ms%1000)*1e6
		}
		req.Sequence = uint64(i)
		resp, err := t.Push(ctx, req)
		if err != nil || resp.Accepted != n {
			b.Fatalf("batch %d: %d accepted of %d, %d rejected, %v", i, resp.GetAccepted(), n, len(resp.GetRejected()), err)
		}
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*n), "ns/sample")
}
