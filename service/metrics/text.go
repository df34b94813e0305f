package metrics

import (
	"io"
	"math"
	"runtime"
	"strconv"
	"strings"
	"sync/atomic"
	"unsafe"
)

// textSink records each series of a scrape as a small fixed-size record
// (no text, no pointers) in its family's list, so that one walk over the
// units yields every family contiguous, as the text format needs; the
// text is written family by family afterwards, straight to the output.
// At 10,000 units a scrape's 438,000 series take 10 MB of records
// against 36 MB of text kept in per-family buffers before.
type textSink struct {
	recs    []recList    // by family index
	units   []scrapeUnit // the units served, in walk order
	frag    []byte       // each served unit's `unit="ID",site="SITE"`, escaped, one after the other
	strs    []string     // the other label values, escaped, interned
	strIdx  map[string]uint32
	recent  [64]internEntry // the last values interned, by the address of their bytes
	current int32           // the unit being walked (index into units), -1 for fleet-wide series
}

// rec is one series: its value, its unit (index into textSink.units, -1
// for a fleet-wide series) and its further label values (indexes into
// textSink.strs; unit families have at most two beyond unit and site).
type rec struct {
	v     float64
	unit  int32
	extra [2]uint32
}

// recList is a family's records in blocks that are never copied: a
// slice grown by appending copies and reallocates its records some ten
// times on the way to a family's 140,000 (50 MB allocated for 10 MB of
// records, at a scrape of 10,000 units), and a list sized after the
// last scrape is too short or too long when the fleet changes.
type recList struct{ blocks [][]rec }

// Blocks grow from minBlock records by four times to maxBlock (24 kB).
const minBlock, maxBlock = 16, 1024

func (l *recList) add(r rec) {
	n := len(l.blocks)
	if n == 0 || len(l.blocks[n-1]) == cap(l.blocks[n-1]) {
		size := minBlock
		if n > 0 {
			size = min(4*cap(l.blocks[n-1]), maxBlock)
		}
		l.blocks = append(l.blocks, make([]rec, 0, size))
		n++
	}
	l.blocks[n-1] = append(l.blocks[n-1], r)
}

// scrapeUnit is where a served unit's identity labels, written and
// escaped once for all its series, lie in textSink.frag.
type scrapeUnit struct{ from, to uint32 }

// internEntry is a label value interned lately and its index.
type internEntry struct {
	s string
	i uint32
}

// intern returns the index of s, escaped for the text format, in t.strs.
// Nearly every value is a constant of the program (a limit's name, a
// level, a direction), passed again and again from the same bytes: a
// small table indexed by the address of those bytes finds them without
// hashing the string; the map is the way for the rest (display names)
// and the first time. (The address only picks the slot: what is found
// there is compared as a string, which compares the addresses first.)
func (t *textSink) intern(s string) uint32 {
	e := &t.recent[(uintptr(unsafe.Pointer(unsafe.StringData(s)))>>3)%uintptr(len(t.recent))]
	if len(s) > 0 && e.s == s {
		return e.i
	}
	i, ok := t.strIdx[s]
	if !ok {
		i = uint32(len(t.strs))
		t.strs = append(t.strs, escaped(s))
		t.strIdx[s] = i
	}
	*e = internEntry{s, i}
	return i
}

// escaped returns s escaped for a label value (see appendEscaped),
// without a copy when nothing needs escaping.
func escaped(s string) string {
	for i := 0; i < len(s); i++ {
		if c := s[i]; c == '\\' || c == '"' || c == '\n' {
			return string(appendEscaped(nil, s))
		}
	}
	return s
}

func (t *textSink) add(f *family, v float64, l labels) {
	r := rec{v: v, unit: -1}
	first := 0
	if f.perUnit {
		r.unit, first = t.current, 2
	}
	for i := first; i < l.n; i++ {
		r.extra[i-first] = t.intern(l.v[i])
	}
	t.recs[f.index].add(r)
}

// beginUnit starts the series of a unit.
func (t *textSink) beginUnit(id, site string) {
	t.current = int32(len(t.units))
	from := uint32(len(t.frag))
	t.frag = append(t.frag, `unit="`...)
	t.frag = appendEscaped(t.frag, id)
	t.frag = append(t.frag, `",site="`...)
	t.frag = appendEscaped(t.frag, site)
	t.frag = append(t.frag, '"')
	t.units = append(t.units, scrapeUnit{from, uint32(len(t.frag))})
}

// familyText is a family's fixed text, made once (newFamilyText): its
// HELP and TYPE lines and the pieces of a series' line around the label
// values, so that a line is a handful of appends.
type familyText struct {
	header string   // the HELP and TYPE lines
	head   string   // the name and "{" (the name and " " without labels)
	seps   []string // before each label value other than unit and site: `,name="` (`name="` first in a family without unit)
	tail   string   // "} " after the labels ("" without labels)
}

func newFamilyText(f *family) familyText {
	typ := "gauge"
	if f.counter {
		typ = "counter"
	}
	ft := familyText{header: "# HELP " + f.name + " " + escapeHelp(f.help) + "\n# TYPE " + f.name + " " + typ + "\n"}
	if len(f.labels) == 0 {
		ft.head = f.name + " "
		return ft
	}
	ft.head, ft.tail = f.name+"{", "} "
	first := 0
	if f.perUnit {
		first = 2 // the unit's fragment (beginUnit)
	}
	for i := first; i < len(f.labels); i++ {
		sep := ","
		if i == 0 {
			sep = ""
		}
		ft.seps = append(ft.seps, sep+f.labels[i]+`="`)
	}
	return ft
}

// appendSeries appends one series' line.
func (t *textSink) appendSeries(b []byte, f *family, r *rec) []byte {
	ft := &f.text
	b = append(b, ft.head...)
	if f.perUnit {
		u := t.units[r.unit]
		b = append(b, t.frag[u.from:u.to]...)
	}
	for j, sep := range ft.seps { // every value escaped already
		b = append(b, sep...)
		b = append(b, t.strs[r.extra[j]]...)
		b = append(b, '"')
	}
	b = append(b, ft.tail...)
	b = appendValue(b, r.v)
	return append(b, '\n')
}

// appendEscaped escapes a label value for the text format: backslash,
// double quote and line feed.
func appendEscaped(b []byte, s string) []byte {
	for i := 0; i < len(s); i++ {
		switch c := s[i]; c {
		case '\\':
			b = append(b, '\\', '\\')
		case '"':
			b = append(b, '\\', '"')
		case '\n':
			b = append(b, '\\', 'n')
		default:
			b = append(b, c)
		}
	}
	return b
}

// appendValue appends v as client_golang's text encoder does:
// strconv's shortest 'g' form, NaN, +Inf, -Inf. Whole numbers of
// magnitude under 1e6 (0 and 1 for most series: levels, states, flags)
// come out of 'g' as plain integers, which AppendInt writes at a
// fraction of the cost (TestAppendValue); -0 is left to AppendFloat.
func appendValue(b []byte, v float64) []byte {
	if v > -1e6 && v < 1e6 && float64(int64(v)) == v && (v != 0 || !math.Signbit(v)) {
		return strconv.AppendInt(b, int64(v), 10)
	}
	switch {
	case math.IsNaN(v):
		return append(b, "NaN"...)
	case math.IsInf(v, 1):
		return append(b, "+Inf"...)
	case math.IsInf(v, -1):
		return append(b, "-Inf"...)
	}
	return strconv.AppendFloat(b, v, 'g', -1, 64)
}

// WriteText writes every family of the collector in the Prometheus text
// exposition format (version 0.0.4), built from the store as it is now.
// Families without a series are left out, as a registry does.
func (c *Collector) WriteText(w io.Writer) error { return c.WriteTextFiltered(w, Filter{}) }

// WriteTextOf is WriteText for the units keep admits (nil: all): a
// viewer scoped to some units sees their series and the fleet-wide
// ones, nothing of the other units.
func (c *Collector) WriteTextOf(w io.Writer, keep func(unitID string) bool) error {
	return c.WriteTextFiltered(w, Filter{Keep: keep})
}

// WriteTextFiltered is WriteText for what f serves.
func (c *Collector) WriteTextFiltered(w io.Writer, f Filter) error {
	// The units are walked in parallel runs on a large fleet, a sink
	// each; a family's text is then the runs' records one after the
	// other, in the store's order as from one walk.
	n := len(c.store.Units())
	parts := 1
	switch {
	case c.runs > 0:
		parts = c.runs
	case n >= parallelUnits:
		parts = max(1, min(runtime.GOMAXPROCS(0), maxParts))
	}
	sinks := make([]*textSink, parts)
	outs := make([]sink, parts)
	for i := range sinks {
		m := n/parts + 1 // room for the identities of most fleets
		sinks[i] = &textSink{recs: make([]recList, len(c.families)), strIdx: map[string]uint32{}, current: -1,
			units: make([]scrapeUnit, 0, m), frag: make([]byte, 0, 40*m)}
		outs[i] = sinks[i]
	}
	c.series(f, outs...)
	p := newPipe(w, c.chunk)
	b := p.take()
	for _, fam := range c.families {
		header := false
		for _, t := range sinks {
			for _, recs := range t.recs[fam.index].blocks { // a block has a record at least
				if !header {
					b = append(b, fam.text.header...)
					header = true
				}
				for i := range recs {
					b = t.appendSeries(b, fam, &recs[i])
					if len(b) >= c.chunk {
						if p.failed.Load() {
							return p.close(nil)
						}
						b = p.swap(b)
					}
				}
			}
		}
	}
	return p.close(b)
}

// A scrape walks the units in parallel runs from parallelUnits units
// on, in as many runs as the process has cores, at most maxParts.
const parallelUnits, maxParts = 1024, 4

// chunkSize is how much text is handed to the writer at a time
// (Collector.chunk).
const chunkSize = 128 << 10

// pipe writes chunks of text to w from a goroutine of its own, so that
// the next chunk is made while the last one is written: compressed, for
// a gzipped scrape, on the other core. Three buffers go round: one being
// filled, one waiting, one being written.
type pipe struct {
	w      io.Writer
	full   chan []byte // chunks to write, in order
	free   chan []byte // written chunks, to fill again
	done   chan struct{}
	err    error // the first write error (the goroutine's until done is closed)
	failed atomic.Bool
}

func newPipe(w io.Writer, chunk int) *pipe {
	const buffers = 3
	p := &pipe{w: w, full: make(chan []byte, buffers), free: make(chan []byte, buffers), done: make(chan struct{})}
	for range buffers {
		p.free <- make([]byte, 0, chunk+chunk/8)
	}
	go p.run()
	return p
}

// run writes the chunks until the pipe is closed; after a write error it
// only hands the buffers back.
func (p *pipe) run() {
	defer close(p.done)
	for b := range p.full {
		if p.err == nil {
			if _, err := p.w.Write(b); err != nil {
				p.err = err
				p.failed.Store(true)
			}
		}
		p.free <- b[:0]
	}
}

// take returns an empty buffer.
func (p *pipe) take() []byte { return <-p.free }

// swap hands b to the writer and returns an empty buffer.
func (p *pipe) swap(b []byte) []byte {
	p.full <- b
	return <-p.free
}

// close hands b to the writer, waits until every chunk is written and
// returns the first write error.
func (p *pipe) close(b []byte) error {
	if len(b) > 0 {
		p.full <- b
	}
	close(p.full)
	<-p.done
	return p.err
}

func escapeHelp(s string) string {
	return strings.NewReplacer("\\", "\\\\", "\n", "\\n").Replace(s)
}
