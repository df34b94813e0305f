package deploy

import (
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"testing"

	"github.com/genvelope/genvelope/test/testenv"
)

// TestKubernetesManifests: well-formed objects in the genvelope
// namespace; the genvelope StatefulSet runs two replicas of serve on
// NATS with the certificates and the web configuration from Secrets;
// every pod non-root with a read-only root filesystem and no
// capabilities; every volume mounted exists; every Service selects pods;
// every pod has a NetworkPolicy. (The genvelope command line itself:
// TestInstallFiles.)
func TestKubernetesManifests(t *testing.T) {
	kinds := map[string]int{}
	podLabels := map[string]bool{}
	policed := map[string]bool{}
	var services []kubeObject
	for _, o := range kubernetesDocs(t) {
		kind, name := str(o.d, "kind"), str(o.d, "metadata", "name")
		where := o.file + ": " + kind + " " + name
		if str(o.d, "apiVersion") == "" || kind == "" || name == "" {
			t.Errorf("%s: apiVersion, kind and metadata.name are required", where)
		}
		kinds[kind]++
		if kind != "Namespace" && str(o.d, "metadata", "namespace") != "genvelope" {
			t.Errorf("%s: not in the genvelope namespace", where)
		}
		switch kind {
		case "StatefulSet", "Deployment":
			pod := get(o.d, "spec", "template", "spec")
			app := str(o.d, "spec", "template", "metadata", "labels", "app")
			podLabels[app] = true
			if sel := str(o.d, "spec", "selector", "matchLabels", "app"); sel != app {
				t.Errorf("%s: selector app=%q, pods app=%q", where, sel, app)
			}
			checkPod(t, where, pod, o.d)
			if name == "genvelope" {
				if r, _ := get(o.d, "spec", "replicas").(int); r < 2 {
					t.Errorf("%s: %d replicas, want the pair", where, r)
				}
				c := list(pod, "containers")[0]
				if cmd := list(c, "command"); len(cmd) != 2 || cmd[1] != "serve" {
					t.Errorf("%s: command %v, want the binary and serve", where, cmd)
				}
				if !slices.ContainsFunc(strs(c, "args"), func(a string) bool { return strings.HasPrefix(a, "--nats=") }) {
					t.Errorf("%s: the pair needs --nats", where)
				}
				secrets := map[string]bool{}
				for _, v := range list(pod, "volumes") {
					if s := str(v, "secret", "secretName"); s != "" {
						secrets[s] = true
					}
				}
				if !secrets["genvelope-tls"] || !secrets["genvelope-web"] {
					t.Errorf("%s: certificates and web configuration must come from the Secrets genvelope-tls and genvelope-web, got %v", where, secrets)
				}
			}
		case "Service":
			services = append(services, o)
		case "NetworkPolicy":
			types := list(o.d, "spec", "policyTypes")
			if !slices.Contains(types, any("Ingress")) || !slices.Contains(types, any("Egress")) {
				t.Errorf("%s: policyTypes %v, want Ingress and Egress", where, types)
			}
			policed[str(o.d, "spec", "podSelector", "matchLabels", "app")] = true
		}
	}
	for _, s := range services {
		if app := str(s.d, "spec", "selector", "app"); !podLabels[app] {
			t.Errorf("%s: Service %s selects app=%q, which no workload runs", s.file, str(s.d, "metadata", "name"), app)
		}
	}
	for app := range podLabels {
		if !policed[app] {
			t.Errorf("pods app=%s have no NetworkPolicy", app)
		}
	}
	if kinds["Namespace"] != 1 || kinds["NetworkPolicy"] < 2 || kinds["StatefulSet"] != 2 {
		t.Errorf("kinds %v: want one Namespace, the two StatefulSets (genvelope, NATS) and their NetworkPolicies", kinds)
	}
}

// checkPod holds a pod spec to the hardening: non-root, read-only root
// filesystem, no privilege escalation, no capabilities, every mount a
// volume, probes on declared ports.
func checkPod(t *testing.T, where string, pod any, workload map[string]any) {
	t.Helper()
	if v, _ := get(pod, "securityContext", "runAsNonRoot").(bool); !v {
		t.Errorf("%s: pod securityContext.runAsNonRoot is not true", where)
	}
	if v, _ := get(pod, "automountServiceAccountToken").(bool); v || get(pod, "automountServiceAccountToken") == nil {
		t.Errorf("%s: automountServiceAccountToken should be false (genvelope needs no API access)", where)
	}
	vols := map[string]bool{}
	for _, v := range list(pod, "volumes") {
		vols[str(v, "name")] = true
	}
	for _, v := range list(workload, "spec", "volumeClaimTemplates") {
		vols[str(v, "metadata", "name")] = true
	}
	for _, c := range list(pod, "containers") {
		cw := where + " container " + str(c, "name")
		if v, _ := get(c, "securityContext", "readOnlyRootFilesystem").(bool); !v {
			t.Errorf("%s: readOnlyRootFilesystem is not true", cw)
		}
		if v, ok := get(c, "securityContext", "allowPrivilegeEscalation").(bool); !ok || v {
			t.Errorf("%s: allowPrivilegeEscalation is not false", cw)
		}
		if !slices.Contains(list(c, "securityContext", "capabilities", "drop"), any("ALL")) {
			t.Errorf("%s: capabilities do not drop ALL", cw)
		}
		for _, m := range list(c, "volumeMounts") {
			if !vols[str(m, "name")] {
				t.Errorf("%s: mounts %q, which is no volume", cw, str(m, "name"))
			}
		}
		ports := map[any]bool{}
		for _, p := range list(c, "ports") {
			ports[get(p, "name")], ports[get(p, "containerPort")] = true, true
		}
		for _, probe := range []string{"readinessProbe", "livenessProbe"} {
			for _, via := range []string{"httpGet", "tcpSocket"} {
				if p := get(c, probe, via, "port"); p != nil && !ports[p] {
					t.Errorf("%s: %s port %v is not one the container declares", cw, probe, p)
				}
			}
		}
	}
}

// TestContainerImages: the hardened image (container/Containerfile) runs
// serve as a non-root user with its state directory owned by that user;
// the HA try-out's image (ha/Dockerfile) runs the bare program, as the
// compose file's commands (which begin with serve) assume; the
// manifests' genvelope:latest is the hardened image (kubernetesLines).
func TestContainerImages(t *testing.T) {
	f := readContainerFile(t, containerfile)
	if f.user == "" || strings.HasPrefix(f.user, "0") || strings.HasPrefix(f.user, "root") {
		t.Errorf("%s: USER %q: want a non-root user", containerfile, f.user)
	}
	if !f.stateChowned {
		t.Errorf("%s: the state directory %s is not created owned by the image's user", containerfile, stateDir)
	}
	for file, want := range map[string][]string{
		containerfile:   {"/usr/local/bin/genvelope", "serve"},
		"ha/Dockerfile": {"/usr/local/bin/genvelope"},
	} {
		if got := readContainerFile(t, file).entry; !slices.Equal(got, want) {
			t.Errorf("%s: ENTRYPOINT %q, want %q", file, got, want)
		}
	}
}

// TestComposeServices: the compose file runs the pair, two genvelope
// services of the image ha/Dockerfile builds, and every service named
// genvelope is one of them (so TestInstallFiles checks its command).
func TestComposeServices(t *testing.T) {
	services, _ := get(docs(t, composeFile)[0], "services").(map[string]any)
	n := 0
	for name, svc := range services {
		img := str(svc, "image")
		if strings.HasPrefix(name, "genvelope") && img != composeImage {
			t.Errorf("%s: service %s runs %q, not %s", composeFile, name, img, composeImage)
		}
		if img == composeImage {
			n++
			if df := str(svc, "build", "dockerfile"); df != "deploy/ha/Dockerfile" {
				t.Errorf("%s: service %s builds from %q, not deploy/ha/Dockerfile", composeFile, name, df)
			}
		}
	}
	if n != 2 {
		t.Errorf("%d genvelope services in the compose file, want the pair", n)
	}
}

// TestSystemdUnit: the sandboxing the unit promises (systemd's own
// verdict on it: TestInstallFiles/systemd-analyze).
func TestSystemdUnit(t *testing.T) {
	data, err := os.ReadFile(systemdUnit)
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{"User=genvelope", "StateDirectory=genvelope", "NoNewPrivileges=yes", "ProtectSystem=strict",
		"CapabilityBoundingSet=\n", "PrivateDevices=yes", "SystemCallFilter=@system-service", "RestrictAddressFamilies="} {
		if !strings.Contains(string(data), want) {
			t.Errorf("the unit lacks %q", strings.TrimSpace(want))
		}
	}
}

// testSystemdAnalyze: `systemd-analyze verify` (with ExecStart pointed at
// the built binary) finds nothing, and `systemd-analyze security` scores
// the sandboxing "OK".
func testSystemdAnalyze(t *testing.T, b *binary) {
	analyze := testenv.NeedTool(t, "systemd-analyze", "apt-get install systemd")
	data, err := os.ReadFile(systemdUnit)
	if err != nil {
		t.Fatal(err)
	}
	unit := string(data)
	bin, _ := execStart(t, unit)
	path := filepath.Join(t.TempDir(), "genvelope.service")
	if err := os.WriteFile(path, []byte(strings.Replace(unit, "ExecStart="+bin, "ExecStart="+b.path, 1)), 0o644); err != nil {
		t.Fatal(err)
	}
	out, err := exec.Command(analyze, "verify", path).CombinedOutput()
	// verify prints warnings about the unit on stderr and exits non-zero
	// on errors; lines about other units of the host are not ours.
	var ours []string
	for _, l := range strings.Split(string(out), "\n") {
		if strings.Contains(l, "genvelope.service") {
			ours = append(ours, l)
		}
	}
	if err != nil || len(ours) > 0 {
		t.Errorf("systemd-analyze verify: %v\n%s", err, out)
	}
	t.Logf("systemd-analyze verify: %v, %d lines of output", err, strings.Count(string(out), "\n"))
	// systemd's own exposure score of the sandboxing (0 best, 10 worst;
	// the threshold is in tenths): the unit promises "OK", at most 2.
	out, err = exec.Command(analyze, "security", "--offline=true", "--threshold=20", path).CombinedOutput()
	lines := strings.Split(strings.TrimSpace(string(out)), "\n")
	if err != nil {
		t.Errorf("systemd-analyze security: exposure above 2.0 (%v): %s", err, lines[len(lines)-1])
	}
	t.Log(lines[len(lines)-1])
}

// TestNATSConfigs: every NATS configuration of deploy/ parses with
// nats-server -t: ha/nats.conf, and the one in the Kubernetes ConfigMap.
// Their variables get values as the containers give them. The Debian
// nats-server may be older than the image the deploy runs (2.10): keys
// it does not know yet (sync_interval, 2.10) are checked by dropping
// them, and the test says so.
func TestNATSConfigs(t *testing.T) {
	bin := testenv.NeedTool(t, "nats-server", "apt-get install nats-server")
	ver, _ := exec.Command(bin, "--version").CombinedOutput()
	old := regexp.MustCompile(`v2\.[0-9]\.`).Match(ver) // before 2.10
	confs := map[string]string{}
	b, err := os.ReadFile("ha/nats.conf")
	if err != nil {
		t.Fatal(err)
	}
	confs["deploy/ha/nats.conf"] = string(b)
	for _, o := range kubernetesDocs(t) {
		if str(o.d, "kind") == "ConfigMap" && str(o.d, "data", "nats.conf") != "" {
			confs[o.file+" ConfigMap "+str(o.d, "metadata", "name")] = str(o.d, "data", "nats.conf")
		}
	}
	if len(confs) < 2 {
		t.Fatalf("found %d NATS configurations", len(confs))
	}
	dir := t.TempDir()
	i := 0
	for name, conf := range confs {
		if old && strings.Contains(conf, "sync_interval") {
			t.Logf("%s: nats-server %s does not know sync_interval (2.10): checked without it", name, strings.TrimSpace(string(ver)))
			conf = regexp.MustCompile(`(?m)^\s*sync_interval:.*$`).ReplaceAllString(conf, "")
		}
		i++
		p := filepath.Join(dir, fmt.Sprintf("nats-%d.conf", i))
		if err := os.WriteFile(p, []byte(conf), 0o644); err != nil {
			t.Fatal(err)
		}
		cmd := exec.Command(bin, "-t", "-c", p)
		cmd.Env = append(os.Environ(), "NATS_NAME=nats1", "POD_NAME=genvelope-nats-0")
		if out, err := cmd.CombinedOutput(); err != nil || !strings.Contains(string(out), "is valid") {
			t.Errorf("%s: nats-server -t: %v\n%s", name, err, out)
		}
	}
}

// TestPrometheusHAConfigs: the HA pair's two Prometheus configurations
// pass promtool check config, scrape both genvelope replicas' HTTP port,
// and differ only in their replica label, so that they send the same
// alerts for the two Alertmanagers to de-duplicate.
func TestPrometheusHAConfigs(t *testing.T) {
	var bodies []string
	for _, f := range []string{"ha/prometheus-a.yml", "ha/prometheus-b.yml"} {
		b, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		bodies = append(bodies, string(b))
		if !strings.Contains(string(b), `"genvelope-a:9471", "genvelope-b:9471"`) {
			t.Errorf("%s does not scrape genvelope-a:9471 and genvelope-b:9471", f)
		}
	}
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
	promtool := testenv.NeedTool(t, "promtool", "apt-get install prometheus")
	for _, f := range []string{"prometheus-a.yml", "prometheus-b.yml"} {
		// From the file's directory: its rule_files are relative to it.
		cmd := exec.Command(promtool, "check", "config", f)
		cmd.Dir = "ha"
		if out, err := cmd.CombinedOutput(); err != nil {
			t.Errorf("promtool check config %s: %v\n%s", f, err, out)
		}
	}
}

// TestREADMEsNameWhatExists: the files the README sections that start
// the HA pair name (compose file, manifests, configurations) exist, and
// the compose command they give is the file's own.
func TestREADMEsNameWhatExists(t *testing.T) {
	root := testenv.ModuleRoot(t)
	ref := regexp.MustCompile(`deploy/[A-Za-z0-9_./-]+\.(?:yml|yaml|conf)`)
	for _, readme := range []string{"README.md", "deploy/ha/README.md", "deploy/prometheus/README.md"} {
		b, err := os.ReadFile(filepath.Join(root, readme))
		if err != nil {
			t.Fatal(err)
		}
		text := string(b)
		for _, p := range ref.FindAllString(text, -1) {
			if _, err := os.Stat(filepath.Join(root, p)); err != nil {
				t.Errorf("%s names %s: %v", readme, p, err)
			}
		}
		if readme != "deploy/prometheus/README.md" && !strings.Contains(strings.Join(strings.Fields(text), " "), "docker compose -f deploy/ha/docker-compose.yml up --build") {
			t.Errorf("%s does not give the command that starts the pair: docker compose -f deploy/ha/docker-compose.yml up --build", readme)
		}
	}
}
