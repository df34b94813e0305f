package rpc

import (
	"encoding/binary"
	"math"

	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

// decodePush decodes a PushRequest from b into req, reusing what req
// held from the batch before: the samples, and within each its time and
// optional values (the generated decoder allocates both for every
// sample) and its unit id when the bytes are the same id (a sender
// going round its units in the same order). It decodes only what the
// schema of this release names, in the wire types protobuf gives them,
// and reports false for anything else, unknown fields included, and for
// any malformed input, with req then in an unspecified state: the
// caller decodes such a message again with the generated decoder, whose
// answer (unknown fields kept, the error) is the one that counts.
// TestDecodePushAgreesWithGenerated and FuzzDecodePush hold the two to
// the same result for every input this one takes.
func decodePush(b []byte, req *pb.PushRequest, ids *StreamIDs) bool {
	samples := req.Samples[:cap(req.Samples)]
	n := 0
	var seq uint64
	for i := 0; i < len(b); {
		tag, j, ok := varint(b, i)
		if !ok {
			return false
		}
		i = j
		switch tag {
		case 1 << 3: // sequence (field 1, varint)
			if seq, i, ok = varint(b, i); !ok {
				return false
			}
		case 2<<3 | 2: // samples
			var m []byte
			if m, i, ok = field(b, i); !ok {
				return false
			}
			if n == len(samples) {
				samples = append(samples, nil)
				samples = samples[:cap(samples)]
			}
			if samples[n] == nil {
				samples[n] = new(pb.Sample)
			}
			if !decodeSample(m, samples[n], ids) {
				return false
			}
			n++
		default:
			return false
		}
	}
	req.Reset()
	req.Sequence, req.Samples = seq, samples[:n]
	return true
}

// decodeSample decodes a Sample from b into s, reusing s's time and
// optional values and, when the bytes match, its unit id, or else the
// copy in ids (nil: none).
func decodeSample(b []byte, s *pb.Sample, ids *StreamIDs) bool {
	id, t, fieldA, freq, coolant := s.UnitId, s.Time, s.FieldA, s.FrequencyHz, s.Coolant
	s.Reset()
	timeSeen := false
	for i := 0; i < len(b); {
		// Every tag of a sample is one byte: read here, the loop only for others.
		tag, ok := uint64(b[i]), true
		if tag < 0x80 {
			i++
		} else if tag, i, ok = varint(b, i); !ok {
			return false
		}
		switch tag {
		case 1<<3 | 2: // unit_id
			var v []byte
			if v, i, ok = field(b, i); !ok {
				return false
			}
			switch {
			case string(v) == id: // compared without a copy
				s.UnitId = id
			case ids != nil:
				s.UnitId = ids.intern(v)
			default:
				s.UnitId = string(v)
			}
		case 2<<3 | 2: // time, merged with an earlier one in the same sample, as protobuf does
			var v []byte
			if v, i, ok = field(b, i); !ok {
				return false
			}
			if !timeSeen {
				if t == nil {
					t = new(timestamppb.Timestamp)
				} else {
					t.Reset()
				}
				s.Time, timeSeen = t, true
			}
			if !decodeTimestamp(v, s.Time) {
				return false
			}
		case 3<<3 | 1, 4<<3 | 1, 5<<3 | 1, 6<<3 | 1, 7<<3 | 1, 8<<3 | 1: // the doubles
			if i+8 > len(b) {
				return false
			}
			x := math.Float64frombits(binary.LittleEndian.Uint64(b[i:]))
			i += 8
			switch tag >> 3 {
			case 3:
				s.PMw = x
			case 4:
				s.QMvar = x
			case 5:
				s.VKv = x
			case 6:
				s.FieldA = reuse(&fieldA, x)
			case 7:
				s.FrequencyHz = reuse(&freq, x)
			case 8:
				s.Coolant = reuse(&coolant, x)
			}
		case 9 << 3: // quality (field 9, varint): the low 32 bits of the varint, as the generated decoder keeps
			var v uint64
			if v, i, ok = varint(b, i); !ok {
				return false
			}
			s.Quality = pb.Quality(int32(v))
		default:
			return false
		}
	}
	return true
}

// StreamBatch is what a telemetry stream receives a batch into (its
// RecvMsg): the request, decoded into again batch after batch, and IDs,
// the unit ids the stream has sent, which the service's Codec takes a
// sample's id from instead of making a new string each time. It is the
// request as a protobuf message (the embedded pointer's methods), so
// that any other codec decodes into the request as before.
type StreamBatch struct {
	*pb.PushRequest
	IDs *StreamIDs
}

// StreamIDs are the unit ids one stream has sent, in the order first
// seen, for the goroutine that receives the stream's batches. Like
// ingest.Resolver (whose comparisons then find the same strings) it
// follows a sender going round its units with a cursor: one comparison
// with the id expected next; out of that order a map of its own ids
// answers. It keeps at most max ids (the fleet's size when the stream
// began): ids beyond are new strings every time.
type StreamIDs struct {
	ids  []string
	pos  map[string]int32
	next int
	max  int
}

// NewStreamIDs returns the ids of a new stream, keeping at most max.
func NewStreamIDs(max int) *StreamIDs { return &StreamIDs{max: max} }

// intern returns the stream's copy of the id b, made now if it has none.
func (s *StreamIDs) intern(b []byte) string {
	if s.next == len(s.ids) {
		s.next = 0 // round again
	}
	if s.next < len(s.ids) && s.ids[s.next] == string(b) {
		s.next++
		return s.ids[s.next-1]
	}
	if i, ok := s.pos[string(b)]; ok {
		s.next = int(i) + 1
		return s.ids[i]
	}
	id := string(b)
	if len(s.ids) < s.max {
		if s.pos == nil {
			s.pos = map[string]int32{}
		}
		s.pos[id] = int32(len(s.ids))
		s.ids = append(s.ids, id)
		s.next = len(s.ids)
	}
	return id
}

// reuse stores x in *p, allocating it first when the sample had none.
func reuse(p **float64, x float64) *float64 {
	if *p == nil {
		*p = new(float64)
	}
	**p = x
	return *p
}

// decodeTimestamp merges a Timestamp from b into t.
func decodeTimestamp(b []byte, t *timestamppb.Timestamp) bool {
	for i := 0; i < len(b); {
		tag, j, ok := varint(b, i)
		if !ok {
			return false
		}
		var v uint64
		if v, i, ok = varint(b, j); !ok {
			return false
		}
		switch tag { // fields 1 and 2, varints
		case 1 << 3:
			t.Seconds = int64(v)
		case 2 << 3:
			t.Nanos = int32(v)
		default:
			return false
		}
	}
	return true
}

// varint reads a base-128 varint at b[i:] as the generated decoder does
// (at most ten bytes, the bits past 64 dropped), and returns it with the
// index after it; false when b ends first or the tenth byte goes on.
func varint(b []byte, i int) (uint64, int, bool) {
	var x uint64
	for shift := uint(0); shift < 64; shift += 7 {
		if i >= len(b) {
			return 0, i, false
		}
		c := b[i]
		i++
		x |= uint64(c&0x7F) << shift
		if c < 0x80 {
			return x, i, true
		}
	}
	return 0, i, false
}

// field reads a length-delimited field's bytes at b[i:].
func field(b []byte, i int) ([]byte, int, bool) {
	var n uint64
	ok := i < len(b)
	if ok && b[i] < 0x80 { // a length under 128: a sample's, its id's, its time's
		n, i = uint64(b[i]), i+1
	} else if n, i, ok = varint(b, i); !ok {
		return nil, i, false
	}
	if n > uint64(len(b)-i) {
		return nil, i, false
	}
	end := i + int(n)
	return b[i:end], end, true
}
