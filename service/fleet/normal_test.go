package fleet

import (
	"path/filepath"
	"testing"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
)

// The shipped fleets read as normal operation in normal operation: at
// full load (the prime mover's p_max), unity power factor, rated voltage
// and frequency, every unit of the example and the demo fleet is inside
// its envelope and none of its margin alarms is at warning or above
// (a control room's first expectation of a limit monitor; issue 8).
func TestShippedFleetsNormalAtFullLoad(t *testing.T) {
	for _, path := range []string{
		filepath.Join("..", "..", "deploy", "examples", "fleet.yaml"),
		filepath.Join("..", "demo", "demo-fleet.yaml"),
	} {
		f, ds, err := Load(path)
		if err != nil {
			t.Fatal(err)
		}
		if len(ds) != 0 {
			t.Fatalf("%s: want no diagnostics, got\n%s", path, ds)
		}
		for _, u := range f.Units {
			if u.Excitation == nil || u.Machine.Td0TransientS == 0 || u.Machine.XdTransient == 0 || u.Machine.InertiaHS == 0 {
				t.Errorf("%s %s: every shipped unit gives its exciter, T'd0, X'd and H", path, u.ID)
			}
			pt := limits.Point{P: u.Base.PowerPU(u.PrimeMover.PMaxMW), Q: 0, V: 1, F: 1}
			r := u.Model.Evaluate(pt, nil)
			if !r.Feasible {
				t.Errorf("%s %s: full load at unity power factor is infeasible (%v)", path, u.ID, r.Infeasible)
				continue
			}
			for k := alarm.Kind(0); k < alarm.NumKinds; k++ {
				l, ok := marginKind(k)
				if !ok {
					continue
				}
				m := r.Margins[l]
				if !m.OK {
					continue
				}
				// At p_max exactly the prime-mover margin is 0 by definition.
				if l == limits.LimitPrimeMover {
					continue
				}
				if set := u.Alarms[k]; !set.Disabled && m.V <= set.Warning {
					t.Errorf("%s %s: %v margin %.4f at full load, unity power factor, rated voltage: at or below its warning %.3f (q_min %+v by %v)",
						path, u.ID, l, m.V, set.Warning, r.QMin, r.QMinLimit)
				}
			}
		}
	}
}

// marginKind returns the engine limit whose margin alarm kind k watches.
func marginKind(k alarm.Kind) (limits.Limit, bool) {
	for _, l := range limits.Limits() {
		if l.String() == k.String() {
			return l, true
		}
	}
	return limits.NoLimit, false
}
