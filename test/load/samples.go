package main

import (
	"fmt"
	"math"
	"math/rand/v2"
	"time"

	"google.golang.org/protobuf/encoding/protowire"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/fleet"
)

// variants is how many operating points each unit cycles through. They
// lie on a closed loop, so that consecutive samples of a unit move a
// little, as telemetry at one sample a second does, and the loop closes
// without a jump.
const variants = 64

// Field numbers of PushRequest, Sample and Timestamp.
const (
	fReqSequence = 1
	fReqSamples  = 2

	fUnitID  = 1
	fTime    = 2
	fP       = 3
	fQ       = 4
	fV       = 5
	fField   = 6
	fFreq    = 7
	fCoolant = 8
	fQuality = 9

	fTSSeconds = 1
)

// encoded holds every unit's samples pre-encoded, except for the time:
// the unit_id fields, and for each variant the fields after the time
// (p_mw .. quality). Each is one slab in unit order, so that a round of
// a stream over its units reads memory in order.
type encoded struct {
	n     int
	ids   []byte
	idOff []int32 // unit u's id field is ids[idOff[u]:idOff[u+1]]
	slab  [variants][]byte
	off   [variants][]int32
}

func (e *encoded) id(u int) []byte { return e.ids[e.idOff[u]:e.idOff[u+1]] }

func (e *encoded) rest(v, u int) []byte { return e.slab[v][e.off[v][u]:e.off[v][u+1]] }

// point is one operating point of a unit, in engineering units.
type point struct {
	P, Q, V    float64
	Field      float64
	HasField   bool
	Freq       float64
	Coolant    float64
	HasCoolant bool
	Quality    pb.Quality
}

// unitPoints returns the operating points of unit i of the fleet: P
// within the prime mover's range, Q within ±30 % of rated MVA, V within
// ±3 % of rated kV, frequency within ±0.1 %; a measured field current
// on every other unit; a coolant value on the units with a table; one
// sample in 50 of QUESTIONABLE quality.
func unitPoints(i int, u *fleet.Unit, rng *rand.Rand) [variants]point {
	r, pm := u.Rating, u.PrimeMover
	span := pm.PMaxMW - pm.PMinMW
	// The centre of the loop and its half-widths, each a fraction of the
	// allowed band, chosen so that the loop stays inside it.
	p0 := pm.PMinMW + span*(0.15+0.7*rng.Float64())
	pA := span * 0.1 * rng.Float64()
	q0 := r.MVA * 0.3 * (2*rng.Float64() - 1) * 0.7
	qA := r.MVA * 0.3 * 0.25 * rng.Float64()
	v0 := r.KV * (1 + 0.03*(2*rng.Float64()-1)*0.6)
	vA := r.KV * 0.03 * 0.35 * rng.Float64()
	phase := 2 * math.Pi * rng.Float64()
	hasField := i%2 == 0
	var c0, cA float64
	if u.Coolant != nil {
		switch u.Coolant.Quantity {
		case fleet.HydrogenPressureKPa:
			hi := u.Coolant.Points[len(u.Coolant.Points)-1].At
			c0, cA = hi*(0.93+0.04*rng.Float64()), hi*0.02
		default: // a temperature, °C
			c0, cA = 10+20*rng.Float64(), 4
		}
	}
	var pts [variants]point
	for k := range pts {
		a := phase + 2*math.Pi*float64(k)/variants
		noise := func() float64 { return 0.002 * (2*rng.Float64() - 1) }
		pt := point{
			P:    p0 + pA*math.Sin(a) + span*noise(),
			Q:    q0 + qA*math.Cos(a) + r.MVA*noise(),
			V:    v0 + vA*math.Sin(2*a) + r.KV*noise()/4,
			Freq: r.FrequencyHz * (1 + 0.001*math.Sin(3*a)),
		}
		if hasField {
			// Between 55 % and 95 % of the rated field current.
			pt.Field = u.Field.RatedA * (0.75 + 0.2*math.Cos(a+0.3)) * (1 + noise())
			pt.HasField = true
		}
		if u.Coolant != nil {
			pt.Coolant, pt.HasCoolant = c0+cA*math.Sin(a/2), true
		}
		pt.Quality = pb.Quality_QUALITY_GOOD
		if (i+k)%50 == 0 {
			pt.Quality = pb.Quality_QUALITY_QUESTIONABLE
		}
		pts[k] = pt
	}
	return pts
}

// encodeUnits pre-encodes the samples of every unit of fl.
func encodeUnits(fl *fleet.Fleet, seed uint64) *encoded {
	rng := newRand(seed)
	n := len(fl.Units)
	e := &encoded{n: n, idOff: make([]int32, 1, n+1)}
	for v := range e.off {
		e.off[v] = make([]int32, 1, n+1)
	}
	for i, u := range fl.Units {
		e.ids = protowire.AppendString(protowire.AppendTag(e.ids, fUnitID, protowire.BytesType), u.ID)
		e.idOff = append(e.idOff, int32(len(e.ids)))
		pts := unitPoints(i, u, rng)
		for v := range pts {
			e.slab[v] = appendPoint(e.slab[v], &pts[v])
			e.off[v] = append(e.off[v], int32(len(e.slab[v])))
		}
	}
	return e
}

// newRand returns the generator of the operating points.
func newRand(seed uint64) *rand.Rand { return rand.New(rand.NewPCG(seed, 0x9e3779b97f4a7c15)) }

// appendPoint appends the fields p_mw .. quality of a Sample.
func appendPoint(b []byte, pt *point) []byte {
	d := func(b []byte, num protowire.Number, x float64) []byte {
		b = protowire.AppendTag(b, num, protowire.Fixed64Type)
		return protowire.AppendFixed64(b, math.Float64bits(x))
	}
	b = d(b, fP, pt.P)
	b = d(b, fQ, pt.Q)
	b = d(b, fV, pt.V)
	if pt.HasField {
		b = d(b, fField, pt.Field)
	}
	b = d(b, fFreq, pt.Freq)
	if pt.HasCoolant {
		b = d(b, fCoolant, pt.Coolant)
	}
	if pt.Quality != pb.Quality_QUALITY_UNSPECIFIED {
		b = protowire.AppendTag(b, fQuality, protowire.VarintType)
		b = protowire.AppendVarint(b, uint64(pt.Quality))
	}
	return b
}

// generator makes the batches of one stream. The stream owns a share of
// the units (no other stream sends them), and its k-th sample is of unit
// units[k mod n] at base + k/n seconds: every unit's timestamps increase
// by one second per round, across batches, phases and servers.
type generator struct {
	enc   *encoded
	units []int // the units of this stream
	base  int64 // Unix seconds of each unit's first sample
	k     uint64
}

// partition splits units 0..n-1 among c generators, round robin.
func partition(enc *encoded, c int, base int64) []*generator {
	gens := make([]*generator, c)
	for s := range gens {
		gens[s] = &generator{enc: enc, base: base}
	}
	for i := range enc.n {
		g := gens[i%c]
		g.units = append(g.units, i)
	}
	return gens
}

// appendBatch appends the encoding of the PushRequest with the given
// sequence number and the generator's next n samples, and advances the
// generator. It copies pre-encoded bytes and writes only the varints of
// the sequence, the sample lengths and the time.
func (g *generator) appendBatch(b []byte, seq uint64, n int) []byte {
	b = protowire.AppendTag(b, fReqSequence, protowire.VarintType)
	b = protowire.AppendVarint(b, seq)
	nu := uint64(len(g.units))
	for range n {
		idx, round := g.k%nu, g.k/nu
		g.k++
		u := g.units[idx]
		id, rest := g.enc.id(u), g.enc.rest(int(round%variants), u)
		secs := uint64(g.base) + round
		// Timestamp{seconds}: one tag byte and the varint.
		tsLen := 1 + protowire.SizeVarint(secs)
		// The time field: tag, length, timestamp.
		timeLen := 1 + protowire.SizeVarint(uint64(tsLen)) + tsLen
		sLen := len(id) + timeLen + len(rest)
		b = protowire.AppendTag(b, fReqSamples, protowire.BytesType)
		b = protowire.AppendVarint(b, uint64(sLen))
		b = append(b, id...)
		b = protowire.AppendTag(b, fTime, protowire.BytesType)
		b = protowire.AppendVarint(b, uint64(tsLen))
		b = protowire.AppendTag(b, fTSSeconds, protowire.VarintType)
		b = protowire.AppendVarint(b, secs)
		b = append(b, rest...)
	}
	return b
}

// loadAge is how far behind the wall clock the first sample of a run is
// stamped: within the service's 7-day horizon with an hour to spare, so
// that each server's generators have some 600,000 rounds (s) before they
// reach the present.
const loadAge = 7*24*time.Hour - time.Hour

// timeLeft says why the generators may not make another phase: their
// latest sample is within a minute of now, so the service would soon
// answer FUTURE_TIME, and the figures would measure rejections.
func timeLeft(gens []*generator, now time.Time) error {
	for _, g := range gens {
		if d := now.Sub(time.Unix(g.lastTime(), 0)); d < time.Minute {
			return fmt.Errorf("the synthetic time has caught up with the clock (latest sample %s behind it, %d rounds made): run fewer repeats, shorter phases or more units", d.Round(time.Second), g.k/uint64(max(len(g.units), 1)))
		}
	}
	return nil
}

// lastTime returns the Unix seconds of the latest sample made, or base.
func (g *generator) lastTime() int64 {
	if g.k == 0 {
		return g.base
	}
	return g.base + int64((g.k-1)/uint64(len(g.units)))
}
