package durable

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"os"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"github.com/genvelope/genvelope/service/ingest"
)

// benchMessage is a batch's message for one partition as the load
// harness makes them (500 samples of 250 units over 8 partitions: 31
// units): units units, two instants 1 s apart, frequency on every
// sample, field current on every other unit, coolant on every third.
func benchMessage(units int) ([]ingest.Sample, []int) {
	at := time.Unix(1_780_000_000, 0)
	var smps []ingest.Sample
	var idx []int
	for round := range 2 {
		for u := range units {
			s := ingest.Sample{UnitID: fmt.Sprintf("syn-%05d", 8*u+3), Time: at.Add(time.Duration(round) * time.Second),
				PMW: 187.34 + float64(u)/7, QMvar: -31.5 + float64(u)/3, VKV: 20.13 + float64(u)/1000, FrequencyHz: 50.013, HasFreq: true}
			s.FieldA, s.HasFieldA = 1234.5+float64(u), u%2 == 0
			s.Coolant, s.HasCoolant = 31.5, u%3 == 0
			smps = append(smps, s)
			idx = append(idx, len(idx))
		}
	}
	return smps, idx
}

// BenchmarkEncodeSamples and BenchmarkDecodeSamples: the codec's own
// cost for a partition's message of a batch, per message.
func BenchmarkEncodeSamples(b *testing.B) {
	smps, idx := benchMessage(31)
	var e sampleEncoder
	buf := make([]byte, 0, 4096)
	b.ReportAllocs()
	for b.Loop() {
		buf = e.encodeSamples(buf[:0], smps, idx)
	}
	b.ReportMetric(float64(len(buf))/float64(len(idx)), "bytes/sample")
}

func BenchmarkDecodeSamples(b *testing.B) {
	smps, idx := benchMessage(31)
	for _, tc := range []struct {
		format string
		data   []byte
	}{
		{formatSamples, new(sampleEncoder).encodeSamples(nil, smps, idx)},
		{formatSamples1, encodeSamples1(nil, smps, idx)},
	} {
		b.Run(strings.ReplaceAll(tc.format, "/", ""), func(b *testing.B) {
			interned := map[string]string{}
			for _, s := range smps {
				interned[s.UnitID] = s.UnitID
			}
			d := sampleDecoder{intern: func(b []byte) string { return interned[string(b)] }}
			b.ReportAllocs()
			for b.Loop() {
				if _, err := d.decode(tc.format, tc.data); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}

// BenchmarkStream measures what the stream costs nats-server per sample:
// a partition's message of a batch (benchMessage) published the way
// Append does (asynchronously, its headers, up to 64 awaiting their
// acknowledgement) to a stream made by Open, and read back by an ordered
// consumer as a replica does, while it is written. It reports
// nats-server's CPU (user + system, from /proc) per sample and the
// bytes of a sample in the message, for each message format, at 62,
// 250, 1,000 and 4,000 samples a message (a partition's share of one
// batch, of four with group commit, and larger). The server
// is $GENVELOPE_NATS_SERVER or nats-server from PATH; it is a
// benchmark, run it alone on a quiet machine:
//
//	go test -run '^$' -bench Stream -benchtime 20000x ./service/durable
func BenchmarkStream(b *testing.B) {
	type bench struct {
		name, format string
		data         []byte
		samples      int
	}
	var benches []bench
	for _, units := range []int{31, 125, 500, 2000} {
		smps, idx := benchMessage(units)
		benches = append(benches,
			bench{fmt.Sprintf("samples2-%d", len(idx)), formatSamples, new(sampleEncoder).encodeSamples(nil, smps, idx), len(idx)},
			bench{fmt.Sprintf("samples1-%d", len(idx)), formatSamples1, encodeSamples1(nil, smps, idx), len(idx)})
	}
	for _, tc := range benches {
		b.Run(tc.name, func(b *testing.B) {
			url, pid := startNATSServer(b)
			l := openBenchLog(b, url)
			cons, err := l.stream.OrderedConsumer(context.Background(), jetstream.OrderedConsumerConfig{})
			if err != nil {
				b.Fatal(err)
			}
			consumed := make(chan error, 1)
			ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
			defer cancel()
			go func() {
				it, err := cons.Messages()
				if err != nil {
					consumed <- err
					return
				}
				defer it.Stop()
				for n := 0; n < b.N; n++ {
					if _, err := it.Next(jetstream.NextContext(ctx)); err != nil {
						consumed <- err
						return
					}
				}
				consumed <- nil
			}()
			subj := l.subject(3)
			cpu0 := processCPU(b, pid)
			b.ResetTimer()
			var futs []jetstream.PubAckFuture
			for i := range b.N {
				msg := &nats.Msg{Subject: subj, Header: nats.Header{formatHeader: {tc.format}, idHeader: {l.origin + "-" + strconv.Itoa(i)}}, Data: tc.data}
				fut, err := l.js.PublishMsgAsync(msg, jetstream.WithExpectStream(l.cfg.Stream))
				if err != nil {
					b.Fatal(err)
				}
				if futs = append(futs, fut); len(futs) == 64 || i == b.N-1 {
					for _, f := range futs {
						select {
						case <-f.Ok():
						case err := <-f.Err():
							b.Fatal(err)
						case <-ctx.Done():
							b.Fatal(ctx.Err())
						}
					}
					futs = futs[:0]
				}
			}
			if err := <-consumed; err != nil {
				b.Fatal(err)
			}
			b.StopTimer()
			cpu := processCPU(b, pid) - cpu0
			b.ReportMetric(float64(cpu.Microseconds())/float64(b.N*tc.samples), "server-µs/sample")
			b.ReportMetric(float64(len(tc.data))/float64(tc.samples), "bytes/sample")
		})
	}
}

// processCPU returns the user + system CPU time of process pid, from
// /proc/PID/stat (fields 14 and 15, in ticks of 1/100 s).
func processCPU(b *testing.B, pid int) time.Duration {
	data, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", pid))
	if err != nil {
		b.Skipf("no /proc: %v", err)
	}
	i := bytes.LastIndexByte(data, ')')
	fs := strings.Fields(string(data[i+1:]))
	if i < 0 || len(fs) < 13 {
		b.Fatal(errors.New("/proc/PID/stat without CPU times"))
	}
	ut, err1 := strconv.ParseInt(fs[11], 10, 64)
	st, err2 := strconv.ParseInt(fs[12], 10, 64)
	if err := errors.Join(err1, err2); err != nil {
		b.Fatal(err)
	}
	return time.Duration(ut+st) * 10 * time.Millisecond
}
