package chart

import (
	"bytes"
	"strings"
	"testing"

	"github.com/genvelope/genvelope/limits"
)

// TestCoordCharts: every coordination chart is well-formed SVG with its
// curves named, and the capability chart takes the UEL and the zones.
func TestCoordCharts(t *testing.T) {
	u, base := testUnit(t)
	p := u.Params()
	p.UEL = &limits.UEL{Shape: limits.UELCircle, CenterQ: 0.6, Radius: 0.95, K: 2}
	u, err := limits.New(p)
	if err != nil {
		t.Fatal(err)
	}
	s := &limits.Settings{
		OEL: &limits.InverseTime{Pickup: 1.05, Ceiling: 1.6, K: 15}, SCL: &limits.InverseTime{Pickup: 1.05, K: 20},
		FieldOvercurrent: &limits.InverseTime{Pickup: 1.1, K: 40}, VHzLimiter: 1.04,
		VHzRelay:    []limits.VHzStage{{Pickup: 1.1, DelayS: 45}, {Pickup: 1.18, DelayS: 2}},
		Transformer: &limits.Transformer{MVA: 200, LVRatio: 0.975},
		LossOfField: &limits.LossOfField{Zones: []limits.MhoZone{{Offset: 0.1, Diameter: 1}, {Offset: 0.1, Diameter: 2}},
			PrimaryPerPU: 1.125, SecondaryPerPU: 20},
	}
	st := u.Coordinate(s)
	cases := []struct {
		name string
		draw func(*bytes.Buffer) error
		want []string
	}{
		{"pq", func(b *bytes.Buffer) error { return CoordPQ(b, "pq", u, s, &st, base, 0.95) }, []string{LabelLimiterUEL, LabelZone2, LabelArmature}},
		{"rx", func(b *bytes.Buffer) error { return CoordRX(b, "rx", u, s, base) }, []string{LabelManualRX, "secondary Ω (primary Ω)"}},
		{"time", func(b *bytes.Buffer) error { return CoordTime(b, "time", s) }, []string{LabelOEL, LabelFieldCap, LabelSCL, LabelFieldRelay}},
		{"vhz", func(b *bytes.Buffer) error { return CoordVHz(b, "vhz", s) }, []string{LabelVHzRelay, LabelTransformerLd, LabelGeneratorVHz}},
		{"capability", func(b *bytes.Buffer) error {
			return Capability(b, "cap", u.Envelope(1, 0, false, 41), base, WithLimiters(p.UEL, s.LossOfField.Zones, 1))
		}, []string{LabelLimiterUEL, LabelZone1, LabelZone2}},
	}
	for _, c := range cases {
		var b bytes.Buffer
		if err := c.draw(&b); err != nil {
			t.Fatalf("%s: %v", c.name, err)
		}
		txt := texts(t, b.Bytes())
		for _, w := range c.want {
			if !strings.Contains(txt, w) {
				t.Errorf("%s: %q missing", c.name, w)
			}
		}
	}
}
