package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"os"
	"os/signal"
	"syscall"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/rpc"
)

// sinkFlag, as the first argument, makes the program a bare sink
// listening on the address that follows. It is not among the flags the
// usage lists: the harness passes it to itself.
const sinkFlag = "-sink"

// sink is the least a TelemetryService can do: it lets gRPC decode each
// request and answers that every sample was accepted, without looking
// at them. Loading it measures the transport and the client.
type sink struct {
	pb.UnimplementedTelemetryServiceServer
}

func (sink) Push(_ context.Context, req *pb.PushRequest) (*pb.PushResponse, error) {
	return &pb.PushResponse{Sequence: req.Sequence, Accepted: uint32(len(req.Samples))}, nil
}

// Stream decodes as the service does (rpc.Codec, into the request of
// the batch before, with the stream's unit ids), so that the ratio of
// the two measures the service's own work.
func (sink) Stream(st grpc.BidiStreamingServer[pb.PushRequest, pb.PushResponse]) error {
	req := &rpc.StreamBatch{PushRequest: new(pb.PushRequest), IDs: rpc.NewStreamIDs(1 << 20)}
	for {
		err := st.RecvMsg(req)
		if errors.Is(err, io.EOF) {
			return nil
		}
		if err != nil {
			return err
		}
		if err := st.Send(&pb.PushResponse{Sequence: req.Sequence, Accepted: uint32(len(req.Samples))}); err != nil {
			return err
		}
	}
}

// runSink serves a bare sink on addr until SIGTERM, SIGINT or the end
// of its standard input (the harness going away), and returns the exit
// status.
func runSink(addr string, tlsFiles ...string) int {
	log := slog.New(slog.NewTextHandler(os.Stderr, nil))
	lis, err := net.Listen("tcp", addr)
	if err != nil {
		log.Error("sink: listen", "addr", addr, "err", err)
		return 1
	}
	// The same receive limit as genvelope serve.
	opts := []grpc.ServerOption{grpc.MaxRecvMsgSize(64 << 20), rpc.NewCodec().ServerOption()}
	if len(tlsFiles) == 2 {
		creds, err := credentials.NewServerTLSFromFile(tlsFiles[0], tlsFiles[1])
		if err != nil {
			log.Error("sink: TLS", "err", err)
			return 1
		}
		opts = append(opts, grpc.Creds(creds))
	}
	srv := grpc.NewServer(opts...)
	pb.RegisterTelemetryServiceServer(srv, sink{})
	fmt.Printf("%s%s\n", sinkListenPrefix, lis.Addr())

	// Kept until the process exits: a SIGTERM that arrives while it stops
	// for another reason must not kill it with a signal status.
	sigs := make(chan os.Signal, 1)
	signal.Notify(sigs, os.Interrupt, syscall.SIGTERM)
	stdinEOF := make(chan struct{})
	go func() {
		// Ends at EOF or a read error, which both mean the harness is gone
		// or done; the process exits soon after either way.
		_, _ = io.Copy(io.Discard, os.Stdin)
		close(stdinEOF)
	}()
	served := make(chan error, 1)
	go func() { served <- srv.Serve(lis) }()
	select {
	case <-sigs:
	case <-stdinEOF:
	case err := <-served:
		log.Error("sink: serve", "err", err)
		return 1
	}
	stopped := make(chan struct{})
	go func() { srv.GracefulStop(); close(stopped) }()
	select {
	case <-stopped:
	case <-time.After(5 * time.Second):
		srv.Stop()
		<-stopped
	}
	if err := <-served; err != nil && !errors.Is(err, grpc.ErrServerStopped) {
		log.Error("sink: serve", "err", err)
		return 1
	}
	return 0
}
