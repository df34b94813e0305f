package fleet

// Subset returns a fleet with the units of f for which keep is true, in
// file order, sharing their configuration with f. A replica that serves
// only some partitions of the fleet serves such a subset.
func (f *Fleet) Subset(keep func(*Unit) bool) *Fleet {
	out := &Fleet{File: f.File, Alarms: f.Alarms, byID: map[string]*Unit{}}
	for _, u := range f.Units {
		if keep(u) {
			out.Units = append(out.Units, u)
			out.byID[u.ID] = u
		}
	}
	return out
}
