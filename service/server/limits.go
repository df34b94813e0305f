package server

import (
	"context"
	"net"
	"sync"
	"time"

	"golang.org/x/net/netutil"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/keepalive"
	"google.golang.org/grpc/status"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/access"
)

// Limits bound what one client, and all of them, may hold of the
// service. The zero value takes the defaults (in parentheses).
type Limits struct {
	GRPCConns          int           // open gRPC connections (512); more wait in the kernel's backlog
	HTTPConns          int           // open HTTP connections (128)
	GRPCConnsPerCaller int           // open gRPC connections per identity, or per address when anonymous (32)
	HTTPConnsPerCaller int           // open HTTP connections per identity, or per address when anonymous (32)
	StreamsPerConn     uint32        // concurrent calls per gRPC connection (64)
	Watchers           int           // alarm watchers in all (256)
	WatchersPerCaller  int           // alarm watchers per identity, or per address when anonymous (16)
	InFlightPerCaller  int           // telemetry calls (Push, Stream) at once per identity or address (64)
	GRPCIdle           time.Duration // a gRPC connection without calls is closed after this (5 min)
	PingMinTime        time.Duration // a client pinging more often is sent GOAWAY too_many_pings (10 s)
	StreamIdle         time.Duration // a telemetry stream without a batch for this long is ended, UNAVAILABLE (10 min)
	HTTPRead           time.Duration // whole request, body included (30 s)
	HTTPWrite          time.Duration // whole answer (60 s)
	HTTPIdle           time.Duration // keep-alive between requests (120 s)
}

func (l Limits) withDefaults() Limits {
	def := func(v *int, d int) {
		if *v <= 0 {
			*v = d
		}
	}
	def(&l.GRPCConns, 512)
	def(&l.HTTPConns, 128)
	def(&l.GRPCConnsPerCaller, 32)
	def(&l.HTTPConnsPerCaller, 32)
	def(&l.Watchers, 256)
	def(&l.WatchersPerCaller, 16)
	def(&l.InFlightPerCaller, 64)
	if l.StreamsPerConn == 0 {
		l.StreamsPerConn = 64
	}
	for _, d := range []struct {
		v *time.Duration
		d time.Duration
	}{{&l.GRPCIdle, 5 * time.Minute}, {&l.PingMinTime, 10 * time.Second}, {&l.StreamIdle, 10 * time.Minute}, {&l.HTTPRead, 30 * time.Second}, {&l.HTTPWrite, 60 * time.Second}, {&l.HTTPIdle, 120 * time.Second}} {
		if *d.v <= 0 {
			*d.v = d.d
		}
	}
	return l
}

// recvLimit is the largest gRPC message the server reads: the batch
// limit at 256 bytes a sample (a sample with a 64-byte unit id and every
// field set encodes to about 110 bytes), plus room for the envelope.
func recvLimit(maxBatch int) int { return maxBatch*256 + 64<<10 }

// grpcLimitOptions are the server options that bound clients: message
// size, calls per connection, keepalive enforcement and idle timeouts.
func grpcLimitOptions(l Limits, maxBatch int) []grpc.ServerOption {
	return []grpc.ServerOption{
		grpc.MaxRecvMsgSize(recvLimit(maxBatch)),
		grpc.MaxConcurrentStreams(l.StreamsPerConn),
		grpc.KeepaliveEnforcementPolicy(keepalive.EnforcementPolicy{MinTime: l.PingMinTime, PermitWithoutStream: true}),
		grpc.KeepaliveParams(keepalive.ServerParameters{MaxConnectionIdle: l.GRPCIdle, Time: time.Minute, Timeout: 20 * time.Second}),
		grpc.ConnectionTimeout(10 * time.Second), // the TLS handshake
	}
}

// limitListener caps the connections a listener holds open.
func limitListener(ln net.Listener, n int) net.Listener { return netutil.LimitListener(ln, n) }

// callerLimits counts the watchers and telemetry calls each caller has
// open and refuses those above the caps with RESOURCE_EXHAUSTED.
type callerLimits struct {
	l     Limits
	guard *access.Guard

	mu       sync.Mutex
	watchers int
	perWatch map[string]int
	perPush  map[string]int
}

func newCallerLimits(l Limits, g *access.Guard) *callerLimits {
	return &callerLimits{l: l, guard: g, perWatch: map[string]int{}, perPush: map[string]int{}}
}

// key is whom a call counts against: the identity, else the address
// without port.
func limitKey(c *access.Caller) string {
	if c == nil {
		return ""
	}
	if c.Name != "" {
		return "id:" + c.Name
	}
	host, _, err := net.SplitHostPort(c.Source)
	if err != nil {
		host = c.Source
	}
	return "addr:" + host
}

// take counts one call against key in m; it fails when that exceeds
// max, or total exceeds totalMax (when total is not nil).
func (cl *callerLimits) take(m map[string]int, key string, max int, total *int, totalMax int) bool {
	cl.mu.Lock()
	defer cl.mu.Unlock()
	if m[key] >= max || (total != nil && *total >= totalMax) {
		return false
	}
	m[key]++
	if total != nil {
		*total++
	}
	return true
}

func (cl *callerLimits) give(m map[string]int, key string, total *int) {
	cl.mu.Lock()
	defer cl.mu.Unlock()
	if m[key]--; m[key] <= 0 {
		delete(m, key)
	}
	if total != nil {
		*total--
	}
}

func (cl *callerLimits) refuse(ctx context.Context, c *access.Caller, method, what string, max int) error {
	cl.guard.Deny(ctx, c, "grpc "+method, "", access.ReasonLimit)
	return status.Errorf(codes.ResourceExhausted, "genvelope: %s already has %d %s open, the most allowed; close one first", c.Who(), max, what)
}

// Stream is a stream interceptor (after the guard's, which puts the
// caller in the context).
func (cl *callerLimits) Stream(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, handler grpc.StreamHandler) error {
	ctx := ss.Context()
	c := access.FromContext(ctx)
	key := limitKey(c)
	switch info.FullMethod {
	case pb.AlarmService_WatchAlarms_FullMethodName:
		if !cl.take(cl.perWatch, key, cl.l.WatchersPerCaller, &cl.watchers, cl.l.Watchers) {
			return cl.refuse(ctx, c, info.FullMethod, "alarm watchers", cl.l.WatchersPerCaller)
		}
		defer cl.give(cl.perWatch, key, &cl.watchers)
	case pb.TelemetryService_Stream_FullMethodName:
		if !cl.take(cl.perPush, key, cl.l.InFlightPerCaller, nil, 0) {
			return cl.refuse(ctx, c, info.FullMethod, "telemetry calls", cl.l.InFlightPerCaller)
		}
		defer cl.give(cl.perPush, key, nil)
		ss = &idleStream{ServerStream: ss, idle: cl.l.StreamIdle}
	}
	return handler(srv, ss)
}

// idleStream ends a telemetry stream on which no batch came for idle:
// RecvMsg then answers UNAVAILABLE, the handler returns, and the stream
// ends (which also ends the receive left waiting).
type idleStream struct {
	grpc.ServerStream
	idle time.Duration
}

func (s *idleStream) RecvMsg(m any) error {
	got := make(chan error, 1)
	go func() { got <- s.ServerStream.RecvMsg(m) }()
	t := time.NewTimer(s.idle)
	defer t.Stop()
	select {
	case err := <-got:
		return err
	case <-t.C:
		return status.Errorf(codes.Unavailable, "genvelope: no batch on this stream for %s: it is closed; reconnect when there is telemetry to send", s.idle)
	}
}

// Unary is a unary interceptor (after the guard's).
func (cl *callerLimits) Unary(ctx context.Context, req any, info *grpc.UnaryServerInfo, handler grpc.UnaryHandler) (any, error) {
	if info.FullMethod != pb.TelemetryService_Push_FullMethodName {
		return handler(ctx, req)
	}
	c := access.FromContext(ctx)
	key := limitKey(c)
	if !cl.take(cl.perPush, key, cl.l.InFlightPerCaller, nil, 0) {
		return nil, cl.refuse(ctx, c, info.FullMethod, "telemetry calls", cl.l.InFlightPerCaller)
	}
	defer cl.give(cl.perPush, key, nil)
	return handler(ctx, req)
}
