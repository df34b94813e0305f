package durable

import (
	"bytes"
	"encoding/binary"
	"fmt"
	"hash/fnv"
	"math"
	"reflect"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/ingest"
)

// TestPartition checks the mapping against the standard library's
// FNV-1a (hash/fnv), the definition the README gives to SCADA gateways.
func TestPartition(t *testing.T) {
	for _, tc := range []struct {
		id string
		n  int
	}{
		{"harrowmere-1", 8}, {"larchwater-2", 8}, {"brindle-gt3", 8}, {"", 8}, {"unit-07", 3}, {"x", 1},
	} {
		h := fnv.New32a()
		h.Write([]byte(tc.id))
		if got, want := Partition(tc.id, tc.n), int(h.Sum32()%uint32(tc.n)); got != want {
			t.Errorf("Partition(%q, %d) = %d, FNV-1a gives %d", tc.id, tc.n, got, want)
		}
	}
}

// TestSampleDigest checks the ledger's identity hash against hash/fnv.
func TestSampleDigest(t *testing.T) {
	h := fnv.New64a()
	h.Write([]byte("unit-01"))
	ns := int64(1_780_000_000_123_456_789)
	h.Write([]byte{byte(ns), byte(ns >> 8), byte(ns >> 16), byte(ns >> 24), byte(ns >> 32), byte(ns >> 40), byte(ns >> 48), byte(ns >> 56)})
	if got := SampleDigest("unit-01", ns); got != h.Sum64() {
		t.Errorf("SampleDigest = %#x, FNV-1a 64 gives %#x", got, h.Sum64())
	}
}

func TestParsePartitions(t *testing.T) {
	for _, tc := range []struct {
		in      string
		want    string // formatted back
		wantErr string
	}{
		{"", "0-7", ""},
		{"all", "0-7", ""},
		{"0-3", "0-3", ""},
		{"1,4-5, 7", "1,4-5,7", ""},
		{"3-3", "3", ""},
		{"0-8", "", "outside 0-7"},
		{"5-2", "", "outside 0-7"},
		{"a", "", "not a partition number"},
		{"1-", "", "not a partition number"},
		{"-1", "", "not a partition number"},
	} {
		got, err := ParsePartitions(tc.in, 8)
		switch {
		case tc.wantErr != "":
			if err == nil || !strings.Contains(err.Error(), tc.wantErr) {
				t.Errorf("ParsePartitions(%q): %v, want an error with %q", tc.in, err, tc.wantErr)
			}
		case err != nil:
			t.Errorf("ParsePartitions(%q): %v", tc.in, err)
		case formatPartitions(got) != tc.want:
			t.Errorf("ParsePartitions(%q) = %s, want %s", tc.in, formatPartitions(got), tc.want)
		}
	}
}

func roundTripSamples() []ingest.Sample {
	at := time.Unix(0, 1_780_000_000_123_456_789)
	return []ingest.Sample{
		{UnitID: "a", Time: at, PMW: 1.5, QMvar: -2.25, VKV: 11},
		{UnitID: "unit-with-a-longer-name", Time: at.Add(time.Second), PMW: math.SmallestNonzeroFloat64, QMvar: math.MaxFloat64, VKV: 20,
			FieldA: 1234.5, HasFieldA: true, FrequencyHz: 49.98, HasFreq: true, Coolant: 310, HasCoolant: true, Quality: ingest.QualityQuestionable},
		{UnitID: "b", Time: at.Add(2 * time.Second), VKV: 1, FrequencyHz: 60, HasFreq: true},
		// The same unit again, earlier (a time difference below zero), and
		// a sample without a time (the zero time, before 1970).
		{UnitID: "a", Time: at.Add(-time.Hour), PMW: math.Inf(-1), QMvar: math.Copysign(0, -1), VKV: 11, Quality: ingest.QualityInvalid},
		{UnitID: "", PMW: 1},
	}
}

func testDecoder() *sampleDecoder {
	return &sampleDecoder{intern: func(b []byte) string { return string(b) }}
}

// TestSamplesRoundTrip: what either format writes reads back bit for bit
// (NaN aside, every float64 compares equal only to itself).
func TestSamplesRoundTrip(t *testing.T) {
	in := roundTripSamples()
	idx := []int{0, 1, 2, 3, 4}
	for _, tc := range []struct {
		format string
		data   []byte
	}{
		{formatSamples, new(sampleEncoder).encodeSamples(nil, in, idx)},
		{formatSamples1, encodeSamples1(nil, in, idx)},
	} {
		out, err := testDecoder().decode(tc.format, tc.data)
		if err != nil {
			t.Fatalf("%s: %v", tc.format, err)
		}
		if len(out) != len(in) {
			t.Fatalf("%s: %d samples, want %d", tc.format, len(out), len(in))
		}
		for i := range in {
			if !in[i].Time.Equal(out[i].Time) && !(in[i].Time.IsZero() && out[i].Time.UnixNano() == in[i].Time.UnixNano()) {
				t.Errorf("%s %d: time %v, want %v", tc.format, i, out[i].Time, in[i].Time)
			}
			if math.Float64bits(out[i].QMvar) != math.Float64bits(in[i].QMvar) {
				t.Errorf("%s %d: Q bits %#x, want %#x", tc.format, i, math.Float64bits(out[i].QMvar), math.Float64bits(in[i].QMvar))
			}
			out[i].Time = in[i].Time
		}
		if !reflect.DeepEqual(in, out) {
			t.Errorf("%s round trip:\n got %+v\nwant %+v", tc.format, out, in)
		}
	}
}

// TestSamplesEncoderReuse: an encoder used for one message writes the
// next one as a fresh encoder would (the id table starts anew).
func TestSamplesEncoderReuse(t *testing.T) {
	in := roundTripSamples()
	var e sampleEncoder
	e.encodeSamples(nil, in, []int{1, 2, 3})
	if got, want := e.encodeSamples(nil, in, []int{0, 2}), new(sampleEncoder).encodeSamples(nil, in, []int{0, 2}); !bytes.Equal(got, want) {
		t.Errorf("reused encoder wrote %x, a fresh one %x", got, want)
	}
}

// TestSamplesBadInput: a damaged, foreign or newer message is an error
// naming what is wrong, never a panic and never samples.
func TestSamplesBadInput(t *testing.T) {
	in := roundTripSamples()
	good := new(sampleEncoder).encodeSamples(nil, in, []int{0, 1, 2})
	one := new(sampleEncoder).encodeSamples(nil, in, []int{0}) // version, 1 id "a", 1 sample
	withByte := func(b []byte, i int, v byte) []byte {
		c := bytes.Clone(b)
		c[i] = v
		return c
	}
	// one: [2, 1, 1, 'a', 1, 0 (index), time varint ..., P, Q, V, flags, quality]
	timeLen := len(binary.AppendVarint(nil, in[0].Time.UnixNano()))
	flagsAt := 6 + timeLen + 24
	for _, tc := range []struct {
		name, format string
		data         []byte
		wantErr      string
	}{
		{"empty", formatSamples, nil, "empty message"},
		{"version 1 byte under the samples/2 header", formatSamples, withByte(good, 0, 1), "samples version 1"},
		{"a newer version", formatSamples, withByte(good, 0, 3), "samples version 3, this genvelope reads 2"},
		{"an unknown format header", "samples/3", good, `"samples/3" is not "samples/2"`},
		{"no format header", "", good, `"" is not "samples/2"`},
		{"id table larger than the message", formatSamples, []byte{2, 0xff, 0xff, 0xff, 0x0f}, "bad unit id count"},
		{"id length past the end", formatSamples, []byte{2, 1, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0x01, 'a'}, "inside the unit id table"},
		{"more samples than bytes", formatSamples, []byte{2, 1, 1, 'a', 100, 0}, "bad sample count"},
		{"unit index outside the table", formatSamples, withByte(one, 5, 1), "unit id index 1 outside the table of 1"},
		{"unknown flags", formatSamples, withByte(one, flagsAt, 0x80), "unknown sample flags 0x80"},
		{"a byte after the last sample", formatSamples, append(bytes.Clone(good), 0), "1 bytes after the last sample"},
		{"samples/1: an id length of 2^64-1", formatSamples1, []byte{1, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0x01, 'a'}, "ends inside a sample"},
		{"samples/1: a byte after the last sample", formatSamples1, append(encodeSamples1(nil, in, []int{0}), 0), "1 bytes after the last sample"},
	} {
		out, err := testDecoder().decode(tc.format, tc.data)
		if err == nil || !strings.Contains(err.Error(), tc.wantErr) {
			t.Errorf("%s: %v, want an error with %q", tc.name, err, tc.wantErr)
		}
		_ = out
	}
	// Every truncation of either format is an error.
	for format, data := range map[string][]byte{formatSamples: good, formatSamples1: encodeSamples1(nil, in, []int{0, 1, 2})} {
		for n := 0; n < len(data); n++ {
			if _, err := testDecoder().decode(format, data[:n]); err == nil {
				t.Errorf("%s: a message cut at %d of %d bytes decoded", format, n, len(data))
			}
		}
	}
}

// TestSamplesSize: samples/2 is smaller than samples/1 for a batch's
// partition message (ids repeat, times of one instant), so the stream
// stores fewer bytes.
func TestSamplesSize(t *testing.T) {
	at := time.Unix(1_780_000_000, 0)
	var smps []ingest.Sample
	var idx []int
	for round := range 2 {
		for u := range 30 {
			smps = append(smps, ingest.Sample{UnitID: fmt.Sprintf("syn-%05d", u), Time: at.Add(time.Duration(round) * time.Second),
				PMW: 100.125, QMvar: 20.5, VKV: 20.1, FrequencyHz: 50.01, HasFreq: true})
			idx = append(idx, len(idx))
		}
	}
	v1, v2 := len(encodeSamples1(nil, smps, idx)), len(new(sampleEncoder).encodeSamples(nil, smps, idx))
	// samples/1: a count byte, then per sample 1+9 id, 8 time, and the
	// values 24+1+8+1 = 34. samples/2: version, id count, 30 ids of 1+9,
	// sample count; per sample a 1-byte index and the same 34; times 9
	// bytes for the first (zigzag of 1.78e18 ns takes 63 bits), 5 for
	// the step of 1 s (zigzag 2e9, 31 bits) and 1 for each of the 58 zero
	// steps.
	want1, want2 := 1+60*(10+8+34), 1+1+30*10+1+60*(1+34)+9+5+58
	if v1 != want1 || v2 != want2 {
		t.Errorf("60 samples of 30 units: samples/1 %d bytes (want %d), samples/2 %d (want %d)", v1, want1, v2, want2)
	}
	t.Logf("60 samples of 30 units: samples/1 %.1f bytes a sample, samples/2 %.1f", float64(v1)/60, float64(v2)/60)
}

func TestDecodeOp(t *testing.T) {
	for _, tc := range []struct {
		in string
		ok bool
	}{
		{`{"op":"acknowledge","unit":"a","alarm":"field","at_unix_ns":1}`, true},
		{`{"op":"reload","at_unix_ns":1}`, true},
		{`{"op":"reset","unit":"a","winding":"field","by":"desk","reason":"sensor","at_unix_ns":1}`, true},
		{`{"op":"discard","unit":"a","sample_unix_ns":5,"by":"desk","at_unix_ns":1}`, true},
		{`{"op":"sweep","at_unix_ns":1000000000}`, true},
		{`{"op":"explode"}`, false},
		{`not json`, false},
	} {
		if _, err := decodeOp([]byte(tc.in)); (err == nil) != tc.ok {
			t.Errorf("decodeOp(%s): %v", tc.in, err)
		}
	}
}

func TestServerAtLeast(t *testing.T) {
	for _, tc := range []struct {
		v    string
		want bool
	}{
		{"2.9.10", false}, {"2.10.0", true}, {"v2.11.3", true}, {"3.0.0", true}, {"", false}, {"x.y", false},
	} {
		if got := serverAtLeast(tc.v, 2, 10); got != tc.want {
			t.Errorf("serverAtLeast(%q) = %v", tc.v, got)
		}
	}
}

func TestChunkSamples(t *testing.T) {
	smps := make([]ingest.Sample, 10)
	for i := range smps {
		smps[i].UnitID = "u" // each counts 1 + maxSampleBytes
	}
	per := 1 + maxSampleBytes
	for _, tc := range []struct {
		limit int
		want  []int // chunk lengths
	}{
		{10 * per, []int{10}},
		{4 * per, []int{4, 4, 2}},
		{per, []int{1, 1, 1, 1, 1, 1, 1, 1, 1, 1}},
		{1, []int{1, 1, 1, 1, 1, 1, 1, 1, 1, 1}}, // a sample larger than the limit goes alone
	} {
		var got []int
		n := 0
		for _, c := range chunkSamples(smps, tc.limit) {
			got = append(got, c)
			if data := new(sampleEncoder).encode(nil, []samplesRef{{smps: smps[n : n+c]}}); c > 1 && len(data) > tc.limit {
				t.Errorf("limit %d: a chunk of %d encodes to %d bytes", tc.limit, c, len(data))
			}
			n += c
		}
		if !reflect.DeepEqual(got, tc.want) || n != len(smps) {
			t.Errorf("limit %d: chunks %v, want %v", tc.limit, got, tc.want)
		}
	}
	if chunkSamples(nil, 100) != nil {
		t.Error("no samples, yet chunks")
	}
}

// TestLedgerAdd: a ledger's count and digest, with the id hashed once,
// are those of SampleDigest summed (mod 2^64) over the samples, also for
// a ledger restored from a checkpoint (not yet hashed).
func TestLedgerAdd(t *testing.T) {
	times := []int64{0, 1, -1, 1_780_000_000_000_000_000, 1_780_000_001_000_000_000, -6_000_000_000_000_000_000}
	for _, id := range []string{"unit-01", "", "syn-00042", "ünit"} {
		var want Ledger
		var lg Ledger
		restored := Ledger{Count: 2, Digest: SampleDigest(id, 5) + SampleDigest(id, 6)}
		wantRestored := restored
		for _, ns := range times {
			want.Count++
			want.Digest += SampleDigest(id, ns)
			wantRestored.Count++
			wantRestored.Digest += SampleDigest(id, ns)
			lg.add(id, ns)
			restored.add(id, ns)
		}
		if lg.Count != want.Count || lg.Digest != want.Digest {
			t.Errorf("%q: ledger %d, %#x; SampleDigest summed gives %d, %#x", id, lg.Count, lg.Digest, want.Count, want.Digest)
		}
		if restored.Count != wantRestored.Count || restored.Digest != wantRestored.Digest {
			t.Errorf("%q restored: ledger %d, %#x; want %d, %#x", id, restored.Count, restored.Digest, wantRestored.Count, wantRestored.Digest)
		}
	}
}
