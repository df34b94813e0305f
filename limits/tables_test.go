package limits

import (
	"reflect"
	"sync"
	"testing"
)

// The table is a function of the parameters in tableKey alone: changing
// any other parameter leaves it bit for bit the same (so units that
// differ only there may share it), and changing a key parameter changes
// it (so the key is not stale).
func TestTableKeyIsComplete(t *testing.T) {
	base := benchAVR(t).Params()
	ref := mustNew(t, base).avrTab
	for _, tc := range []struct {
		name  string
		edit  func(p *Params)
		same  bool
		short bool
	}{
		{"ra", func(p *Params) { p.Ra = 0.004 }, true, true},
		{"xl and xp", func(p *Params) { p.Xl, p.Xp = 0.12, 0.15 }, true, true},
		{"saturation", func(p *Params) { p.S10, p.S12 = 0.05, 0.2 }, true, true},
		{"rating and prime mover", func(p *Params) { p.PowerFactor, p.PMax, p.PMin, p.IfdRated = 0.9, 0.9, 0.1, 2.6 }, true, true},
		{"margin", func(p *Params) { p.MarginFraction = 0.1 }, true, true},
		{"curves and coolant", func(p *Params) { p.EndRegion, p.Coolant = nil, nil }, true, true},
		{"efd_max", func(p *Params) { p.Exciter.EfdMax = 5 }, true, true},
		{"xe", func(p *Params) { p.Xe = 0.25 }, false, true},
		{"ka", func(p *Params) { p.Exciter.KA = 150 }, false, true},
		{"stabilizer gain", func(p *Params) { p.Stabilizer.K = 12 }, false, false},
		{"td0", func(p *Params) { p.Td0TransientS = 6 }, false, false},
		{"inertia", func(p *Params) { p.InertiaHS = 3 }, false, false},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if testing.Short() && !tc.short {
				t.Skip("-short")
			}
			p := base
			e, s := *base.Exciter, *base.Stabilizer
			p.Exciter, p.Stabilizer = &e, &s
			tc.edit(&p)
			if got := tableKeyOf(&p) == tableKeyOf(&base); got != tc.same {
				t.Fatalf("same key %v, want %v", got, tc.same)
			}
			if got := reflect.DeepEqual(mustNew(t, p).avrTab, ref); got != tc.same {
				t.Errorf("same table %v, want %v", got, tc.same)
			}
		})
	}
}

// NewShared gives sister units, built concurrently, one table, equal to
// the one New builds; a unit of other parameters gets its own.
func TestNewSharedSharesTable(t *testing.T) {
	p := benchAVR(t).Params()
	own := mustNew(t, p).avrTab
	ts := NewTables()
	units := make([]*Unit, 8)
	var wg sync.WaitGroup
	for i := range units {
		wg.Go(func() {
			q := p
			q.PMax = 0.5 + 0.05*float64(i) // not a table parameter
			u, err := NewShared(q, ts)
			if err != nil {
				t.Error(err)
				return
			}
			units[i] = u
		})
	}
	wg.Wait()
	if t.Failed() {
		return
	}
	for i, u := range units {
		if u.avrTab != units[0].avrTab {
			t.Errorf("unit %d has a table of its own", i)
		}
	}
	if !reflect.DeepEqual(units[0].avrTab, own) {
		t.Error("the shared table differs from New's")
	}
	q := p
	q.Xe = 0.3
	other, err := NewShared(q, ts)
	if err != nil {
		t.Fatal(err)
	}
	if other.avrTab == units[0].avrTab || ts.Len() != 2 {
		t.Errorf("a unit of another xe shares the table (%d tables)", ts.Len())
	}
}
