package fleet

import (
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

func readCoord(t *testing.T) string {
	t.Helper()
	data, err := os.ReadFile(filepath.Join("testdata", "coord.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	return string(data)
}

// TestParseProtection: the limiter, protection and transformer blocks
// decode and convert to the machine base. Secondary ohms to pu by hand
// (coordination.md): Z_base = 20^2/400 = 1 ohm, primary = secondary x
// vt_ratio / ct_ratio, so 2.1 ohm -> 2.1 x 175/4000 = 0.091875 pu.
func TestParseProtection(t *testing.T) {
	f, ds := Parse("coord.yaml", []byte(readCoord(t)))
	if len(ds) != 0 {
		t.Fatalf("want no diagnostics, got\n%s", ds)
	}
	u := f.Unit("kestrel-1")
	if u.Model == nil {
		t.Fatal("no model")
	}
	s := u.Settings()
	checks := []struct {
		name      string
		got, want float64
	}{
		{"zone 1 offset", s.LossOfField.Zones[0].Offset, 2.1 * 175 / 4000},
		{"zone 1 diameter", s.LossOfField.Zones[0].Diameter, 16.5 * 175 / 4000},
		{"zone 2 diameter", s.LossOfField.Zones[1].Diameter, 33.0 * 175 / 4000},
		{"zone 2 delay", s.LossOfField.Zones[1].DelayS, 0.5},
		{"secondary ohms per pu", s.LossOfField.SecondaryPerPU, 4000.0 / 175},
		{"oel k_s", s.OEL.K, 15},
		{"oel ceiling", s.OEL.Ceiling, 1.6},
		{"scl first point", s.SCL.X[0], 1.05},
		{"field relay pickup", s.FieldOvercurrent.Pickup, 1.1},
		{"vhz limiter", s.VHzLimiter, 1.08},
		{"vhz stage 2", s.VHzRelay[1].Pickup, 1.18},
		{"transformer ratio", s.Transformer.LVRatio, 19.5 / 20},
		{"uel centre q", u.Model.Params().UEL.CenterQ, 0.75},
	}
	for _, c := range checks {
		if math.Abs(c.got-c.want) > 1e-12 {
			t.Errorf("%s = %v, want %v", c.name, c.got, c.want)
		}
	}
}

// TestParseProtectionRules: each rule's error names FILE:LINE and the key.
func TestParseProtectionRules(t *testing.T) {
	cases := []struct {
		name, old, new string
		line           int
		field, text    string
	}{
		{"zone diameter zero", "diameter_ohm: 16.5", "diameter_ohm: 0", 23, "protection.loss_of_field.zones[1].diameter_ohm", "positive diameter"},
		{"zone offset negative", "{offset_ohm: 2.1, diameter_ohm: 33.0", "{offset_ohm: -1, diameter_ohm: 33.0", 24, "protection.loss_of_field.zones[2].offset_ohm", "must be positive"},
		{"ohms without ratios", "        ct_ratio: 4000\n        vt_ratio: 175\n", "", 21, "protection.loss_of_field.zones[1]", "needs the relay's ct_ratio and vt_ratio"},
		{"ohms and pu mixed", "{offset_ohm: 2.1, diameter_ohm: 16.5,", "{offset_ohm: 2.1, diameter_pu: 0.5,", 23, "protection.loss_of_field.zones[1]", "not both"},
		{"oel ceiling below pickup", "ceiling_pu: 1.6, k_s: 15", "ceiling_pu: 1.02, k_s: 15", 12, "excitation.oel.ceiling_pu", "not above the pickup"},
		{"oel points and formula", "oel: {pickup_pu: 1.05, ceiling_pu: 1.6, k_s: 15}", "oel: {pickup_pu: 1.05, points: []}", 12, "excitation.oel", "not both"},
		{"scl time rising", "{current_pu: 1.5, time_s: 15}", "{current_pu: 1.5, time_s: 400}", 16, "excitation.scl.points", "must not rise"},
		{"vhz stage at rating", "{pickup_pu: 1.10, delay_s: 45}", "{pickup_pu: 1.0, delay_s: 45}", 26, "protection.volts_per_hertz.stages[1].pickup_pu", "must be in (1, 1.5]"},
		{"transformer far from the generator", "kv_lv: 19.5", "kv_lv: 230", 27, "transformer.kv_lv", "within 20 %"},
		{"unknown key", "field_overcurrent: {pickup_pu: 1.1, k_s: 40}", "field_overcurrent: {pickup_pu: 1.1, k: 40}", 25, "protection.field_overcurrent.k", "unknown key"},
		{"vhz limiter missing setpoint", "vhz_limiter: {setpoint_pu: 1.08}", "vhz_limiter: {}", 17, "excitation.vhz_limiter.setpoint_pu", "missing"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			src := edit(t, readCoord(t), c.old, c.new)
			_, ds := Parse("coord.yaml", []byte(src))
			for _, d := range ds {
				if d.Severity == Error && d.Line == c.line && d.Field == c.field && strings.Contains(d.Message, c.text) {
					if !strings.HasPrefix(d.String(), "coord.yaml:") {
						t.Errorf("diagnostic %q does not start with FILE:LINE", d)
					}
					return
				}
			}
			t.Errorf("want an error at line %d on %s containing %q; got\n%s", c.line, c.field, c.text, ds)
		})
	}
}
