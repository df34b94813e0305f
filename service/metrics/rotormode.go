package metrics

import (
	"math"
	"sync"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/ingest"
)

// The rotor mode of a unit on the avr basis is an eigen decomposition
// with eigenvectors, 100 µs or more: for every such unit at every
// scrape, a fleet of 10,000 of them would spend a second a scrape on it.
// It is solved again only when the operating point has moved since it
// was last solved by more than rotorModeTolPU in P or Q (pu of rated
// MVA) or rotorModeTolVPU in V, or the unit's model changed (a reload).
// Over such a move the mode's frequency changes by a few thousandths of
// a hertz and its damping ratio by a few ten-thousandths
// (TestRotorModeReuse: 0.002 Hz and 0.0002 on the example fleet's avr
// unit at P 0.7, Q 0.2 pu).
const (
	rotorModeTolPU  = 0.002
	rotorModeTolVPU = 0.001
)

// rotorModes keeps each unit's last solved rotor mode.
type rotorModes struct {
	mu      sync.Mutex
	entries map[*ingest.Unit]*rotorEntry
	gen     uint64 // whole scrapes so far; an entry not used in one is dropped
}

type rotorEntry struct {
	model   *limits.Unit
	pt      limits.Point
	mode    limits.RotorMode
	ok      bool
	usedGen uint64
}

// get returns u's rotor mode at pt, solved again only when pt moved
// beyond the tolerances (or the model changed) since the last solve.
func (r *rotorModes) get(u *ingest.Unit, model *limits.Unit, pt limits.Point) (limits.RotorMode, bool) {
	r.mu.Lock()
	e := r.entries[u]
	gen := r.gen
	if e != nil && e.model == model && math.Abs(e.pt.P-pt.P) <= rotorModeTolPU && math.Abs(e.pt.Q-pt.Q) <= rotorModeTolPU &&
		math.Abs(e.pt.V-pt.V) <= rotorModeTolVPU {
		e.usedGen = gen
		m, ok := e.mode, e.ok
		r.mu.Unlock()
		return m, ok
	}
	r.mu.Unlock()
	m, ok, err := model.RotorMode(pt)
	ok = ok && err == nil && !math.IsNaN(m.FrequencyHz) && !math.IsNaN(m.DampingRatio)
	r.mu.Lock()
	if r.entries == nil {
		r.entries = map[*ingest.Unit]*rotorEntry{}
	}
	r.entries[u] = &rotorEntry{model: model, pt: pt, mode: m, ok: ok, usedGen: gen}
	r.mu.Unlock()
	return m, ok
}

// endWhole ends a whole scrape: entries it did not use (units removed by
// a reload, or no longer on the avr basis) are dropped.
func (r *rotorModes) endWhole() {
	r.mu.Lock()
	defer r.mu.Unlock()
	for u, e := range r.entries {
		if e.usedGen != r.gen {
			delete(r.entries, u)
		}
	}
	r.gen++
}
