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
