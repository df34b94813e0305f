package web

import (
	"math"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/ingest"
)

// The unit page shows the regulator's OEL and SCL timers: the delay used
// and the time to action at the present current, against the
// inverse-time law t = k_s / ((x/pickup)² − 1) of the unit's OEL
// (pickup 1.05 pu, k_s 15 s in the example fleet) held at 1.38 pu of
// the rated field current for 9 s; the SCL, its current below pickup,
// shows none.
func TestLimiterTimersOnUnitPage(t *testing.T) {
	f := newFixture(t, nil)
	cfg := f.store.Fleet().Unit("harrowmere-1")
	ratedA := cfg.Model.RatedFieldCurrent() * cfg.Field.AirGapA
	for at := -11; at <= -1; at++ {
		s := ingest.Sample{UnitID: "harrowmere-1", Time: f.now.Add(time.Duration(at) * time.Second), PMW: 200, QMvar: 50, VKV: 20,
			FieldA: 1.38 * ratedA, HasFieldA: true, Coolant: 414, HasCoolant: true}
		if res, detail := f.store.Accept(f.now, &s); res != ingest.Accepted {
			t.Fatalf("sample at %d s: %s %s", at, res, detail)
		}
	}
	// The first sample is suspect (its current waits for confirmation):
	// the overload counts from the second, 9 s before the last.
	law := 15 / (math.Pow(1.38/1.05, 2) - 1)
	const elapsed = 9.0
	used := elapsed / law
	page := f.get(t, "/units/harrowmere-1").body
	i := strings.Index(page, "regulator limiter")
	if i < 0 {
		t.Fatal("the unit page has no limiter table")
	}
	table := page[i:]
	table = table[:strings.Index(table, "</table>")]
	wantContains(t, "the limiter table", table,
		"Overexcitation limiter (OEL)", "current 1.380 × rating",
		"acts in "+fmtAge(time.Duration((law-elapsed)*float64(time.Second)))+" at this current",
		">"+fmtPct(&used, 0).Text+"<",
		"Stator current limiter (SCL)", "below pickup")
	if strings.Count(table, "<tr>") != 2 {
		t.Errorf("limiter rows: %d, want OEL and SCL", strings.Count(table, "<tr>"))
	}
	// A unit without limiters in the fleet file has no table (none in
	// the example fleet lacks them; the page without samples shows none).
	if body := f.get(t, "/units/larchwater-2").body; strings.Contains(body, "regulator limiter") {
		t.Error("a unit without samples shows a limiter table")
	}
}
