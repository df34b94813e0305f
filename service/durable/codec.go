package durable

import (
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"time"

	"github.com/genvelope/genvelope/service/ingest"
)

// The message layout. Every message of the stream carries the header
// formatHeader; a message without it, or with a value this version does
// not know, is foreign: logged, counted and skipped.
const (
	formatHeader  = "Genvelope-Format"
	formatSamples = "samples/1" // a telemetry message: encodeSamples
	formatOp      = "op/1"      // an operator action: JSON of op
	idHeader      = "Genvelope-Id"
)

// Sample flags.
const (
	hasField = 1 << iota
	hasFreq
	hasCoolant
)

// maxSampleBytes bounds what encodeSamples writes for one sample beside
// its id: the id's length (uvarint), time, three values, flags, three
// optional values and quality.
const maxSampleBytes = binary.MaxVarintLen64 + 8 + 3*8 + 1 + 3*8 + 1

// encodeSamples appends the binary form of smps to buf: a uvarint count,
// then per sample a uvarint id length, the id, the time (Unix ns, int64
// little endian), P, Q, V (float64 bits, little endian), a flag byte,
// the optional values it flags, and the quality byte.
func encodeSamples(buf []byte, smps []ingest.Sample, idx []int) []byte {
	buf = binary.AppendUvarint(buf, uint64(len(idx)))
	f := func(x float64) { buf = binary.LittleEndian.AppendUint64(buf, math.Float64bits(x)) }
	for _, i := range idx {
		s := &smps[i]
		buf = binary.AppendUvarint(buf, uint64(len(s.UnitID)))
		buf = append(buf, s.UnitID...)
		buf = binary.LittleEndian.AppendUint64(buf, uint64(s.Time.UnixNano()))
		f(s.PMW)
		f(s.QMvar)
		f(s.VKV)
		var flags byte
		if s.HasFieldA {
			flags |= hasField
		}
		if s.HasFreq {
			flags |= hasFreq
		}
		if s.HasCoolant {
			flags |= hasCoolant
		}
		buf = append(buf, flags)
		if s.HasFieldA {
			f(s.FieldA)
		}
		if s.HasFreq {
			f(s.FrequencyHz)
		}
		if s.HasCoolant {
			f(s.Coolant)
		}
		buf = append(buf, byte(s.Quality))
	}
	return buf
}

var errShort = errors.New("message ends inside a sample")

// decodeSamples reads what encodeSamples wrote into out (reusing its
// storage). intern turns an id's bytes into the string to use, so that
// known ids do not allocate.
func decodeSamples(data []byte, out []ingest.Sample, intern func([]byte) string) ([]ingest.Sample, error) {
	n, k := binary.Uvarint(data)
	if k <= 0 || n > uint64(len(data)) {
		return out, errors.New("bad sample count")
	}
	data = data[k:]
	out = out[:0]
	f := func() float64 {
		x := math.Float64frombits(binary.LittleEndian.Uint64(data))
		data = data[8:]
		return x
	}
	for i := uint64(0); i < n; i++ {
		l, k := binary.Uvarint(data)
		if k <= 0 || l > uint64(len(data)) || uint64(len(data)-k) < l+8*4+2 {
			return out, errShort
		}
		var s ingest.Sample
		s.UnitID = intern(data[k : k+int(l)])
		data = data[k+int(l):]
		s.Time = time.Unix(0, int64(binary.LittleEndian.Uint64(data)))
		data = data[8:]
		s.PMW, s.QMvar, s.VKV = f(), f(), f()
		flags := data[0]
		data = data[1:]
		if flags&^(hasField|hasFreq|hasCoolant) != 0 {
			return out, fmt.Errorf("unknown sample flags %#x", flags)
		}
		need := 1
		for _, b := range [...]byte{hasField, hasFreq, hasCoolant} {
			if flags&b != 0 {
				need += 8
			}
		}
		if len(data) < need {
			return out, errShort
		}
		if flags&hasField != 0 {
			s.FieldA, s.HasFieldA = f(), true
		}
		if flags&hasFreq != 0 {
			s.FrequencyHz, s.HasFreq = f(), true
		}
		if flags&hasCoolant != 0 {
			s.Coolant, s.HasCoolant = f(), true
		}
		s.Quality = ingest.Quality(data[0])
		data = data[1:]
		out = append(out, s)
	}
	if len(data) != 0 {
		return out, fmt.Errorf("%d bytes after the last sample", len(data))
	}
	return out, nil
}

// op is an operator action in the log, or the wall-clock supervision
// ("sweep", Store.Sweep at AtUnixNS), which goes through the log so that
// every replica runs it at the same place among the samples.
type op struct {
	Op           string `json:"op"` // "acknowledge", "shelve", "reset", "discard", "reload" or "sweep"
	Unit         string `json:"unit,omitempty"`
	Alarm        string `json:"alarm,omitempty"`
	By           string `json:"by,omitempty"`
	AtUnixNS     int64  `json:"at_unix_ns"`
	UntilUnixNS  int64  `json:"until_unix_ns,omitempty"`  // shelve: 0 lifts the shelf
	Winding      string `json:"winding,omitempty"`        // reset: armature, field, or "" for both
	SampleUnixNS int64  `json:"sample_unix_ns,omitempty"` // discard: the sample's time
	Reason       string `json:"reason,omitempty"`         // reset, discard
}

func decodeOp(data []byte) (op, error) {
	var o op
	if err := json.Unmarshal(data, &o); err != nil {
		return o, err
	}
	switch o.Op {
	case "acknowledge", "shelve", "reset", "discard", "reload", "sweep":
		return o, nil
	}
	return o, fmt.Errorf("unknown operator action %q", o.Op)
}
