// Package prometheus_test checks the Prometheus and Alertmanager files of
// deploy/ with the real promtool and amtool (Debian: apt-get install
// prometheus prometheus-alertmanager), and checks the rules against what
// they promise: every alert documented in README.md, unit-tested, and
// every alarm kind of the service covered.
//
// Without the programs the tests that need them skip, saying how to
// install them, except under CI=true, where they fail.
package prometheus_test

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/test/testenv"

	"go.yaml.in/yaml/v3"

	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/fleet"
)

const (
	rulesFile   = "genvelope.rules.yml"
	testsFile   = "genvelope.rules.test.yml"
	configFile  = "prometheus.yml"
	readmeFile  = "README.md"
	amConfig    = "../alertmanager/alertmanager.yml"
	installProm = "apt-get install prometheus"
	installAM   = "apt-get install prometheus-alertmanager"
)

// run runs a program in this directory and returns its combined output,
// failing the test when it exits non-zero.
func run(t *testing.T, bin string, args ...string) string {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	cmd := exec.CommandContext(ctx, bin, args...)
	var out bytes.Buffer
	cmd.Stdout, cmd.Stderr = &out, &out
	if err := cmd.Run(); err != nil {
		t.Fatalf("%s %s: %v\n%s", filepath.Base(bin), strings.Join(args, " "), err, out.String())
	}
	return out.String()
}

func TestPromtool(t *testing.T) {
	promtool := testenv.NeedTool(t, "promtool", installProm)
	for _, c := range []struct {
		name string
		args []string
		want string
	}{
		{"check rules", []string{"check", "rules", rulesFile}, "SUCCESS"},
		{"test rules", []string{"test", "rules", testsFile}, "SUCCESS"},
		{"check config", []string{"check", "config", configFile}, "is valid prometheus config file"},
	} {
		t.Run(c.name, func(t *testing.T) {
			out := run(t, promtool, c.args...)
			if !strings.Contains(out, c.want) {
				t.Errorf("promtool %s: no %q in\n%s", c.name, c.want, out)
			}
			t.Logf("promtool %s:\n%s", c.name, strings.TrimSpace(out))
		})
	}
}

func TestAmtoolCheckConfig(t *testing.T) {
	amtool := testenv.NeedTool(t, "amtool", installAM)
	out := run(t, amtool, "check-config", amConfig)
	if !strings.Contains(out, "SUCCESS") {
		t.Errorf("amtool check-config: no SUCCESS in\n%s", out)
	}
	t.Logf("amtool check-config:\n%s", strings.TrimSpace(out))
}

// Critical pages the on-call receiver, warning goes to the team, and an
// alert without a severity still reaches someone.
func TestAlertmanagerRoutes(t *testing.T) {
	amtool := testenv.NeedTool(t, "amtool", installAM)
	for _, c := range []struct {
		receiver string
		labels   []string
	}{
		{"genvelope-oncall", []string{"alertname=GenvelopeStabilityLimit", "severity=critical", "unit=harrowmere-1", "site=harrowmere", "limit=stability"}},
		{"genvelope-team", []string{"alertname=GenvelopeStabilityLimit", "severity=warning", "unit=harrowmere-1", "site=harrowmere", "limit=stability"}},
		{"genvelope-oncall", []string{"alertname=GenvelopeDown", "severity=critical", "job=genvelope"}},
		{"genvelope-team", []string{"alertname=GenvelopeFleetReloadFailed", "severity=warning", "job=genvelope"}},
		{"genvelope-team", []string{"alertname=SomethingElse"}},
	} {
		t.Run(strings.Join(c.labels, ","), func(t *testing.T) {
			args := append([]string{"config", "routes", "test", "--config.file=" + amConfig, "--verify.receivers=" + c.receiver}, c.labels...)
			run(t, amtool, args...)
		})
	}
}

// rule is one rule of the rules file, as far as these checks need it.
type rule struct {
	Alert       string            `yaml:"alert"`
	Record      string            `yaml:"record"`
	Expr        string            `yaml:"expr"`
	For         string            `yaml:"for"`
	Labels      map[string]string `yaml:"labels"`
	Annotations map[string]string `yaml:"annotations"`
}

func readRules(t *testing.T) []rule {
	t.Helper()
	data, err := os.ReadFile(rulesFile)
	if err != nil {
		t.Fatal(err)
	}
	var f struct {
		Groups []struct {
			Name  string `yaml:"name"`
			Rules []rule `yaml:"rules"`
		} `yaml:"groups"`
	}
	if err := yaml.Unmarshal(data, &f); err != nil {
		t.Fatalf("%s: %v", rulesFile, err)
	}
	var rs []rule
	for _, g := range f.Groups {
		rs = append(rs, g.Rules...)
	}
	if len(rs) == 0 {
		t.Fatalf("%s: no rules", rulesFile)
	}
	return rs
}

// readmeAnchors returns the anchors of README.md's headings, made the
// way Markdown renderers make them: lower case, spaces to dashes,
// punctuation dropped.
func readmeAnchors(t *testing.T) (map[string]bool, string) {
	t.Helper()
	data, err := os.ReadFile(readmeFile)
	if err != nil {
		t.Fatal(err)
	}
	drop := regexp.MustCompile(`[^a-z0-9 _-]`)
	anchors := map[string]bool{}
	for _, line := range strings.Split(string(data), "\n") {
		if h, ok := strings.CutPrefix(line, "#"); ok {
			h = strings.TrimSpace(strings.TrimLeft(h, "#"))
			anchors[strings.ReplaceAll(drop.ReplaceAllString(strings.ToLower(h), ""), " ", "-")] = true
		}
	}
	return anchors, string(data)
}

// Every alert has a severity of warning or critical, a summary, a
// description and a runbook that points at a section of README.md; every
// alert is unit-tested; the limit alerts page from the service's alarm
// level and honour shelving.
func TestAlertsDocumentedAndTested(t *testing.T) {
	rules := readRules(t)
	anchors, readme := readmeAnchors(t)
	tests, err := os.ReadFile(testsFile)
	if err != nil {
		t.Fatal(err)
	}
	// The sentence as it reads, across line breaks and block quotes.
	plain := strings.Join(strings.Fields(regexp.MustCompile(`(?m)^>`).ReplaceAllString(readme, "")), " ")
	if !strings.Contains(plain, fleet.Caution) {
		t.Errorf("%s does not carry the caution sentence %q", readmeFile, fleet.Caution)
	}
	seen := map[string]bool{}
	for _, r := range rules {
		if r.Alert == "" {
			continue
		}
		where := fmt.Sprintf("alert %s (severity %s)", r.Alert, r.Labels["severity"])
		if s := r.Labels["severity"]; s != "warning" && s != "critical" {
			t.Errorf("%s: severity %q, want warning or critical", where, s)
		}
		for _, a := range []string{"summary", "description", "runbook"} {
			if strings.TrimSpace(r.Annotations[a]) == "" {
				t.Errorf("%s: no %s annotation", where, a)
			}
		}
		rb := r.Annotations["runbook"]
		if file, anchor, ok := strings.Cut(rb, "#"); !ok || file != "deploy/prometheus/README.md" || !anchors[anchor] {
			t.Errorf("%s: runbook %q is not a section of deploy/prometheus/README.md", where, rb)
		} else if anchor != strings.ToLower(r.Alert) {
			t.Errorf("%s: runbook section %q, want the alert's own (%q)", where, anchor, strings.ToLower(r.Alert))
		}
		if r.For == "" {
			t.Errorf("%s: no for: duration", where)
		}
		if strings.Contains(r.Expr, "genvelope_alarm_level") && !strings.Contains(r.Expr, "unless on(unit") {
			t.Errorf("%s: pages from genvelope_alarm_level without leaving out shelved alarms", where)
		}
		if strings.Contains(r.Expr, "genvelope_limit_margin_ratio") {
			t.Errorf("%s: re-derives a threshold from the margins; page from genvelope_alarm_level", where)
		}
		if !seen[r.Alert] && !bytes.Contains(tests, []byte("alertname: "+r.Alert+"\n")) {
			t.Errorf("%s: not tested in %s", where, testsFile)
		}
		seen[r.Alert] = true
	}
}

// Every kind of alarm the service raises has an alert of its own, at
// both severities: a new kind in service/alarm fails here until the
// rules describe it.
func TestEveryAlarmKindHasAlerts(t *testing.T) {
	sel := regexp.MustCompile(`genvelope_alarm_level\{limit(=~?)"([^"]*)"\}`)
	covered := map[string][]string{} // kind -> severities
	for _, r := range readRules(t) {
		for _, m := range sel.FindAllStringSubmatch(r.Expr, -1) {
			for _, k := range strings.Split(m[2], "|") {
				covered[k] = append(covered[k], r.Labels["severity"])
			}
		}
	}
	for _, k := range alarm.Kinds() {
		got := covered[k.String()]
		slices.Sort(got)
		if !slices.Equal(slices.Compact(got), []string{"critical", "warning"}) {
			t.Errorf("alarm kind %s: alerts of severity %v, want one each of critical and warning", k, got)
		}
	}
}
