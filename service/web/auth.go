package web

import "net/http"

// signIn notes on a unit page's data who is signed in and whether they
// may act on the unit's alarms (the page hides the actions otherwise;
// the server refuses them anyway), and returns the identity.
func (ui *UI) signIn(r *http.Request, d *unitData) string {
	name, may := ui.opts.Identity(r)
	ok := may(d.Unit.ID)
	for i := range d.AlarmRows {
		d.AlarmRows[i].CanAct = ok
	}
	d.User = name
	return name
}
