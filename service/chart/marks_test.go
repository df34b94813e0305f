package chart

import (
	"bytes"
	"strings"
	"testing"
)

func TestMark(t *testing.T) {
	u, base := testUnit(t)
	pts := u.Envelope(1, 0, false, 21)
	tests := []struct {
		name              string
		opts              []Option
		wantPoint, wantTr bool
	}{
		{"curves only", nil, false, false},
		{"point only", []Option{WithOperatingPoint(Point{PMW: 120, QMvar: 30})}, true, false},
		{"point and trail", []Option{
			WithOperatingPoint(Point{PMW: 120, QMvar: 30}),
			WithTrail([]Point{{PMW: 100, QMvar: 10}, {PMW: 120, QMvar: 30}}),
		}, true, true},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			var buf bytes.Buffer
			if err := Capability(&buf, "unit x", pts, base, tt.opts...); err != nil {
				t.Fatal(err)
			}
			got := Mark(buf.Bytes())
			texts(t, got) // still well-formed
			for _, c := range []struct {
				class string
				want  bool
			}{{ClassOperatingPoint, tt.wantPoint}, {ClassOperatingTrail, tt.wantTr}} {
				if n := strings.Count(string(got), `class="`+c.class+`"`); n != map[bool]int{true: 1}[c.want] {
					t.Errorf("%s marked %d times, want it %v", c.class, n, c.want)
				}
			}
			if !tt.wantPoint && !tt.wantTr && !bytes.Equal(got, buf.Bytes()) {
				t.Error("a chart without marks changed")
			}
		})
	}
}
