package server

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"sync"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/peer"
	"google.golang.org/grpc/status"

	"github.com/genvelope/genvelope/service/access"
)

// connCounts counts the connections each caller (limitKey) holds open
// on one listener.
type connCounts struct {
	max  int
	mu   sync.Mutex
	open map[string]int
}

func newConnCounts(max int) *connCounts { return &connCounts{max: max, open: map[string]int{}} }

// take counts one connection for key, or refuses it at the cap.
func (cc *connCounts) take(key string) bool {
	cc.mu.Lock()
	defer cc.mu.Unlock()
	if cc.open[key] >= cc.max {
		return false
	}
	cc.open[key]++
	return true
}

func (cc *connCounts) give(key string) {
	cc.mu.Lock()
	defer cc.mu.Unlock()
	if cc.open[key]--; cc.open[key] <= 0 {
		delete(cc.open, key)
	}
}

// refuseLinger is how long a gRPC connection over its caller's cap stays
// open to answer its calls RESOURCE_EXHAUSTED before it is closed.
const refuseLinger = 2 * time.Second

// capCreds wraps the gRPC transport credentials (TLS, or insecure for
// plaintext): a failed handshake is audited with its reason and the
// certificate subject it claimed; after the handshake the caller is known
// (its certificate, else its address) and its connections are counted
// against Limits.GRPCConnsPerCaller. A connection over the cap is kept
// for refuseLinger to answer every call RESOURCE_EXHAUSTED with the
// reason (refusedInfo), then closed.
type capCreds struct {
	credentials.TransportCredentials
	guard *access.Guard
	conns *connCounts
}

func (c *capCreds) ServerHandshake(raw net.Conn) (net.Conn, credentials.AuthInfo, error) {
	src := raw.RemoteAddr().String()
	conn, info, err := c.TransportCredentials.ServerHandshake(raw)
	if err != nil {
		if errors.Is(err, io.EOF) {
			return nil, nil, err // closed before the handshake: a port probe, no attempt to authenticate
		}
		reason, claimed := access.ClassifyTLSError(err)
		c.guard.AuthFailed(context.Background(), access.AuthFailure{Source: src, Claimed: claimed, Action: "grpc connect", Reason: reason, Detail: err.Error()})
		return nil, nil, err
	}
	var cs *credentials.TLSInfo
	if ti, ok := info.(credentials.TLSInfo); ok {
		cs = &ti
	}
	var caller *access.Caller
	if cs != nil {
		caller = c.guard.FromTLS(&cs.State, src)
	} else {
		caller = c.guard.FromTLS(nil, src)
	}
	key := limitKey(caller)
	if !c.conns.take(key) {
		why := fmt.Sprintf("genvelope: %s already has %d gRPC connections open, the most allowed for one client; this connection is closed (use fewer connections, or close one first)", caller.Who(), c.conns.max)
		c.guard.DenyGated(context.Background(), caller, "grpc connect", access.ReasonLimit, fmt.Sprintf("more than %d gRPC connections", c.conns.max))
		time.AfterFunc(refuseLinger, func() { conn.Close() })
		return conn, refusedInfo{AuthInfo: info, why: why}, nil
	}
	return &countedConn{Conn: conn, release: func() { c.conns.give(key) }}, info, nil
}

func (c *capCreds) Clone() credentials.TransportCredentials {
	return &capCreds{TransportCredentials: c.TransportCredentials.Clone(), guard: c.guard, conns: c.conns}
}

// refusedInfo marks a connection over its caller's cap.
type refusedInfo struct {
	credentials.AuthInfo
	why string
}

// GetCommonAuthInfo keeps the security level visible to grpc-go's checks.
func (r refusedInfo) GetCommonAuthInfo() credentials.CommonAuthInfo {
	if ci, ok := r.AuthInfo.(interface {
		GetCommonAuthInfo() credentials.CommonAuthInfo
	}); ok {
		return ci.GetCommonAuthInfo()
	}
	return credentials.CommonAuthInfo{}
}

// countedConn gives its caller's slot back when it closes.
type countedConn struct {
	net.Conn
	once    sync.Once
	release func()
}

func (c *countedConn) Close() error {
	c.once.Do(c.release)
	return c.Conn.Close()
}

// refusedConn returns the reason when the call's connection is over its
// caller's cap, else "".
func refusedConn(ctx context.Context) string {
	if p, ok := peer.FromContext(ctx); ok {
		if r, ok := p.AuthInfo.(refusedInfo); ok {
			return r.why
		}
	}
	return ""
}

// connCapUnary and connCapStream answer every call on a connection over
// its caller's cap RESOURCE_EXHAUSTED (the refusal was audited once, at
// the handshake).
func connCapUnary(ctx context.Context, req any, info *grpc.UnaryServerInfo, handler grpc.UnaryHandler) (any, error) {
	if why := refusedConn(ctx); why != "" {
		return nil, status.Error(codes.ResourceExhausted, why)
	}
	return handler(ctx, req)
}

func connCapStream(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, handler grpc.StreamHandler) error {
	if why := refusedConn(ss.Context()); why != "" {
		return status.Error(codes.ResourceExhausted, why)
	}
	return handler(srv, ss)
}

// httpConnCaps counts an HTTP listener's connections per caller. The
// caller of a connection is known at its first request (a client
// certificate, a basic-auth user the web configuration accepted, else
// the address); a connection over its caller's cap is answered 429 with
// the reason and closed.
type httpConnCaps struct {
	conns *connCounts
	mu    sync.Mutex
	slots map[net.Conn]*httpSlot
}

type httpSlot struct {
	mu      sync.Mutex
	key     string // "" until the first request
	counted bool
	caps    *httpConnCaps
}

type slotKey struct{}

func newHTTPConnCaps(max int) *httpConnCaps {
	return &httpConnCaps{conns: newConnCounts(max), slots: map[net.Conn]*httpSlot{}}
}

// connContext gives each connection its slot (http.Server.ConnContext).
func (h *httpConnCaps) connContext(ctx context.Context, c net.Conn) context.Context {
	s := &httpSlot{caps: h}
	h.mu.Lock()
	h.slots[c] = s
	h.mu.Unlock()
	return context.WithValue(ctx, slotKey{}, s)
}

// connState gives a closed connection's slot back (http.Server.ConnState).
func (h *httpConnCaps) connState(c net.Conn, st http.ConnState) {
	if st != http.StateClosed && st != http.StateHijacked {
		return
	}
	h.mu.Lock()
	s := h.slots[c]
	delete(h.slots, c)
	h.mu.Unlock()
	if s == nil {
		return
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.counted {
		h.conns.give(s.key)
		s.counted = false
	}
}

// admit counts the request's connection against key at its first
// request; it reports false when the connection is over the cap (every
// request on it is then refused).
func admit(ctx context.Context, key string) (ok bool, max int) {
	s, _ := ctx.Value(slotKey{}).(*httpSlot)
	if s == nil {
		return true, 0
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.key == "" {
		s.key = key
		s.counted = s.caps.conns.take(key)
	}
	return s.counted, s.caps.conns.max
}
