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
	formatHeader   = "Genvelope-Format"
	formatSamples  = "samples/2" // a telemetry message: encodeSamples
	formatSamples1 = "samples/1" // read only: telemetry written before samples/2 (decodeSamples1)
	formatOp       = "op/1"      // an operator action: JSON of op
	idHeader       = "Genvelope-Id"

	// samplesVersion is the first byte of a samples/2 message.
	samplesVersion = 2
)

// Sample flags.
const (
	hasField = 1 << iota
	hasFreq
	hasCoolant
)

// maxSampleBytes bounds what encodeSamples writes for one sample beside
// its id: the id's entry in the table (its length, uvarint) and its index
// (uvarint), the time (varint), three values, flags, three optional
// values and quality.
const maxSampleBytes = 3*binary.MaxVarintLen64 + 3*8 + 1 + 3*8 + 1

// minSampleBytes is the least a sample of samples/2 takes: index, time
// delta, three values, flags, quality.
const minSampleBytes = 1 + 1 + 3*8 + 1 + 1

// sampleEncoder holds what encodeSamples reuses from one message to the
// next: the id table and each sample's index in it.
type sampleEncoder struct {
	index map[string]uint64
	ids   []string
	refs  []uint64
}

// encodeSamples appends the samples/2 form of smps[idx] to buf:
//
//	byte     version, 2
//	uvarint  number of distinct unit ids, then each: uvarint length, bytes
//	uvarint  number of samples, then each:
//	  uvarint  index of its unit id in the table
//	  varint   time in Unix ns minus the previous sample's (the first's
//	           minus 0), zigzag as encoding/binary's AppendVarint
//	  float64  P MW, Q Mvar, V kV: IEEE 754 bits, little endian
//	  byte     flags: 1 field current, 2 frequency, 4 coolant follow
//	  float64  the values the flags announce, in that order
//	  byte     quality (ingest.Quality)
//
// Ids are written once per message and times as differences, so a
// message of a batch (several samples of a unit, samples of one instant)
// stays near 40 bytes a sample beside the 24 of P, Q and V.
func (e *sampleEncoder) encodeSamples(buf []byte, smps []ingest.Sample, idx []int) []byte {
	return e.encode(buf, []samplesRef{{smps, idx}})
}

// samplesRef is the samples smps[idx], in that order; with idx nil,
// smps.
type samplesRef struct {
	smps []ingest.Sample
	idx  []int
}

// len returns the number of samples of r.
func (r *samplesRef) len() int {
	if r.idx == nil {
		return len(r.smps)
	}
	return len(r.idx)
}

// at returns sample j of r.
func (r *samplesRef) at(j int) *ingest.Sample {
	if r.idx == nil {
		return &r.smps[j]
	}
	return &r.smps[r.idx[j]]
}

// encode writes the samples of parts, one after the other, as one
// message (encodeSamples).
func (e *sampleEncoder) encode(buf []byte, parts []samplesRef) []byte {
	if e.index == nil {
		e.index = map[string]uint64{}
	}
	clear(e.index)
	e.ids, e.refs = e.ids[:0], e.refs[:0]
	n := 0
	for k := range parts {
		p := &parts[k]
		n += p.len()
		for j := range p.len() {
			id := p.at(j).UnitID
			r, ok := e.index[id]
			if !ok {
				r = uint64(len(e.ids))
				e.index[id] = r
				e.ids = append(e.ids, id)
			}
			e.refs = append(e.refs, r)
		}
	}
	buf = append(buf, samplesVersion)
	buf = binary.AppendUvarint(buf, uint64(len(e.ids)))
	for _, id := range e.ids {
		buf = binary.AppendUvarint(buf, uint64(len(id)))
		buf = append(buf, id...)
	}
	buf = binary.AppendUvarint(buf, uint64(n))
	var prev int64
	j := 0
	for k := range parts {
		p := &parts[k]
		for i := range p.len() {
			s := p.at(i)
			buf = binary.AppendUvarint(buf, e.refs[j])
			j++
			t := s.Time.UnixNano()
			buf = binary.AppendVarint(buf, t-prev)
			prev = t
			buf = appendValues(buf, s)
		}
	}
	return buf
}

// encodedBound bounds the encoded size of smps in a message.
func encodedBound(smps []ingest.Sample) int {
	n := 0
	for i := range smps {
		n += len(smps[i].UnitID) + maxSampleBytes
	}
	return n
}

// appendValues appends a sample's values, flags and quality, the same in
// samples/1 and samples/2.
func appendValues(buf []byte, s *ingest.Sample) []byte {
	f := func(x float64) { buf = binary.LittleEndian.AppendUint64(buf, math.Float64bits(x)) }
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
	return append(buf, byte(s.Quality))
}

var errShort = errors.New("message ends inside a sample")

// sampleDecoder holds what decoding reuses from one message to the next.
type sampleDecoder struct {
	out []ingest.Sample
	ids []string
	// refs is, for a samples/2 message, each sample's index in ids;
	// empty for samples/1.
	refs []uint32
	// intern turns an id's bytes into the string to use, so that known
	// ids do not allocate.
	intern func([]byte) string
}

// decode reads a telemetry message of the given format into d.out.
func (d *sampleDecoder) decode(format string, data []byte) ([]ingest.Sample, error) {
	var err error
	d.refs = d.refs[:0]
	switch format {
	case formatSamples:
		d.out, err = d.decodeSamples(data)
	case formatSamples1:
		d.out, err = decodeSamples1(data, d.out, d.intern)
	default:
		return d.out[:0], fmt.Errorf("%s %q is not %q", formatHeader, format, formatSamples)
	}
	return d.out, err
}

// decodeSamples reads what encodeSamples wrote, reusing d.out's storage.
func (d *sampleDecoder) decodeSamples(data []byte) ([]ingest.Sample, error) {
	out := d.out[:0]
	if len(data) == 0 {
		return out, errors.New("empty message")
	}
	if data[0] != samplesVersion {
		return out, fmt.Errorf("samples version %d, this genvelope reads %d", data[0], samplesVersion)
	}
	data = data[1:]
	n, k := binary.Uvarint(data)
	if k <= 0 || n > uint64(len(data)) {
		return out, errors.New("bad unit id count")
	}
	data = data[k:]
	d.ids = d.ids[:0]
	for range n {
		l, k := binary.Uvarint(data)
		if k <= 0 || l > uint64(len(data)-k) {
			return out, errors.New("message ends inside the unit id table")
		}
		d.ids = append(d.ids, d.intern(data[k:k+int(l)]))
		data = data[k+int(l):]
	}
	n, k = binary.Uvarint(data)
	if k <= 0 || n > uint64(len(data))/minSampleBytes {
		return out, errors.New("bad sample count")
	}
	data = data[k:]
	var t int64
	for range n {
		r, k := binary.Uvarint(data)
		if k <= 0 {
			return out, errShort
		}
		if r >= uint64(len(d.ids)) {
			return out, fmt.Errorf("unit id index %d outside the table of %d", r, len(d.ids))
		}
		data = data[k:]
		dt, k := binary.Varint(data)
		if k <= 0 {
			return out, errShort
		}
		data = data[k:]
		t += dt
		d.refs = append(d.refs, uint32(r))
		var s ingest.Sample
		s.UnitID, s.Time = d.ids[r], time.Unix(0, t)
		var err error
		if data, err = readValues(data, &s); err != nil {
			return out, err
		}
		out = append(out, s)
	}
	if len(data) != 0 {
		return out, fmt.Errorf("%d bytes after the last sample", len(data))
	}
	return out, nil
}

// readValues reads what appendValues wrote into s and returns the rest.
func readValues(data []byte, s *ingest.Sample) ([]byte, error) {
	if len(data) < 3*8+2 {
		return data, errShort
	}
	f := func() float64 {
		x := math.Float64frombits(binary.LittleEndian.Uint64(data))
		data = data[8:]
		return x
	}
	s.PMW, s.QMvar, s.VKV = f(), f(), f()
	flags := data[0]
	data = data[1:]
	if flags&^(hasField|hasFreq|hasCoolant) != 0 {
		return data, fmt.Errorf("unknown sample flags %#x", flags)
	}
	need := 1
	for _, b := range [...]byte{hasField, hasFreq, hasCoolant} {
		if flags&b != 0 {
			need += 8
		}
	}
	if len(data) < need {
		return data, errShort
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
	return data[1:], nil
}

// encodeSamples1 appends the samples/1 form of smps[idx] to buf: a
// uvarint count, then per sample a uvarint id length, the id, the time
// (Unix ns, int64 little endian) and appendValues. genvelope writes
// samples/2; this stays to test the reading of older logs.
func encodeSamples1(buf []byte, smps []ingest.Sample, idx []int) []byte {
	buf = binary.AppendUvarint(buf, uint64(len(idx)))
	for _, i := range idx {
		s := &smps[i]
		buf = binary.AppendUvarint(buf, uint64(len(s.UnitID)))
		buf = append(buf, s.UnitID...)
		buf = binary.LittleEndian.AppendUint64(buf, uint64(s.Time.UnixNano()))
		buf = appendValues(buf, s)
	}
	return buf
}

// decodeSamples1 reads what encodeSamples1 wrote into out (reusing its
// storage).
func decodeSamples1(data []byte, out []ingest.Sample, intern func([]byte) string) ([]ingest.Sample, error) {
	n, k := binary.Uvarint(data)
	if k <= 0 || n > uint64(len(data)) {
		return out, errors.New("bad sample count")
	}
	data = data[k:]
	out = out[:0]
	for i := uint64(0); i < n; i++ {
		l, k := binary.Uvarint(data)
		if k <= 0 || l > uint64(len(data)) || uint64(len(data)-k) < l+8*4+2 {
			return out, errShort
		}
		var s ingest.Sample
		s.UnitID = intern(data[k : k+int(l)])
		data = data[k+int(l):]
		s.Time = time.Unix(0, int64(binary.LittleEndian.Uint64(data)))
		var err error
		if data, err = readValues(data[8:], &s); err != nil {
			return out, err
		}
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
