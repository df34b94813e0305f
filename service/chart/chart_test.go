package chart

import (
	"bytes"
	"encoding/xml"
	"errors"
	"io"
	"math"
	"strings"
	"testing"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/fleet"
)

func testUnit(t *testing.T) (*limits.Unit, limits.Base) {
	t.Helper()
	u, err := limits.New(limits.Params{
		Rotor: limits.Round, Xd: 2, Xq: 2, Xl: 0.15, Xp: 0.15, PowerFactor: 0.85, FrequencyHz: 50,
		PMax: 0.85, PMin: 0.2, MarginFraction: 0.1, Xe: 0.1,
		EndRegion: &limits.EndRegion{P: []float64{0, 0.85}, Q: []float64{-0.5, -0.3}},
	})
	if err != nil {
		t.Fatal(err)
	}
	return u, limits.Base{MVA: 200, KV: 15, FrequencyHz: 50, IFagA: 500}
}

// texts checks that data is well-formed SVG and returns its texts.
func texts(t *testing.T, data []byte) string {
	t.Helper()
	dec := xml.NewDecoder(bytes.NewReader(data))
	var b strings.Builder
	first := true
	for {
		tok, err := dec.Token()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatalf("not well-formed XML: %v", err)
		}
		switch x := tok.(type) {
		case xml.StartElement:
			if first && x.Name.Local != "svg" {
				t.Fatalf("root element %q, want svg", x.Name.Local)
			}
			first = false
		case xml.CharData:
			b.Write(x)
			b.WriteByte(' ')
		}
	}
	return strings.Join(strings.Fields(b.String()), " ")
}

func TestCapability(t *testing.T) {
	u, base := testUnit(t)
	pts := u.Envelope(1, 0, false, 41)
	tests := []struct {
		name    string
		opts    []Option
		want    []string
		notWant []string
	}{
		{
			name:    "curves only",
			want:    []string{"unit x at 15 kV", LabelArmature, LabelField, LabelStability, LabelPractical, LabelEndRegion, fleet.Caution},
			notWant: []string{LabelPMax, LabelOperatingPoint, LabelOperatingTrail},
		},
		{
			name: "everything",
			opts: []Option{
				WithPrimeMover(40, 170),
				WithOperatingPoint(Point{PMW: 120, QMvar: 30}),
				WithTrail([]Point{{PMW: 100, QMvar: 10}, {PMW: 110, QMvar: 20}, {PMW: 120, QMvar: 30}}),
				WithSize(600, 400),
			},
			want: []string{LabelRegion, LabelPMax, LabelPMin, "p_max 170 MW", "p_min 40 MW", LabelOperatingPoint, LabelOperatingTrail, fleet.Caution},
		},
		{
			name: "point far outside widens the axes",
			opts: []Option{WithOperatingPoint(Point{PMW: 500, QMvar: -900})},
			want: []string{LabelOperatingPoint},
		},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var buf bytes.Buffer
			if err := Capability(&buf, "unit x at 15 kV", pts, base, tc.opts...); err != nil {
				t.Fatal(err)
			}
			if bytes.Contains(buf.Bytes(), []byte("NaN")) {
				t.Error("the SVG holds NaN")
			}
			if !bytes.Contains(buf.Bytes(), []byte(fontFallback)) {
				t.Error("the fonts have no fallback")
			}
			txt := texts(t, buf.Bytes())
			for _, w := range tc.want {
				if !strings.Contains(txt, w) {
					t.Errorf("lacks %q", w)
				}
			}
			for _, w := range tc.notWant {
				if strings.Contains(txt, w) {
					t.Errorf("has %q", w)
				}
			}
		})
	}
}

func TestCapabilityErrors(t *testing.T) {
	u, base := testUnit(t)
	pts := u.Envelope(1, 0, false, 5)
	tests := []struct {
		name string
		pts  []limits.EnvelopePoint
		base limits.Base
	}{
		{"one point", pts[:1], base},
		{"no base", pts, limits.Base{}},
	}
	for _, tc := range tests {
		if err := Capability(io.Discard, "x", tc.pts, tc.base); err == nil {
			t.Errorf("%s: want an error", tc.name)
		}
	}
}

func TestTicks(t *testing.T) {
	tests := []struct {
		lo, hi   float64
		labelled []float64
	}{
		{0, 100, []float64{0, 20, 40, 60, 80, 100}},
		{-400, 400, []float64{-400, -300, -200, -100, 0, 100, 200, 300, 400}},
		{-0.5, 0.5, []float64{-0.4, -0.2, 0, 0.2, 0.4}},
		{5, 5, nil},
	}
	for _, tc := range tests {
		var got []float64
		for _, tk := range (ticks{target: 8}).Ticks(tc.lo, tc.hi) {
			if tk.Label != "" {
				got = append(got, tk.Value)
			}
		}
		if len(got) != len(tc.labelled) {
			t.Errorf("[%v, %v]: labelled %v, want %v", tc.lo, tc.hi, got, tc.labelled)
			continue
		}
		for i := range got {
			if math.Abs(got[i]-tc.labelled[i]) > 1e-9 {
				t.Errorf("[%v, %v]: labelled %v, want %v", tc.lo, tc.hi, got, tc.labelled)
				break
			}
		}
	}
}

func TestRegionStartsAtPMin(t *testing.T) {
	u, base := testUnit(t)
	pts := u.Envelope(1, 0, false, 11)
	poly := regionPolygon(pts, base.MVA, config{hasPrimeMover: true, pMinMW: 45, pMaxMW: 170})
	if len(poly) < 4 {
		t.Fatalf("region has %d vertices", len(poly))
	}
	if poly[0].Y != 45 || poly[len(poly)-1].Y != 45 {
		t.Errorf("region starts at %v MW and ends at %v MW, want p_min 45", poly[0].Y, poly[len(poly)-1].Y)
	}
	for _, v := range poly {
		if v.Y < 45-1e-9 {
			t.Errorf("vertex below p_min: %v", v)
		}
	}
}

// The UEL curve is drawn, with its legend entry, when the unit has one.
func TestCapabilityDrawsTheUEL(t *testing.T) {
	u, base := testUnit(t)
	p := u.Params()
	p.UEL = &limits.UEL{Shape: limits.UELCircle, CenterQ: 1.2, Radius: 1.6, K: 2}
	withUEL, err := limits.New(p)
	if err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		u    *limits.Unit
		want bool
	}{{u, false}, {withUEL, true}} {
		var buf bytes.Buffer
		if err := Capability(&buf, "unit x", tc.u.Envelope(1, 0, false, 41), base); err != nil {
			t.Fatal(err)
		}
		if got := strings.Contains(texts(t, buf.Bytes()), LabelUEL); got != tc.want {
			t.Errorf("UEL in the legend: %v, want %v", got, tc.want)
		}
	}
}
