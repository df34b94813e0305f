package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"slices"
	"sync"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/encoding"
	_ "google.golang.org/grpc/encoding/proto" // registers the proto codec used for responses
	"google.golang.org/grpc/mem"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

// rawRequest is a PushRequest already encoded by a generator.
type rawRequest struct{ b []byte }

// rawCodec sends a rawRequest as it is and handles everything else
// (the responses) with the proto codec. Its name is "proto", so the
// content type on the wire is the usual application/grpc+proto and the
// server decodes the requests as any client's.
type rawCodec struct{ proto encoding.CodecV2 }

func newRawCodec() rawCodec { return rawCodec{proto: encoding.GetCodecV2("proto")} }

func (c rawCodec) Marshal(v any) (mem.BufferSlice, error) {
	if r, ok := v.(*rawRequest); ok {
		return mem.BufferSlice{mem.SliceBuffer(r.b)}, nil
	}
	return c.proto.Marshal(v)
}

func (c rawCodec) Unmarshal(data mem.BufferSlice, v any) error { return c.proto.Unmarshal(data, v) }

func (rawCodec) Name() string { return "proto" }

// ack is one answered batch.
type ack struct {
	at      time.Time     // when the response arrived
	latency time.Duration // from just before the request was sent
	samples int
}

// streamResult is what one stream saw over a whole phase, warm-up
// included (acks carry their time, so the window is cut later).
type streamResult struct {
	acks            []ack
	sent            int // samples sent
	batches         int // batches sent
	accepted        int
	duplicates      int
	rejected        map[string]int // by reason
	mismatches      int            // responses whose counts do not add up to the batch
	seqErrors       int            // responses out of sequence
	firstRejections []string       // a few details, for the report
	err             error
}

// phaseSpec says how to load one server for one phase.
type phaseSpec struct {
	server   string // "bare" or "full"
	addr     string // gRPC address
	streams  int
	window   int
	batch    int
	rate     float64 // samples/s over all streams; 0 = as fast as possible
	warmup   time.Duration
	duration time.Duration
	grace    time.Duration                    // how long after the end to wait for the last answers
	creds    credentials.TransportCredentials // nil: plaintext
}

// dial opens one client connection per stream.
func dial(addr string, n int, creds credentials.TransportCredentials) ([]*grpc.ClientConn, error) {
	conns := make([]*grpc.ClientConn, 0, n)
	if creds == nil {
		creds = insecure.NewCredentials()
	}
	for range n {
		cc, err := grpc.NewClient(addr,
			grpc.WithTransportCredentials(creds),
			grpc.WithDefaultCallOptions(grpc.ForceCodecV2(newRawCodec())),
		)
		if err != nil {
			for _, c := range conns {
				c.Close()
			}
			return nil, fmt.Errorf("dial %s: %w", addr, err)
		}
		conns = append(conns, cc)
	}
	return conns, nil
}

// runStreams drives one stream per generator against spec.addr until
// end (a wall-clock time), and returns what each saw. Every goroutine
// it starts has ended when it returns.
func runStreams(ctx context.Context, log *slog.Logger, spec phaseSpec, gens []*generator, start, end time.Time) ([]*streamResult, error) {
	conns, err := dial(spec.addr, len(gens), spec.creds)
	if err != nil {
		return nil, err
	}
	defer func() {
		for _, c := range conns {
			c.Close()
		}
	}()
	ctx, cancel := context.WithDeadline(ctx, end.Add(spec.grace))
	defer cancel()
	results := make([]*streamResult, len(gens))
	var wg sync.WaitGroup
	for i, g := range gens {
		results[i] = &streamResult{rejected: map[string]int{}}
		wg.Go(func() {
			r := results[i]
			// Paced streams start a fraction of the interval apart, so
			// that their batches do not arrive together.
			r.err = runStream(ctx, conns[i], g, spec, i, start, end, r)
			if r.err != nil {
				log.Error("stream failed", "server", spec.server, "stream", i, "err", r.err)
				cancel() // the others would only measure a broken run
			}
		})
	}
	wg.Wait()
	var errs []error
	for i, r := range results {
		if r.err != nil {
			errs = append(errs, fmt.Errorf("stream %d: %w", i, r.err))
		}
	}
	return results, errors.Join(errs...)
}

// inflight is a batch sent and not yet answered.
type inflight struct {
	seq     uint64
	samples int
	sent    time.Time
}

// runStream sends batches on one bidirectional stream, keeping up to
// spec.window of them unanswered, until end; then it closes its side and
// waits for the remaining answers.
func runStream(ctx context.Context, cc *grpc.ClientConn, g *generator, spec phaseSpec, index int, start, end time.Time, r *streamResult) error {
	sctx, cancel := context.WithCancel(ctx)
	defer cancel()
	st, err := cc.NewStream(sctx, &pb.TelemetryService_ServiceDesc.Streams[0], pb.TelemetryService_Stream_FullMethodName)
	if err != nil {
		return fmt.Errorf("open stream: %w", err)
	}
	w := spec.window
	// One buffer per slot of the window: the buffer of batch n is reused
	// by batch n+w, which is sent only after batch n is answered, so the
	// transport is done with it.
	bufs := make([][]byte, w)
	slots := make(chan struct{}, w)
	pending := make(chan inflight, w)

	recvDone := make(chan error, 1)
	go func() {
		recvDone <- receive(st, pending, slots, r)
	}()

	var interval time.Duration
	if spec.rate > 0 {
		interval = time.Duration(float64(time.Second) * float64(spec.batch) * float64(spec.streams) / spec.rate)
		start = start.Add(interval * time.Duration(index) / time.Duration(spec.streams))
	}
	var sendErr error
	timer := time.NewTimer(time.Hour)
	timer.Stop()
	defer timer.Stop()
send:
	for seq := uint64(1); ; seq++ {
		if interval > 0 {
			next := start.Add(time.Duration(seq-1) * interval)
			if d := time.Until(next); d > 0 {
				timer.Reset(d)
				select {
				case <-timer.C:
				case <-sctx.Done():
					break send
				}
			}
		}
		if !time.Now().Before(end) {
			break
		}
		select {
		case slots <- struct{}{}:
		case <-sctx.Done():
			break send
		case err := <-recvDone:
			// The receiver ended early: the stream is broken.
			recvDone <- err
			break send
		}
		i := int(seq % uint64(w))
		bufs[i] = g.appendBatch(bufs[i][:0], seq, spec.batch)
		pending <- inflight{seq: seq, samples: spec.batch, sent: time.Now()}
		if err := st.SendMsg(&rawRequest{b: bufs[i]}); err != nil {
			// io.EOF means the stream is gone; RecvMsg says why.
			if !errors.Is(err, io.EOF) {
				sendErr = fmt.Errorf("send batch %d: %w", seq, err)
			}
			break
		}
		r.batches++
		r.sent += spec.batch
	}
	if sendErr == nil {
		if err := st.CloseSend(); err != nil {
			sendErr = fmt.Errorf("close send: %w", err)
		}
	}
	var recvErr error
	select {
	case recvErr = <-recvDone:
	case <-sctx.Done():
		cancel()
		recvErr = <-recvDone
	}
	if n := len(pending); n > 0 && recvErr == nil && sendErr == nil {
		recvErr = fmt.Errorf("%d batches were never answered", n)
	}
	return errors.Join(sendErr, recvErr)
}

// receive reads the answers of a stream until it ends, matching each to
// the oldest batch in flight.
func receive(st grpc.ClientStream, pending <-chan inflight, slots <-chan struct{}, r *streamResult) error {
	resp := new(pb.PushResponse)
	for {
		if err := st.RecvMsg(resp); err != nil {
			if errors.Is(err, io.EOF) {
				return nil
			}
			return fmt.Errorf("receive: %w", err)
		}
		now := time.Now()
		var b inflight
		select {
		case b = <-pending:
		default:
			return fmt.Errorf("answer %d to no batch in flight", resp.Sequence)
		}
		<-slots
		r.acks = append(r.acks, ack{at: now, latency: now.Sub(b.sent), samples: b.samples})
		if resp.Sequence != b.seq {
			r.seqErrors++
		}
		r.accepted += int(resp.Accepted)
		r.duplicates += int(resp.Duplicates)
		for _, rj := range resp.Rejected {
			r.rejected[rj.Reason.String()]++
			if len(r.firstRejections) < 5 {
				r.firstRejections = append(r.firstRejections, fmt.Sprintf("batch %d sample %d: %s: %s", resp.Sequence, rj.Index, rj.Reason, rj.Detail))
			}
		}
		if int(resp.Accepted)+int(resp.Duplicates)+len(resp.Rejected) != b.samples {
			r.mismatches++
		}
	}
}

// phaseResult is the measurement of one server in one phase.
type phaseResult struct {
	Server       string  `json:"server"`
	WindowS      float64 `json:"window_s"`
	Samples      int     `json:"samples_acked"` // acknowledged within the window
	Batches      int     `json:"batches_acked"`
	SamplesPerS  float64 `json:"samples_per_s"`
	LatencyP50MS float64 `json:"ack_latency_p50_ms"`
	LatencyP90MS float64 `json:"ack_latency_p90_ms"`
	LatencyP99MS float64 `json:"ack_latency_p99_ms"`
	LatencyMaxMS float64 `json:"ack_latency_max_ms"`
	ServerCPU    float64 `json:"server_cpu_cores"` // CPU time over the window / window
	// The part of ServerCPU that is nats-server's (the nats phase).
	CompanionCPU float64 `json:"nats_server_cpu_cores,omitempty"`
	// CPU microseconds per acknowledged sample of genvelope and of
	// nats-server (the nats phase).
	ServiceUSPerSample   float64 `json:"genvelope_cpu_us_per_sample,omitempty"`
	CompanionUSPerSample float64 `json:"nats_server_cpu_us_per_sample,omitempty"`
	// Samples per telemetry message written to the stream (the nats phase).
	SamplesPerMessage float64 `json:"samples_per_log_message,omitempty"`
	ClientCPU         float64 `json:"client_cpu_cores"`
	// Busy CPU of the rest of the machine (other processes, and the
	// kernel's work not charged to either side) over the window, cores.
	OtherCPU float64 `json:"other_cpu_cores"`
	// Samples acknowledged per CPU second of the server: how much work
	// a sample costs it, whatever else the machine was doing.
	SamplesPerCPUS float64        `json:"samples_per_server_cpu_s"`
	TotalSent      int            `json:"total_samples_sent"` // whole phase, warm-up included
	TotalAccepted  int            `json:"total_accepted"`
	Duplicates     int            `json:"total_duplicates"`
	Rejected       map[string]int `json:"rejected_by_reason"`
	Mismatches     int            `json:"count_mismatches"`
	SeqErrors      int            `json:"sequence_errors"`
	Rejections     []string       `json:"first_rejections,omitempty"`
}

// summarize cuts the acks to [from, to) and totals the checks.
func summarize(server string, rs []*streamResult, from, to time.Time) *phaseResult {
	p := &phaseResult{Server: server, WindowS: to.Sub(from).Seconds(), Rejected: map[string]int{}}
	var lat []time.Duration
	for _, r := range rs {
		for _, a := range r.acks {
			if a.at.Before(from) || !a.at.Before(to) {
				continue
			}
			p.Samples += a.samples
			p.Batches++
			lat = append(lat, a.latency)
		}
		p.TotalSent += r.sent
		p.TotalAccepted += r.accepted
		p.Duplicates += r.duplicates
		for k, v := range r.rejected {
			p.Rejected[k] += v
		}
		p.Mismatches += r.mismatches
		p.SeqErrors += r.seqErrors
		for _, s := range r.firstRejections {
			if len(p.Rejections) < 5 {
				p.Rejections = append(p.Rejections, s)
			}
		}
	}
	if p.WindowS > 0 {
		p.SamplesPerS = float64(p.Samples) / p.WindowS
	}
	slices.Sort(lat)
	p.LatencyP50MS = ms(quantile(lat, 0.50))
	p.LatencyP90MS = ms(quantile(lat, 0.90))
	p.LatencyP99MS = ms(quantile(lat, 0.99))
	if len(lat) > 0 {
		p.LatencyMaxMS = ms(lat[len(lat)-1])
	}
	return p
}

// quantile returns the q-quantile of sorted (nearest rank), 0 when empty.
func quantile(sorted []time.Duration, q float64) time.Duration {
	if len(sorted) == 0 {
		return 0
	}
	i := int(q*float64(len(sorted))+0.999999) - 1
	i = max(0, min(i, len(sorted)-1))
	return sorted[i]
}

func ms(d time.Duration) float64 { return float64(d) / float64(time.Millisecond) }
