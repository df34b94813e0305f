package limits

import (
	"sync"
	"unsafe"
)

// Tables shares the avr basis' stability tables (stabTable) among units
// whose table-relevant parameters (tableKey) are identical: sister units
// of one design on one grid connection have the same table, so a fleet
// loader builds it once. A Tables is owned by whoever passes it to
// NewShared (the fleet loader keeps one per load); the zero value is not
// usable, make one with NewTables. It is safe for concurrent use: the
// first unit of a key builds the table, units of the same key that come
// while it builds wait for it (a build takes milliseconds and never waits
// on anything). A table is immutable once built.
type Tables struct {
	mu sync.Mutex
	m  map[tableKey]*tableEntry
}

// tableEntry is one shared table; done is closed when t and err are set.
type tableEntry struct {
	done chan struct{}
	t    *stabTable
	err  error
}

// NewTables returns an empty set of shared tables.
func NewTables() *Tables { return &Tables{m: map[tableKey]*tableEntry{}} }

// Len returns the number of distinct tables built (or being built).
func (ts *Tables) Len() int {
	ts.mu.Lock()
	defer ts.mu.Unlock()
	return len(ts.m)
}

// tableKey is every parameter the table depends on, exactly: the
// reactances of the Heffron-Phillips constants (Xd, Xq, X'd, Xe), the
// inertia, damping, frequency and T'd0 of the state matrix, the exciter
// (K_A, T_A, T_R, E_fd,min), the stabilizer and the damping rule
// (zeta_min). The rest of Params (resistance, leakage and Potier
// reactances, saturation, rated values, prime mover, curves, coolant,
// margin) does not enter the table; TestTableKeyIsComplete holds that.
type tableKey struct {
	xd, xq, xd1, xe, h, d, fHz, td0 float64
	ka, ta, tr, efdMin              float64
	pss                             bool
	k, tw, t1, t2, t3, t4           float64
	zetaMin                         float64
}

// tableKeyOf returns the key of p, which has an exciter (the avr basis).
func tableKeyOf(p *Params) tableKey {
	e := p.Exciter
	k := tableKey{xd: p.Xd, xq: p.Xq, xd1: p.XdTransient, xe: p.Xe, h: p.InertiaHS, d: p.DampingPU,
		fHz: p.FrequencyHz, td0: p.Td0TransientS, ka: e.KA, ta: e.TAS, tr: e.TRS, efdMin: e.EfdMin,
		zetaMin: p.ZetaMin}
	if s := p.Stabilizer; s != nil {
		k.pss, k.k, k.tw, k.t1, k.t2, k.t3, k.t4 = true, s.K, s.TWS, s.T1S, s.T2S, s.T3S, s.T4S
	}
	if !e.transducer() {
		k.tr = 0 // a transducer faster than minTransducerS is no state: the same model
	}
	return k
}

// table returns the table of u from ts, building it with build when ts
// has none for u's key.
func (ts *Tables) table(u *Unit, build func() (*stabTable, error)) (*stabTable, error) {
	if ts == nil {
		return build()
	}
	key := tableKeyOf(&u.p)
	ts.mu.Lock()
	e, ok := ts.m[key]
	if !ok {
		e = &tableEntry{done: make(chan struct{})}
		ts.m[key] = e
	}
	ts.mu.Unlock()
	if ok {
		<-e.done
		return e.t, e.err
	}
	defer close(e.done)
	e.err = ErrSmallSignal // stays if build panics: the waiters get an error, not a nil table
	e.t, e.err = build()
	return e.t, e.err
}

// NewShared is New taking the avr stability table from ts when a unit
// with the same table-relevant parameters has built it already, and
// leaving the table it builds there otherwise. A nil ts is New. The unit
// is the same as New's (the table is a function of those parameters
// alone); only the work and the memory are shared.
func NewShared(p Params, ts *Tables) (*Unit, error) {
	return newUnit(p, ts)
}

// TableBytes returns the size in bytes of the avr basis' stability table
// the unit reads (0 on the manual basis): its arrays and header, not the
// unit. Units built through one Tables with the same table parameters
// share one table.
func (u *Unit) TableBytes() int {
	t := u.avrTab
	if t == nil {
		return 0
	}
	return int(unsafe.Sizeof(*t)) + 2*(len(t.low)+len(t.top)) + len(t.moved) + len(t.smooth) + len(t.scan)
}
