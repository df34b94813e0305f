package web

import (
	"sync"

	"github.com/genvelope/genvelope/service/chart"
	"github.com/genvelope/genvelope/service/ingest"
)

// trails keeps each unit's recent operating points for its chart.
type trails struct {
	mu   sync.Mutex
	max  int
	byID map[string]*trail
}

// trail is one unit's recent operating points, oldest first.
type trail struct {
	pts      []chart.Point
	accepted uint64 // the unit's accepted count at the newest point
	version  uint64 // changes with every point added
}

func (ts *trails) init(max int) {
	ts.max = max
	ts.byID = map[string]*trail{}
}

// sample adds every unit's latest operating point that is new since the
// last call, and forgets units no longer in the fleet.
func (ts *trails) sample(s *ingest.Store) {
	units := s.Units()
	seen := make(map[string]struct{}, len(units))
	for _, u := range units {
		v := u.View()
		id := v.Config.ID
		seen[id] = struct{}{}
		if !v.HasSample {
			continue
		}
		ts.mu.Lock()
		tr := ts.byID[id]
		if tr == nil {
			tr = &trail{}
			ts.byID[id] = tr
		}
		if tr.version == 0 || tr.accepted != v.Accepted {
			if len(tr.pts) == ts.max {
				copy(tr.pts, tr.pts[1:])
				tr.pts = tr.pts[:ts.max-1]
			}
			tr.pts = append(tr.pts, chart.Point{PMW: v.Latest.PMW, QMvar: v.Latest.QMvar})
			tr.accepted = v.Accepted
			tr.version++
		}
		ts.mu.Unlock()
	}
	ts.mu.Lock()
	for id := range ts.byID {
		if _, ok := seen[id]; !ok {
			delete(ts.byID, id)
		}
	}
	ts.mu.Unlock()
}

// get returns a copy of unit id's trail and its version.
func (ts *trails) get(id string) ([]chart.Point, uint64) {
	ts.mu.Lock()
	defer ts.mu.Unlock()
	tr := ts.byID[id]
	if tr == nil {
		return nil, 0
	}
	return append([]chart.Point(nil), tr.pts...), tr.version
}
