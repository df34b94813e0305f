package fleet

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
)

// parseBoth parses a fleet file twice: as given (split unit by unit
// when it has the plain shape) and with a comment holding '&' appended,
// which makes the decoder build the whole tree as before. It returns a
// description of each outcome (every diagnostic, every unit with its
// parameters and whether it has a model) and whether the first went the
// split way.
func parseBoth(t *testing.T, text string) (split, tree string, wasSplit bool) {
	t.Helper()
	describe := func(data string) string {
		f, ds := Parse("fleet.yaml", []byte(data))
		var b strings.Builder
		for _, d := range ds {
			fmt.Fprintln(&b, d.String())
		}
		for _, u := range f.Units {
			params, err := json.Marshal(u.Params()) // through the pointers
			fmt.Fprintf(&b, "%s line %d model %v %s %v %v\n", u.ID, u.Line("id"), u.Model != nil, params, err, u.Alarms)
		}
		return b.String()
	}
	_, _, wasSplit = splitUnits([]byte(text))
	return describe(text), describe(text + "\n# & (decode as one tree)\n"), wasSplit
}

// The unit-by-unit decoding gives what the whole tree gives, diagnostic
// for diagnostic (FILE:LINE, field, message) and unit for unit: on the
// shipped fleets, on good.yaml with each of its lines deleted in turn and
// indented by one more space in turn (most of them broken files), and on
// shapes of the units: list written by hand.
func TestSplitMatchesTree(t *testing.T) {
	files := map[string]string{}
	for _, p := range []string{"testdata/good.yaml", "testdata/coord.yaml", "../../deploy/examples/fleet.yaml", "../demo/demo-fleet.yaml"} {
		b, err := os.ReadFile(p)
		if err != nil {
			t.Fatal(err)
		}
		files[filepath.Base(p)] = string(b)
	}
	good := files["good.yaml"]
	lines := strings.SplitAfter(good, "\n")
	for i := range lines {
		files[fmt.Sprintf("good.yaml without line %d", i+1)] = strings.Join(slices.Delete(slices.Clone(lines), i, i+1), "")
		l := slices.Clone(lines)
		l[i] = " " + l[i]
		files[fmt.Sprintf("good.yaml with line %d indented", i+1)] = strings.Join(l, "")
	}
	unit := "  - id: a\n    rating: {mva: 100, kv: 13.8, power_factor: 0.9, frequency_hz: 50, poles: 2}\n" +
		"    machine: {rotor: round, xd: 2.0, xl: 0.15}\n    field: {air_gap_a: 500}\n    prime_mover: {p_max_mw: 85}\n"
	for name, text := range map[string]string{
		"items at column 0":           "units:\n" + strings.ReplaceAll(unit, "\n  ", "\n")[2:],
		"comments between items":      "# top\nunits: # the list\n# first\n" + unit + "\n  # between\n\n" + strings.Replace(unit, "id: a", "id: b", 1) + "# end\n",
		"alarms after units":          "units:\n" + unit + "alarms:\n  limits:\n    stale_telemetry: {warning: 2, critical: 120}\n",
		"duplicate ids":               "units:\n" + unit + unit,
		"a scalar item":               "units:\n  - 5\n" + unit,
		"an empty item":               "units:\n  -\n" + unit,
		"a broken item":               "units:\n" + unit + "  - id: [b\n" + unit,
		"block scalar name":           "units:\n" + strings.Replace(unit, "  - id: a\n", "  - id: a\n    name: |\n      Unit a\n\n      of site x\n", 1),
		"flow list":                   "units: [{id: a}]\n",
		"empty list":                  "units:\n",
		"two units keys":              "units:\n" + unit + "units:\n" + unit,
		"second document":             "units:\n" + unit + "---\nunits:\n" + unit,
		"item less indented":          "units:\n    - id: a\n  - id: b\n",
		"key at item indentation":     "units:\n" + unit + "  id: c\n",
		"unknown top key after units": "units:\n" + unit + "unit:\n  - id: z\n",
	} {
		files[name] = text
	}
	splitCount := 0
	for name, text := range files {
		split, tree, wasSplit := parseBoth(t, text)
		if wasSplit {
			splitCount++
		}
		if split != tree {
			t.Errorf("%s: unit by unit:\n%s\nwhole tree:\n%s", name, split, tree)
		}
	}
	for _, name := range []string{"good.yaml", "fleet.yaml", "demo-fleet.yaml", "items at column 0", "comments between items", "alarms after units", "duplicate ids", "a broken item"} {
		if _, _, ok := splitUnits([]byte(files[name])); !ok {
			t.Errorf("%s: not split", name)
		}
	}
	t.Logf("%d files, %d of them split unit by unit", len(files), splitCount)
}
