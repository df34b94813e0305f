package ingest

import (
	"bufio"
	"crypto/sha256"
	"encoding/binary"
	"errors"
	"fmt"
	"hash"
	"io"
	"math"
	"slices"
	"time"

	"github.com/genvelope/genvelope/service/alarm"
)

// The binary state format (version 3). JSON (versions 1 and 2) spent
// about 6 KiB a unit on the 256 timestamps of the duplicate window and
// had to be built whole in memory to be checksummed; this one is written
// as a stream, unit by unit, at about 350 bytes a unit:
//
//	file    = magic version:uvarint written:varint record* 0x00 sha256[32]
//	record  = length:uvarint body[length]          (length > 0)
//	body    = id:string flags:byte (1 latest, 2 suspect, 4 stale)
//	          armature_heating_s:f64 field_heating_s:f64
//	          armature_current_pu:f64 field_current_pu:f64
//	          thermal_unix_ns:varint oel_used:f64 scl_used:f64
//	          times latest? heat alarms
//	times   = n:uvarint [t0:varint [d1:varint (dd:varint){n-2}]]
//	latest  = time:varint received:varint p:f64 q:f64 v:f64
//	          has:byte field_a:f64 frequency_hz:f64 coolant:f64 quality:byte
//	heat    = n:uvarint (time:varint armature_s:f64 field_s:f64 discardable:byte)*
//	alarms  = n:uvarint (kind:string machine)*
//	machine = level:byte bits:byte raise_since:varint×2 clear_since:varint×2
//	          shelved_until:varint since:varint value:f64
//	string  = length:uvarint bytes
//
// varint is zigzag (encoding/binary's Varint), f64 is IEEE 754 bits,
// little endian. The times are the first, the first difference and then
// differences of differences: a unit sampled at a steady rate costs one
// byte a timestamp. The checksum is the SHA-256 of every byte before it.
// A record's bytes past what this version reads are skipped (room for
// fields added at the end), and a record that does not decode is one bad
// entry: the others are still restored.
const (
	// StateMagic begins a binary state file.
	StateMagic = "genvelope-state\x00"
	// BinarySnapshotVersion is the version of the binary state format.
	BinarySnapshotVersion = 3
)

// IsBinaryState reports whether a file starting with prefix is in the
// binary state format (the JSON versions start with '{').
func IsBinaryState(prefix []byte) bool {
	return len(prefix) >= len(StateMagic) && string(prefix[:len(StateMagic)]) == StateMagic
}

// StateEncoder writes the binary state format to a stream.
type StateEncoder struct {
	dst io.Writer
	w   *bufio.Writer // to dst and sum
	sum hash.Hash
	rec []byte // one record, reused
	num [binary.MaxVarintLen64]byte
	us  UnitSnapshot
	smp SampleSnapshot
	err error
}

// NewStateEncoder starts a state stream on w, written at the given time.
func NewStateEncoder(w io.Writer, written time.Time) *StateEncoder {
	e := &StateEncoder{dst: w, sum: sha256.New()}
	e.w = bufio.NewWriterSize(io.MultiWriter(w, e.sum), 64<<10)
	e.us.Times = make([]int64, 0, ringSize)
	head := binary.AppendUvarint([]byte(StateMagic), BinarySnapshotVersion)
	head = binary.AppendVarint(head, written.UnixNano())
	_, e.err = e.w.Write(head)
	return e
}

// Unit writes one unit's entry.
func (e *StateEncoder) Unit(id string, us *UnitSnapshot) error {
	e.rec = appendUnit(e.rec[:0], id, us)
	return e.writeRecord()
}

// writeRecord writes e.rec with its length.
func (e *StateEncoder) writeRecord() error {
	if e.err != nil {
		return e.err
	}
	if _, e.err = e.w.Write(e.num[:binary.PutUvarint(e.num[:], uint64(len(e.rec)))]); e.err == nil {
		_, e.err = e.w.Write(e.rec)
	}
	return e.err
}

// Close ends the stream: the end mark and the checksum. It does not
// close the underlying writer.
func (e *StateEncoder) Close() error {
	if e.err != nil {
		return e.err
	}
	if e.err = e.w.WriteByte(0); e.err == nil {
		e.err = e.w.Flush()
	}
	if e.err == nil {
		_, e.err = e.dst.Write(e.sum.Sum(nil))
	}
	if e.err != nil {
		return e.err
	}
	e.err = errors.New("state encoder closed")
	return nil
}

// EncodeState writes every unit's durable state to w in the binary
// state format, unit by unit: each unit's lock is held only while its
// record is built, and no copy of the whole state is made.
func (s *Store) EncodeState(w io.Writer, now time.Time) error {
	e := NewStateEncoder(w, now.UTC())
	for _, u := range s.Units() {
		u.mu.Lock()
		u.snapshotInto(&e.us, &e.smp)
		e.rec = appendUnit(e.rec[:0], u.cfg.ID, &e.us)
		u.mu.Unlock()
		if err := e.writeRecord(); err != nil {
			return err
		}
	}
	return e.Close()
}

// WriteBinary writes sn in the binary state format, units in the order
// of their ids.
func (sn *Snapshot) WriteBinary(w io.Writer) error {
	e := NewStateEncoder(w, sn.Written)
	ids := make([]string, 0, len(sn.Units))
	for id := range sn.Units {
		ids = append(ids, id)
	}
	slices.Sort(ids)
	for _, id := range ids {
		us := sn.Units[id]
		if err := e.Unit(id, &us); err != nil {
			return err
		}
	}
	return e.Close()
}

const (
	flagLatest = 1 << iota
	flagSuspect
	flagStale
)

const (
	hasFieldA = 1 << iota
	hasFreq
	hasCoolant
)

func appendF64(b []byte, x float64) []byte {
	return binary.LittleEndian.AppendUint64(b, math.Float64bits(x))
}

func appendString(b []byte, s string) []byte {
	b = binary.AppendUvarint(b, uint64(len(s)))
	return append(b, s...)
}

func appendUnit(b []byte, id string, us *UnitSnapshot) []byte {
	b = appendString(b, id)
	var flags byte
	if us.Latest != nil {
		flags |= flagLatest
	}
	if us.Suspect {
		flags |= flagSuspect
	}
	if us.Stale {
		flags |= flagStale
	}
	b = append(b, flags)
	b = appendF64(b, us.ArmatureH)
	b = appendF64(b, us.FieldH)
	b = appendF64(b, us.XArmature)
	b = appendF64(b, us.XField)
	b = binary.AppendVarint(b, us.ThermalNS)
	b = appendF64(b, us.OELUsed)
	b = appendF64(b, us.SCLUsed)
	b = appendTimes(b, us.Times)
	if l := us.Latest; l != nil {
		b = binary.AppendVarint(b, l.Time.UnixNano())
		b = binary.AppendVarint(b, l.ReceivedUnixNS)
		b = appendF64(b, l.PMW)
		b = appendF64(b, l.QMvar)
		b = appendF64(b, l.VKV)
		var has byte
		if l.HasFieldA {
			has |= hasFieldA
		}
		if l.HasFreq {
			has |= hasFreq
		}
		if l.HasCoolant {
			has |= hasCoolant
		}
		b = append(b, has)
		b = appendF64(b, l.FieldA)
		b = appendF64(b, l.FrequencyHz)
		b = appendF64(b, l.Coolant)
		b = append(b, byte(l.Quality))
	}
	b = binary.AppendUvarint(b, uint64(len(us.Heat)))
	for _, h := range us.Heat {
		b = binary.AppendVarint(b, h.TimeUnixNS)
		b = appendF64(b, h.ArmatureS)
		b = appendF64(b, h.FieldS)
		var d byte
		if h.Discardable {
			d = 1
		}
		b = append(b, d)
	}
	b = binary.AppendUvarint(b, uint64(len(us.Alarms)))
	if len(us.Alarms) == 0 {
		return b
	}
	found := 0
	for k := range alarm.Kind(alarm.NumKinds) { // in kind order: no sorting, no allocation
		if m, ok := us.Alarms[k.String()]; ok {
			b = appendMachine(appendString(b, k.String()), m)
			found++
		}
	}
	if found < len(us.Alarms) { // names that are no kind (a hand-made snapshot): restore refuses them
		var others []string
		for name := range us.Alarms {
			if _, ok := alarm.ParseKind(name); !ok {
				others = append(others, name)
			}
		}
		slices.Sort(others)
		for _, name := range others {
			b = appendMachine(appendString(b, name), us.Alarms[name])
		}
	}
	return b
}

// appendTimes writes ts as the first, the first difference and the
// differences of differences (wrapping arithmetic: exact both ways).
func appendTimes(b []byte, ts []int64) []byte {
	b = binary.AppendUvarint(b, uint64(len(ts)))
	var prev, d int64
	for i, t := range ts {
		switch i {
		case 0:
			b = binary.AppendVarint(b, t)
		case 1:
			d = t - prev
			b = binary.AppendVarint(b, d)
		default:
			b = binary.AppendVarint(b, (t-prev)-d)
			d = t - prev
		}
		prev = t
	}
	return b
}

func appendMachine(b []byte, m alarm.Machine) []byte {
	b = append(b, byte(m.Level))
	var bits byte
	for i, v := range [...]bool{m.Raising[0], m.Raising[1], m.Clearing[0], m.Clearing[1], m.Acknowledged} {
		if v {
			bits |= 1 << i
		}
	}
	b = append(b, bits)
	for _, t := range [...]int64{m.RaiseSince[0], m.RaiseSince[1], m.ClearSince[0], m.ClearSince[1], m.ShelvedUntil, m.Since} {
		b = binary.AppendVarint(b, t)
	}
	return appendF64(b, m.Value)
}

// BadEntryError is one unit's record that does not decode: the entry is
// dropped and the others are read.
type BadEntryError struct {
	ID  string // "" when even the id did not decode
	Err error
}

func (e *BadEntryError) Error() string {
	if e.ID == "" {
		return fmt.Sprintf("an entry without a readable id: %v", e.Err)
	}
	return fmt.Sprintf("unit %q: %v", ClipID(e.ID), e.Err)
}

func (e *BadEntryError) Unwrap() error { return e.Err }

// maxRecord bounds one unit's record: far above what a unit writes
// (about 400 bytes and 40 per alarm not at rest), so a corrupt length
// cannot make the reader allocate much.
const maxRecord = 1 << 20

// StateDecoder reads the binary state format.
type StateDecoder struct {
	r       hashReader
	Version int
	Written time.Time
	rec     []byte
	done    bool
}

// hashReader hashes the bytes its reader consumes (not those the
// buffer reads ahead): the checksum covers exactly what came before it.
type hashReader struct {
	r   *bufio.Reader
	sum hash.Hash
	one [1]byte
}

func (h *hashReader) ReadByte() (byte, error) {
	b, err := h.r.ReadByte()
	if err == nil {
		h.one[0] = b
		h.sum.Write(h.one[:])
	}
	return b, err
}

func (h *hashReader) Read(p []byte) (int, error) {
	n, err := h.r.Read(p)
	h.sum.Write(p[:n])
	return n, err
}

// NewStateDecoder reads the header of a binary state stream.
func NewStateDecoder(r io.Reader) (*StateDecoder, error) {
	d := &StateDecoder{r: hashReader{r: bufio.NewReaderSize(r, 64<<10), sum: sha256.New()}}
	magic := make([]byte, len(StateMagic))
	if _, err := io.ReadFull(&d.r, magic); err != nil || !IsBinaryState(magic) {
		return nil, fmt.Errorf("not a binary state file (no %q header)", StateMagic[:len(StateMagic)-1])
	}
	v, err := binary.ReadUvarint(&d.r)
	if err != nil {
		return nil, fmt.Errorf("header: %w", unexpected(err))
	}
	if v != BinarySnapshotVersion {
		return nil, fmt.Errorf("binary state version %d; this genvelope reads version %d", v, BinarySnapshotVersion)
	}
	d.Version = int(v)
	w, err := binary.ReadVarint(&d.r)
	if err != nil {
		return nil, fmt.Errorf("header: %w", unexpected(err))
	}
	d.Written = time.Unix(0, w).UTC()
	return d, nil
}

func unexpected(err error) error {
	if errors.Is(err, io.EOF) {
		return io.ErrUnexpectedEOF
	}
	return err
}

// Next decodes the next unit's entry into us (reusing its Times, Latest
// and Alarms) and returns its id. At the end of the stream, once the
// checksum matched, it returns io.EOF. A record that does not decode
// gives a *BadEntryError and the stream goes on; any other error ends
// it. Entries are only to be trusted once Next has returned io.EOF.
func (d *StateDecoder) Next(us *UnitSnapshot) (string, error) {
	if d.done {
		return "", io.EOF
	}
	n, err := binary.ReadUvarint(&d.r)
	if err != nil {
		return "", fmt.Errorf("record length: %w", unexpected(err))
	}
	if n == 0 {
		return "", d.end()
	}
	if n > maxRecord {
		return "", fmt.Errorf("record of %d bytes, more than the %d a unit can write", n, maxRecord)
	}
	if cap(d.rec) < int(n) {
		d.rec = make([]byte, n)
	}
	d.rec = d.rec[:n]
	if _, err := io.ReadFull(&d.r, d.rec); err != nil {
		return "", fmt.Errorf("record: %w", unexpected(err))
	}
	id, err := decodeUnit(d.rec, us)
	if err != nil {
		return id, &BadEntryError{ID: id, Err: err}
	}
	return id, nil
}

// ReadSnapshot decodes a whole binary state stream into a Snapshot; the
// entries that did not decode are in its Bad.
func ReadSnapshot(r io.Reader) (*Snapshot, error) {
	d, err := NewStateDecoder(r)
	if err != nil {
		return nil, err
	}
	sn := &Snapshot{Format: "genvelope-state", Version: d.Version, Written: d.Written, Units: map[string]UnitSnapshot{}}
	for {
		var us UnitSnapshot
		id, err := d.Next(&us)
		var bad *BadEntryError
		switch {
		case errors.Is(err, io.EOF):
			return sn, nil
		case errors.As(err, &bad):
			sn.Bad = append(sn.Bad, bad)
		case err != nil:
			return nil, err
		default:
			sn.Units[id] = us
		}
	}
}

// end checks the checksum after the end mark and that nothing follows.
func (d *StateDecoder) end() error {
	var want, got [sha256.Size]byte
	d.r.sum.Sum(got[:0])
	if _, err := io.ReadFull(d.r.r, want[:]); err != nil {
		return fmt.Errorf("checksum: %w", unexpected(err))
	}
	if want != got {
		return fmt.Errorf("checksum mismatch (file says %x…, content gives %x…): the file was changed after it was written", want[:6], got[:6])
	}
	if _, err := d.r.r.ReadByte(); err != io.EOF {
		return errors.New("bytes after the checksum: the file was changed after it was written")
	}
	d.done = true
	return io.EOF
}

// decoder reads one record.
type decoder struct {
	b   []byte
	err error
}

func (c *decoder) fail(what string) {
	if c.err == nil {
		c.err = fmt.Errorf("%s: the entry ends early or is malformed", what)
	}
}

func (c *decoder) uvarint(what string) uint64 {
	if c.err != nil {
		return 0
	}
	v, n := binary.Uvarint(c.b)
	if n <= 0 {
		c.fail(what)
		return 0
	}
	c.b = c.b[n:]
	return v
}

func (c *decoder) varint(what string) int64 {
	if c.err != nil {
		return 0
	}
	v, n := binary.Varint(c.b)
	if n <= 0 {
		c.fail(what)
		return 0
	}
	c.b = c.b[n:]
	return v
}

func (c *decoder) byte(what string) byte {
	if c.err != nil || len(c.b) < 1 {
		c.fail(what)
		return 0
	}
	v := c.b[0]
	c.b = c.b[1:]
	return v
}

func (c *decoder) f64(what string) float64 {
	if c.err != nil || len(c.b) < 8 {
		c.fail(what)
		return 0
	}
	v := math.Float64frombits(binary.LittleEndian.Uint64(c.b))
	c.b = c.b[8:]
	return v
}

func (c *decoder) string(what string) string {
	n := c.uvarint(what)
	if c.err != nil || n > uint64(len(c.b)) {
		c.fail(what)
		return ""
	}
	s := string(c.b[:n])
	c.b = c.b[n:]
	return s
}

// decodeUnit decodes one record into us.
func decodeUnit(b []byte, us *UnitSnapshot) (string, error) {
	c := &decoder{b: b}
	id := c.string("id")
	if c.err != nil {
		return "", c.err
	}
	times, heat := us.Times[:0], us.Heat[:0]
	latest := us.Latest
	alarms := us.Alarms
	clear(alarms)
	*us = UnitSnapshot{}
	flags := c.byte("flags")
	us.ArmatureH = c.f64("armature_heating_s")
	us.FieldH = c.f64("field_heating_s")
	us.XArmature = c.f64("armature_current_pu")
	us.XField = c.f64("field_current_pu")
	us.ThermalNS = c.varint("thermal_unix_ns")
	us.OELUsed = c.f64("oel_used_ratio")
	us.SCLUsed = c.f64("scl_used_ratio")
	n := c.uvarint("times")
	if n > ringSize {
		return id, fmt.Errorf("%d times, more than the %d a unit remembers", n, ringSize)
	}
	var prev, d int64
	for i := range int(n) {
		x := c.varint("times")
		switch i {
		case 0:
			prev = x
		case 1:
			d = x
			prev += d
		default:
			d += x
			prev += d
		}
		times = append(times, prev)
	}
	us.Times = times
	if flags&flagLatest != 0 {
		if latest == nil {
			latest = &SampleSnapshot{}
		}
		l := latest
		*l = SampleSnapshot{}
		l.UnitID = id
		l.Time = time.Unix(0, c.varint("latest time")).UTC()
		l.ReceivedUnixNS = c.varint("latest received")
		l.PMW = c.f64("latest p")
		l.QMvar = c.f64("latest q")
		l.VKV = c.f64("latest v")
		has := c.byte("latest flags")
		l.HasFieldA, l.HasFreq, l.HasCoolant = has&hasFieldA != 0, has&hasFreq != 0, has&hasCoolant != 0
		l.FieldA = c.f64("latest field_a")
		l.FrequencyHz = c.f64("latest frequency_hz")
		l.Coolant = c.f64("latest coolant")
		l.Quality = Quality(c.byte("latest quality"))
		us.Latest = l
	}
	us.Suspect, us.Stale = flags&flagSuspect != 0, flags&flagStale != 0
	nh := c.uvarint("heat")
	if nh > heatSize {
		return id, fmt.Errorf("%d heating steps, more than the %d a unit remembers", nh, heatSize)
	}
	for range int(nh) {
		h := HeatSnapshot{TimeUnixNS: c.varint("heat time"), ArmatureS: c.f64("heat armature"), FieldS: c.f64("heat field")}
		h.Discardable = c.byte("heat discardable") != 0
		heat = append(heat, h)
	}
	if len(heat) > 0 {
		us.Heat = heat
	}
	na := c.uvarint("alarms")
	if na > uint64(alarm.NumKinds) {
		return id, fmt.Errorf("%d alarms, more than the %d kinds", na, alarm.NumKinds)
	}
	for range int(na) {
		k := c.string("alarm kind")
		var m alarm.Machine
		m.Level = alarm.Level(c.byte("alarm level"))
		bits := c.byte("alarm bits")
		m.Raising = [2]bool{bits&1 != 0, bits&2 != 0}
		m.Clearing = [2]bool{bits&4 != 0, bits&8 != 0}
		m.Acknowledged = bits&16 != 0
		m.RaiseSince = [2]int64{c.varint("alarm raise_since"), c.varint("alarm raise_since")}
		m.ClearSince = [2]int64{c.varint("alarm clear_since"), c.varint("alarm clear_since")}
		m.ShelvedUntil = c.varint("alarm shelved_until")
		m.Since = c.varint("alarm since")
		m.Value = c.f64("alarm value")
		if c.err != nil {
			break
		}
		if alarms == nil {
			alarms = map[string]alarm.Machine{}
		}
		if _, dup := alarms[k]; dup {
			return id, fmt.Errorf("alarm %q twice", k)
		}
		alarms[k] = m
	}
	if len(alarms) > 0 {
		us.Alarms = alarms
	}
	return id, c.err
}
