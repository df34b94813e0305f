package coord

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"html/template"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/service/fleet"
)

func exampleFleet(t *testing.T) (*fleet.Fleet, []byte) {
	t.Helper()
	data, err := os.ReadFile("../../deploy/examples/fleet.yaml")
	if err != nil {
		t.Fatal(err)
	}
	f, ds := fleet.Parse("fleet.yaml", data)
	if ds.HasErrors() {
		t.Fatal(ds)
	}
	return f, data
}

// TestStudyReport: margins in the contract's units, the worst point in
// MW, not_applicable with a null margin and the keys that enable it, and
// the HTML report naming the fleet file's SHA-256 (computed here with
// crypto/sha256) and its date.
func TestStudyReport(t *testing.T) {
	f, data := exampleFleet(t)
	rep := Study(f, "brindle-gt3")
	if len(rep.Units) != 1 || !rep.Failed() {
		t.Fatalf("report %+v: want brindle-gt3 with its failing check", rep)
	}
	c := rep.Units[0].Checks[2]
	if c.Name != "uel_before_loss_of_field" || c.Status != "fail" || c.MarginUnit != "Mvar" || c.Margin == nil || *c.Margin >= 0 ||
		c.Worst == nil || c.Worst.VPU != 0.95 || c.Worst.PMW != 0 || !strings.Contains(c.Detail, "zone 2") {
		t.Errorf("check %+v", c)
	}
	// Without its settings, every check of a unit is not applicable.
	u := *f.Unit("larchwater-2")
	u.Limiters, u.Protection, u.Transformer = fleet.Limiters{}, fleet.Protection{}, nil
	for _, c := range StudyUnit(&u).Checks[3:] {
		if c.Status != "not_applicable" || c.Margin != nil || c.Worst != nil || !strings.HasPrefix(c.Detail, "not applicable: give ") {
			t.Errorf("%+v: want not_applicable", c)
		}
	}
	var b bytes.Buffer
	at := time.Date(2026, 12, 2, 5, 0, 0, 0, time.UTC)
	if err := Study(f).WriteHTML(&b, Source{FleetFile: "fleet.yaml", Data: data, At: at}); err != nil {
		t.Fatal(err)
	}
	sum := sha256.Sum256(data)
	for _, want := range []string{hex.EncodeToString(sum[:]), "2026-12-02 05:00:00 UTC", template.HTMLEscapeString(fleet.Caution), "chart-pq", "chart-rx", "chart-time", "chart-vhz"} {
		if !strings.Contains(b.String(), want) {
			t.Errorf("the HTML report lacks %q", want)
		}
	}
}

// TestShippedUELsLetFullLoadRun: the invented UEL settings of the shipped
// fleets leave room to run at full load and unity power factor at rated
// voltage (q_uel at p_max at most -0.05 pu), as a real setting must; and
// only the one deliberate miscoordination fails in each.
func TestShippedUELsLetFullLoadRun(t *testing.T) {
	for _, c := range []struct{ path, bad string }{
		{"../../deploy/examples/fleet.yaml", "brindle-gt3"},
		{"../demo/demo-fleet.yaml", "tillmoor-gt1"},
	} {
		f, _, err := fleet.Load(c.path)
		if err != nil {
			t.Fatal(err)
		}
		for _, u := range f.Units {
			p := u.Model.Params()
			if p.UEL == nil {
				continue
			}
			if q := p.UEL.At(p.PMax, 1); !q.OK || q.V > -0.05 {
				t.Errorf("%s %s: q_uel at p_max, 1.0 pu is %v pu, want at most -0.05", c.path, u.ID, q)
			}
		}
		for _, u := range Study(f).Units {
			for _, ch := range u.Checks {
				if (ch.Status == "fail") != (u.Unit == c.bad && ch.Name == "uel_before_loss_of_field") {
					t.Errorf("%s %s %s: %s", c.path, u.Unit, ch.Name, ch.Status)
				}
			}
		}
	}
}
