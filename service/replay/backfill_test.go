package replay

import (
	"bytes"
	"context"
	"strings"
	"testing"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/alarm"
)

// Recorded history months old, evaluated without a service: the
// volts-per-hertz alarm rises after its 5 s on-delay on the rows' own
// times (22 kV on a 20 kV, 50 Hz unit is 1.1 pu, past 1.05 pu); the
// year-1000 typo and the voltage in pu are rejected with their reasons.
func TestBackfill(t *testing.T) {
	fl, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	file := "Time,Unit,P_MW,Q_Mvar,V_kV\n" +
		"2025-01-01T12:00:00Z,harrowmere-1,250,50,20.1\n" +
		"2025-01-01T12:00:01Z,harrowmere-1,250,50,22\n" +
		"2025-01-01T12:00:03Z,harrowmere-1,250,50,22\n" +
		"1025-01-01T12:00:04Z,harrowmere-1,250,50,22\n" +
		"2025-01-01T12:00:06Z,harrowmere-1,250,50,22\n" +
		"2025-01-01T12:00:07Z,harrowmere-1,250,50,1.02\n"
	b, err := RunBackfill(context.Background(), fl, "h.csv", strings.NewReader(file))
	if err != nil {
		t.Fatal(err)
	}
	if b.Rows != 6 || b.Accepted != 4 || len(b.Rejected) != 2 {
		t.Fatalf("rows %d, accepted %d, rejected %v", b.Rows, b.Accepted, b.Rejected)
	}
	if b.Rejected[0].Reason != "out_of_range_time" || b.Rejected[1].Reason != "implausible" || !strings.Contains(b.Rejected[1].Detail, "per unit") {
		t.Errorf("rejections %+v", b.Rejected)
	}
	var vhz *alarm.Event
	for i, e := range b.Alarms {
		if e.Kind == alarm.VoltsPerHertz {
			vhz = &b.Alarms[i]
		}
	}
	if vhz == nil || vhz.Time.Second() != 6 {
		t.Fatalf("volts-per-hertz alarm %+v, want it at 12:00:06 (5 s after 12:00:01)", vhz)
	}
	var out bytes.Buffer
	b.Write(&out)
	for _, want := range []string{"backfill of 6 rows", "least volts_per_hertz margin -0.048", "h.csv:5", "advises only"} {
		if !strings.Contains(out.String(), want) {
			t.Errorf("report lacks %q:\n%s", want, out.String())
		}
	}
}
