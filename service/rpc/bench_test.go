package rpc_test

import (
	"context"
	"testing"
	"time"

	"google.golang.org/grpc/mem"
	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/rpc"
)

// pushBatch returns a batch of n samples of the example fleet's three
// units, and a function that stamps batch i a millisecond a sample after
// the previous one, a day behind the clock, so that every batch is new.
func pushBatch(n int) (*pb.PushRequest, func(i int)) {
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
	return req, func(i int) {
		for j, s := range req.Samples {
			ms := int64(i*n + j)
			s.Time.Seconds, s.Time.Nanos = base+ms/1000, int32(ms%1000)*1e6
		}
		req.Sequence = uint64(i)
	}
}

// TestPushAllocatesPerBatch checks that Push allocates for the answer of
// a batch, not for each of its samples (a sample that escapes to the
// heap costs an allocation each, which the load harness shows as CPU).
func TestPushAllocatesPerBatch(t *testing.T) {
	tel := rpc.NewTelemetry(exampleStore(t), rpc.TelemetryOptions{})
	const n = 500
	req, stamp := pushBatch(n)
	ctx := context.Background()
	i := 0
	allocs := testing.AllocsPerRun(20, func() {
		stamp(i)
		i++
		if resp, err := tel.Push(ctx, req); err != nil || resp.Accepted != n {
			t.Fatalf("batch %d: %d accepted of %d, %d rejected, %v", i, resp.GetAccepted(), n, len(resp.GetRejected()), err)
		}
	})
	if allocs > 20 {
		t.Errorf("Push allocates %.0f times for a batch of %d samples; want a few for the batch (the answer), none per sample", allocs, n)
	}
}

// BenchmarkPush is one batch of 500 samples of the example fleet's three
// units through Push after decoding: conversion, checks, evaluation and
// alarms. Its allocs/op are per batch (the answer), not per sample.
func BenchmarkPush(b *testing.B) {
	tel := rpc.NewTelemetry(exampleStore(b), rpc.TelemetryOptions{})
	const n = 500
	req, stamp := pushBatch(n)
	ctx := context.Background()
	b.ReportAllocs()
	for i := range b.N {
		stamp(i)
		resp, err := tel.Push(ctx, req)
		if err != nil || resp.Accepted != n {
			b.Fatalf("batch %d: %d accepted of %d, %d rejected, %v", i, resp.GetAccepted(), n, len(resp.GetRejected()), err)
		}
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*n), "ns/sample")
}

// TestStreamBatchAllocations counts what one 500-sample batch of a
// stream allocates: decoding it with the service's codec into the
// stream's reused request, then pushing it with the stream's resolver.
// The push allocates for the answer only, the decoding nothing per
// sample: the samples, their times, optional values (here a field
// current on every other sample) and unit ids are those of the batch
// before (2 allocations a batch, gRPC's buffer).
func TestStreamBatchAllocations(t *testing.T) {
	tel := rpc.NewTelemetry(exampleStore(t), rpc.TelemetryOptions{})
	const n, batches = 500, 30
	req, stamp := pushBatch(n)
	wire := make([][]byte, batches)
	for i := range wire {
		stamp(i)
		var err error
		if wire[i], err = proto.Marshal(req); err != nil {
			t.Fatal(err)
		}
	}
	codec := rpc.NewCodec()
	ctx := context.Background()
	var units ingest.Resolver
	in := new(pb.PushRequest)
	recv := &rpc.StreamBatch{PushRequest: in, IDs: rpc.NewStreamIDs(1000)} // as Stream receives
	i := 0
	var decodeAllocs, pushAllocs float64
	decode := func() {
		if err := codec.Unmarshal(mem.BufferSlice{mem.SliceBuffer(wire[i%batches])}, recv); err != nil {
			t.Fatal(err)
		}
	}
	push := func() {
		if resp, err := tel.PushFrom(ctx, in, &units); err != nil || resp.Accepted != n {
			t.Fatalf("batch %d: %d accepted of %d, %v", i, resp.GetAccepted(), n, err)
		}
		i++
	}
	decode()
	push() // the stream's units resolved, its request's samples made
	batch := testing.AllocsPerRun(20, func() { decode(); push() })
	decodeAllocs = testing.AllocsPerRun(20, decode) // the same bytes again: as many allocations
	pushAllocs = batch - decodeAllocs
	t.Logf("per batch of %d: decoding %.0f allocations, push %.0f", n, decodeAllocs, pushAllocs)
	if pushAllocs > 5 {
		t.Errorf("push allocates %.0f times a batch; want a few for the answer, none per sample", pushAllocs)
	}
	if decodeAllocs > 2 {
		t.Errorf("decoding allocates %.0f times a batch of %d samples; want none per sample (the unit id, time and optional values of the batch before reused)", decodeAllocs, n)
	}
}

// BenchmarkDecodeBatch decodes a 500-sample batch into a stream's reused
// request: with the service's codec (decodePush, the stream's ids) and,
// for comparison, with the generated decoder alone as the codec did
// before (ResetVT, UnmarshalVT: the unit id, time and optional values
// allocated for every sample).
func BenchmarkDecodeBatch(b *testing.B) {
	const n = 500
	req, stamp := pushBatch(n)
	stamp(1)
	wire, err := proto.Marshal(req)
	if err != nil {
		b.Fatal(err)
	}
	b.Run("codec", func(b *testing.B) {
		codec, recv := rpc.NewCodec(), &rpc.StreamBatch{PushRequest: new(pb.PushRequest), IDs: rpc.NewStreamIDs(1000)}
		b.ReportAllocs()
		for range b.N {
			if err := codec.Unmarshal(mem.BufferSlice{mem.SliceBuffer(wire)}, recv); err != nil {
				b.Fatal(err)
			}
		}
		b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*n), "ns/sample")
	})
	b.Run("generated", func(b *testing.B) {
		in := new(pb.PushRequest)
		b.ReportAllocs()
		for range b.N {
			in.ResetVT()
			if err := in.UnmarshalVT(wire); err != nil {
				b.Fatal(err)
			}
		}
		b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*n), "ns/sample")
	})
}
