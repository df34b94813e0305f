package replay

import (
	"context"
	"fmt"
	"io"
	"math"
	"slices"
	"sort"
	"strings"
	"time"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/rpc"
)

// Backfill is the evaluation of recorded history against a fleet,
// without a service and without touching any live state: each row is
// checked and evaluated as the service would (plausibility, duplicate
// and time-order rules, thermal memory, alarms with their delays, on
// the rows' own times), in a store of its own.
type Backfill struct {
	File     string
	Rows     int
	Accepted int
	Rejected []Rejection // in file order
	Bad      []RowError
	Units    map[string]*UnitHistory
	Alarms   []alarm.Event // every alarm level change, in order
}

// UnitHistory sums up one unit's history.
type UnitHistory struct {
	Samples     int
	First, Last time.Time
	// The smallest margin of each limit and when.
	MinMargin   map[string]float64
	MinMarginAt map[string]time.Time
	// The largest fraction of short-time thermal capability used.
	PeakArmatureUsed, PeakFieldUsed float64
}

// RunBackfill reads the replay file r (named name) and evaluates its
// rows against fl. ctx ends it early.
func RunBackfill(ctx context.Context, fl *fleet.Fleet, name string, r io.Reader) (*Backfill, error) {
	rd, err := NewReader(name, r)
	if err != nil {
		return nil, err
	}
	// The store's clock follows the rows: every row is "now" when it is
	// placed, so neither the horizon nor the future check refers to the
	// wall clock.
	var now time.Time
	store := ingest.NewStore(fl, ingest.Options{Horizon: math.MaxInt64, Now: func() time.Time { return now }})
	w := store.Hub().Watch(1<<16, func(e *alarm.Event) bool { return e.Change == alarm.LevelChanged })
	defer w.Close()
	b := &Backfill{File: name, Units: map[string]*UnitHistory{}}
	for {
		if err := ctx.Err(); err != nil {
			return b, err
		}
		row, ok, err := rd.Read()
		if err != nil {
			return b, err
		}
		if !ok {
			break
		}
		var smp ingest.Sample
		res, detail := rpc.FromProto(row.Sample, &smp)
		if res == ingest.Accepted {
			now = smp.Time
			res, detail = store.Accept(now, &smp)
		}
		if res != ingest.Accepted {
			if res != ingest.Duplicate {
				b.Rejected = append(b.Rejected, Rejection{Line: row.Line, Unit: smp.UnitID, Reason: res.String(), Detail: detail})
			}
			continue
		}
		b.Accepted++
		b.note(store.Unit(smp.UnitID).View())
		for drained := false; !drained; {
			select {
			case ev := <-w.C:
				b.Alarms = append(b.Alarms, ev)
			default:
				drained = true
			}
		}
	}
	b.Rows, b.Bad = rd.Rows(), rd.Bad()
	return b, nil
}

// note records one evaluated sample of a unit.
func (b *Backfill) note(v ingest.View) {
	h := b.Units[v.Config.ID]
	if h == nil {
		h = &UnitHistory{First: v.Latest.Time, MinMargin: map[string]float64{}, MinMarginAt: map[string]time.Time{}}
		b.Units[v.Config.ID] = h
	}
	h.Samples++
	h.Last = v.Latest.Time
	for _, l := range limits.Limits() {
		m := v.Eval.Margins[l]
		if !m.OK {
			continue
		}
		if old, ok := h.MinMargin[l.String()]; !ok || m.V < old {
			h.MinMargin[l.String()], h.MinMarginAt[l.String()] = m.V, v.Latest.Time
		}
	}
	h.PeakArmatureUsed = max(h.PeakArmatureUsed, v.Armature.Used(limits.ArmatureK))
	h.PeakFieldUsed = max(h.PeakFieldUsed, v.Field.Used(limits.FieldK))
}

// Write prints the report: counts, each unit's least margins and peak
// thermal use, every alarm change, the rejected and unreadable rows,
// and the caution.
func (b *Backfill) Write(w io.Writer) {
	fmt.Fprintf(w, "%s: backfill of %d rows: %d evaluated, %d rejected, %d not readable (no service was contacted; nothing live was changed)\n",
		b.File, b.Rows, b.Accepted, len(b.Rejected), len(b.Bad))
	ids := make([]string, 0, len(b.Units))
	for id := range b.Units {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	for _, id := range ids {
		h := b.Units[id]
		fmt.Fprintf(w, "%s: %d samples from %s to %s; thermal capability used at most: armature %.0f %%, field %.0f %%\n",
			id, h.Samples, h.First.UTC().Format(time.RFC3339), h.Last.UTC().Format(time.RFC3339), 100*h.PeakArmatureUsed, 100*h.PeakFieldUsed)
		names := make([]string, 0, len(h.MinMargin))
		for l := range h.MinMargin {
			names = append(names, l)
		}
		slices.Sort(names)
		for _, l := range names {
			fmt.Fprintf(w, "  least %s margin %.3f at %s\n", l, h.MinMargin[l], h.MinMarginAt[l].UTC().Format(time.RFC3339))
		}
	}
	if len(b.Alarms) > 0 {
		fmt.Fprintf(w, "alarm changes (%d):\n", len(b.Alarms))
		for _, e := range b.Alarms {
			fmt.Fprintf(w, "  %s %s %s %s -> %s: %s\n", e.Time.UTC().Format(time.RFC3339), e.Unit, e.Kind, e.Prev, e.Level, e.Message)
		}
	}
	if len(b.Rejected) > 0 {
		fmt.Fprintln(w, "rejected:")
		for _, r := range b.Rejected {
			fmt.Fprintf(w, "  %s:%d: unit %q: %s: %s\n", b.File, r.Line, r.Unit, r.Reason, r.Detail)
		}
	}
	if len(b.Bad) > 0 {
		fmt.Fprintln(w, "not readable:")
		for _, r := range b.Bad {
			fmt.Fprintf(w, "  %s:%d: %s\n", b.File, r.Line, r.Reason)
		}
	}
	fmt.Fprintln(w, strings.TrimSpace(fleet.Caution))
}

// OK reports whether every row was read and evaluated.
func (b *Backfill) OK() bool { return len(b.Rejected) == 0 && len(b.Bad) == 0 }
