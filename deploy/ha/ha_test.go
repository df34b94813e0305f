// Package ha holds the HA-pair example (deploy/ha): its test checks the
// two Prometheus configurations with promtool and that they send alerts
// the two Alertmanagers can de-duplicate.
package ha

import (
	"os"
	"os/exec"
	"strings"
	"testing"

	"github.com/genvelope/genvelope/test/testenv"
)

func TestPrometheusConfigs(t *testing.T) {
	promtool := testenv.NeedTool(t, "promtool", "apt-get install prometheus")
	var bodies []string
	for _, f := range []string{"prometheus-a.yml", "prometheus-b.yml"} {
		out, err := exec.Command(promtool, "check", "config", f).CombinedOutput()
		if err != nil {
			t.Errorf("promtool check config %s: %v\n%s", f, err, out)
		}
		b, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		bodies = append(bodies, string(b))
	}
	// The two differ only in their replica label (and the comments
	// naming it), so that they raise the same alerts.
	norm := func(s string) string {
		s = strings.ReplaceAll(s, "prometheus_replica: a", "prometheus_replica: X")
		s = strings.ReplaceAll(s, "prometheus_replica: b", "prometheus_replica: X")
		s = strings.ReplaceAll(s, "prometheus-a.yml", "prometheus-X.yml")
		s = strings.ReplaceAll(s, "prometheus-b.yml", "prometheus-X.yml")
		return strings.ReplaceAll(strings.ReplaceAll(s, "Prometheus a ", "Prometheus X "), "Prometheus b ", "Prometheus X ")
	}
	if norm(bodies[0]) != norm(bodies[1]) {
		t.Error("prometheus-a.yml and prometheus-b.yml differ in more than their replica")
	}
}
