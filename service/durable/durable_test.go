package durable

import (
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

func TestSamplesRoundTrip(t *testing.T) {
	at := time.Unix(0, 1_780_000_000_123_456_789)
	in := []ingest.Sample{
		{UnitID: "a", Time: at, PMW: 1.5, QMvar: -2.25, VKV: 11},
		{UnitID: "unit-with-a-longer-name", Time: at.Add(time.Second), PMW: math.SmallestNonzeroFloat64, QMvar: math.MaxFloat64, VKV: 20,
			FieldA: 1234.5, HasFieldA: true, FrequencyHz: 49.98, HasFreq: true, Coolant: 310, HasCoolant: true, Quality: ingest.QualityQuestionable},
		{UnitID: "b", Time: at.Add(2 * time.Second), VKV: 1, FrequencyHz: 60, HasFreq: true},
	}
	data := encodeSamples(nil, in, []int{0, 1, 2})
	out, err := decodeSamples(data, nil, func(b []byte) string { return string(b) })
	if err != nil {
		t.Fatal(err)
	}
	for i := range in {
		if !in[i].Time.Equal(out[i].Time) {
			t.Errorf("%d: time %v, want %v", i, out[i].Time, in[i].Time)
		}
		out[i].Time = in[i].Time
	}
	if !reflect.DeepEqual(in, out) {
		t.Errorf("round trip:\n got %+v\nwant %+v", out, in)
	}
	// Every truncation is an error, never a panic.
	for n := 0; n < len(data); n++ {
		if _, err := decodeSamples(data[:n], nil, func(b []byte) string { return string(b) }); err == nil {
			t.Errorf("a message cut at %d of %d bytes decoded", n, len(data))
		}
	}
	huge := []byte{1, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0x01, 'a'}
	if _, err := decodeSamples(huge, nil, func(b []byte) string { return string(b) }); err == nil {
		t.Error("an id length of 2^64-1 decoded")
	}
	if _, err := decodeSamples(append(data, 0), nil, func(b []byte) string { return string(b) }); err == nil {
		t.Error("a message with a byte after the last sample decoded")
	}
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
	all := []int{0, 1, 2, 3, 4, 5, 6, 7, 8, 9}
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
		for _, c := range chunkSamples(smps, all, tc.limit) {
			got = append(got, len(c))
			n += len(c)
			if data := encodeSamples(nil, smps, c); len(c) > 1 && len(data) > tc.limit {
				t.Errorf("limit %d: a chunk of %d encodes to %d bytes", tc.limit, len(c), len(data))
			}
		}
		if !reflect.DeepEqual(got, tc.want) || n != len(all) {
			t.Errorf("limit %d: chunks %v, want %v", tc.limit, got, tc.want)
		}
	}
	if chunkSamples(smps, nil, 100) != nil {
		t.Error("no samples, yet chunks")
	}
}
