package server_test

import (
	"io"
	"net/http"
	"slices"
	"sort"
	"strings"
	"testing"

	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"

	"github.com/genvelope/genvelope/service/server"
)

// partSeries fetches /metrics with a query and returns the identity
// (name and labels, no value) of each series, or the status and body
// when it is not 200.
func partSeries(t *testing.T, r *running, query string) ([]string, int, string) {
	t.Helper()
	resp, err := http.Get(r.base + "/metrics" + query)
	if err != nil {
		t.Fatalf("GET /metrics%s: %v", query, err)
	}
	defer resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		b, _ := io.ReadAll(resp.Body)
		return nil, resp.StatusCode, string(b)
	}
	p := expfmt.NewTextParser(model.UTF8Validation)
	fams, err := p.TextToMetricFamilies(resp.Body)
	if err != nil {
		t.Fatalf("parse /metrics%s: %v", query, err)
	}
	var ids []string
	for name, f := range fams {
		for _, m := range f.Metric {
			var ls []string
			for _, l := range m.Label {
				ls = append(ls, l.GetName()+"="+l.GetValue())
			}
			sort.Strings(ls)
			ids = append(ids, name+"{"+strings.Join(ls, ",")+"}")
		}
	}
	sort.Strings(ids)
	return ids, http.StatusOK, ""
}

// The parts of /metrics a large fleet is scraped in (?units=none, and
// ?shard=I/N or ?site=NAME for the units) add up to the whole /metrics,
// with no series in two parts; a part of the units carries only unit
// series; a bad query is refused with what is allowed.
func TestMetricsParts(t *testing.T) {
	r := start(t, server.Config{})
	whole, _, _ := partSeries(t, r, "")
	fleetOnly, _, _ := partSeries(t, r, "?units=none")
	for _, parts := range [][]string{
		{"?shard=0/3", "?shard=1/3", "?shard=2/3"},
		{"?shard=0/1"},
		{"?site=harrowmere", "?site=larchwater&site=brindle-flats"},
	} {
		sum := slices.Clone(fleetOnly)
		for _, q := range parts {
			ids, code, body := partSeries(t, r, q)
			if code != http.StatusOK {
				t.Fatalf("%s: %d %s", q, code, body)
			}
			for _, id := range ids {
				if !strings.Contains(id, "unit=") {
					t.Errorf("%s: %s is not a unit's series", q, id)
				}
			}
			sum = append(sum, ids...)
		}
		sort.Strings(sum)
		if !slices.Equal(sum, whole) {
			t.Errorf("%v and ?units=none: %d series, the whole /metrics %d", parts, len(sum), len(whole))
		}
	}
	for _, q := range []string{"?shard=3/3", "?shard=1", "?shard=-1/2", "?shard=01/2", "?units=all", "?units=none&site=harrowmere", "?site=a&shard=0/2", "?color=red"} {
		if _, code, body := partSeries(t, r, q); code != http.StatusBadRequest || body == "" {
			t.Errorf("%s: %d %q, want 400 saying what is allowed", q, code, body)
		}
	}
}
