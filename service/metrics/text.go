package metrics

import (
	"bufio"
	"io"
	"math"
	"strconv"
	"strings"
)

// textSink writes each family's series into a buffer of its own, so that
// one walk over the units yields every family contiguous, as the text
// format needs.
type textSink struct {
	bufs map[*family][]byte
}

func (t *textSink) add(f *family, v float64, l labels) {
	lv := l.v[:l.n]
	b := t.bufs[f]
	b = append(b, f.name...)
	if len(f.labels) > 0 {
		b = append(b, '{')
		for i, l := range f.labels {
			if i > 0 {
				b = append(b, ',')
			}
			b = append(b, l...)
			b = append(b, '=', '"')
			b = appendEscaped(b, lv[i])
			b = append(b, '"')
		}
		b = append(b, '}')
	}
	b = append(b, ' ')
	b = appendValue(b, v)
	b = append(b, '\n')
	t.bufs[f] = b
}

// appendEscaped escapes a label value for the text format: backslash,
// double quote and line feed.
func appendEscaped(b []byte, s string) []byte {
	if !strings.ContainsAny(s, "\\\"\n") {
		return append(b, s...)
	}
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

func appendValue(b []byte, v float64) []byte {
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

// WriteTextFiltered is WriteText for what f serves.
func (c *Collector) WriteTextFiltered(w io.Writer, f Filter) error {
	t := &textSink{bufs: make(map[*family][]byte, len(c.families))}
	// Each family's buffer starts at the size it reached last time (a
	// little more): growing 30 buffers by doubling to 36 MB in all took
	// a third of a scrape's CPU in copying at 10,000 units.
	// (The whole fleet's scrape only: a part's size varies with the part.)
	whole := f.whole() && !f.NoFleet
	c.sizeMu.Lock()
	for _, fam := range c.families {
		if n := c.sizes[fam]; n > 0 && whole {
			t.bufs[fam] = make([]byte, 0, n+n/16)
		}
	}
	c.sizeMu.Unlock()
	c.series(t, f)
	if whole {
		c.sizeMu.Lock()
		if c.sizes == nil {
			c.sizes = make(map[*family]int, len(c.families))
		}
		for fam, b := range t.bufs {
			c.sizes[fam] = len(b)
		}
		c.sizeMu.Unlock()
	}
	bw := bufio.NewWriterSize(w, 64<<10)
	for _, fam := range c.families {
		b := t.bufs[fam]
		if len(b) == 0 {
			continue
		}
		typ := "gauge"
		if fam.counter {
			typ = "counter"
		}
		bw.WriteString("# HELP " + fam.name + " " + escapeHelp(fam.help) + "\n# TYPE " + fam.name + " " + typ + "\n")
		bw.Write(b)
	}
	return bw.Flush()
}

func escapeHelp(s string) string {
	return strings.NewReplacer("\\", "\\\\", "\n", "\\n").Replace(s)
}
