package metrics

import (
	"math"
	"testing"
	"time"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/ingest"
)

// The rotor mode is solved again only when the point moved beyond the
// tolerances: within them the answer kept differs from the direct one by
// under 0.005 Hz and 0.001 of damping ratio (the premise of the
// tolerance), beyond them it is the direct one; a whole scrape drops
// the entries it did not use.
func TestRotorModeReuse(t *testing.T) {
	fl, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	var model *limits.Unit
	for _, u := range fl.Units {
		if u.Model.Params().Basis == limits.BasisAVR {
			model = u.Model
		}
	}
	if model == nil {
		t.Fatal("no unit on the avr basis in the example fleet")
	}
	store := ingest.NewStore(fl, ingest.Options{Now: time.Now})
	u := store.Units()[0]
	direct := func(pt limits.Point) limits.RotorMode {
		m, ok, err := model.RotorMode(pt)
		if !ok || err != nil {
			t.Fatalf("RotorMode(%+v): %v %v", pt, ok, err)
		}
		return m
	}
	var r rotorModes
	a := limits.Point{P: 0.7, Q: 0.2, V: 1.0}
	if m, _ := r.get(u, model, a); m != direct(a) {
		t.Fatalf("first solve %+v, want %+v", m, direct(a))
	}
	near := limits.Point{P: a.P + 0.99*rotorModeTolPU, Q: a.Q - 0.99*rotorModeTolPU, V: a.V + 0.99*rotorModeTolVPU}
	m, _ := r.get(u, model, near)
	if m != direct(a) {
		t.Errorf("within the tolerances: %+v, want the kept %+v", m, direct(a))
	}
	d := direct(near)
	t.Logf("kept %.5f Hz, %.5f; direct at the moved point %.5f Hz, %.5f", m.FrequencyHz, m.DampingRatio, d.FrequencyHz, d.DampingRatio)
	if math.Abs(m.FrequencyHz-d.FrequencyHz) > 5e-3 || math.Abs(m.DampingRatio-d.DampingRatio) > 1e-3 {
		t.Errorf("kept %+v differs from the direct %+v by more than 0.005 Hz or 0.001", m, d)
	}
	far := limits.Point{P: a.P + 2*rotorModeTolPU, Q: a.Q, V: a.V}
	if m, _ := r.get(u, model, far); m != direct(far) {
		t.Errorf("beyond the tolerance: %+v, want %+v", m, direct(far))
	}
	r.endWhole() // used in this scrape: kept
	if len(r.entries) != 1 {
		t.Fatalf("%d entries after a scrape that used one", len(r.entries))
	}
	r.endWhole() // not used: dropped
	if len(r.entries) != 0 {
		t.Errorf("%d entries after a scrape that used none", len(r.entries))
	}
}
