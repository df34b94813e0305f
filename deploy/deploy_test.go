// Package deploy holds what an operator installs; its test reads every
// install file (Kubernetes manifests, the container file, the systemd
// unit, the compose file) and checks them against the binary's own
// flags and the hardening they promise.
package deploy

import (
	"bytes"
	"encoding/json"
	"errors"
	"io"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"testing"

	"go.yaml.in/yaml/v3"

	"github.com/genvelope/genvelope/test/testenv"
)

// binary is a fresh build of genvelope and the flags `genvelope serve`
// accepts (from its --help).
type binary struct {
	path  string
	flags map[string]bool
}

func build(t *testing.T) *binary {
	t.Helper()
	b := &binary{path: testenv.BuildGenvelope(t, testenv.ModuleRoot(t), t.TempDir()), flags: map[string]bool{}}
	out, _ := exec.Command(b.path, "serve", "--help").CombinedOutput()
	for _, m := range regexp.MustCompile(`(?m)^\s+-([a-z0-9-]+)`).FindAllStringSubmatch(string(out), -1) {
		b.flags[m[1]] = true
	}
	if len(b.flags) < 10 {
		t.Fatalf("genvelope serve --help listed almost no flags:\n%s", out)
	}
	return b
}

// TestInstallFiles builds the binary once and checks every install file
// against it.
func TestInstallFiles(t *testing.T) {
	b := build(t)
	t.Run("kubernetes", func(t *testing.T) { testKubernetesManifests(t, b) })
	t.Run("containerfile", func(t *testing.T) { testContainerfile(t, b) })
	t.Run("systemd", func(t *testing.T) { testSystemdUnit(t, b) })
	t.Run("compose", func(t *testing.T) { testComposeCommands(t, b) })
}

// checkServeArgs checks the arguments of one `genvelope serve` (after
// the word serve): every flag exists, a listener off loopback has TLS
// or says --insecure-plaintext, and the state and journal files lie
// under writable (the state directory).
func checkServeArgs(t *testing.T, b *binary, where string, args []string, writable string, hardened bool) {
	t.Helper()
	flags := b.flags
	val := map[string]string{}
	for i := 0; i < len(args); i++ {
		a := args[i]
		if !strings.HasPrefix(a, "-") {
			t.Errorf("%s: stray argument %q (a missing flag, or a subcommand where none belongs)", where, a)
			continue
		}
		name, v, hasV := strings.Cut(strings.TrimLeft(a, "-"), "=")
		if !flags[name] {
			t.Errorf("%s: genvelope serve has no flag --%s", where, name)
			continue
		}
		if !hasV && name != "insecure-plaintext" && name != "pprof" && i+1 < len(args) {
			v = args[i+1]
			i++
		}
		val[name] = v
	}
	for _, f := range []string{"fleet", "state", "journal"} {
		if val[f] == "" {
			t.Errorf("%s: no --%s", where, f)
		}
	}
	for _, f := range []string{"state", "journal"} {
		if v := val[f]; v != "" && !strings.HasPrefix(v, writable+"/") {
			t.Errorf("%s: --%s %s is not under the writable %s", where, f, v, writable)
		}
	}
	_, insecure := val["insecure-plaintext"]
	if hardened {
		for _, f := range []string{"grpc-tls-cert", "grpc-tls-key", "grpc-client-ca", "web-config", "access"} {
			if val[f] == "" {
				t.Errorf("%s: hardened, but no --%s", where, f)
			}
		}
		if insecure {
			t.Errorf("%s: hardened, but --insecure-plaintext", where)
		}
	} else if !insecure && (val["grpc-tls-cert"] == "" || val["web-config"] == "") {
		t.Errorf("%s: listens off loopback without TLS and without --insecure-plaintext: the service refuses to start", where)
	}
}

// docs decodes every YAML document of a file (duplicate keys and syntax
// errors fail).
func docs(t *testing.T, path string) []map[string]any {
	t.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	var out []map[string]any
	for {
		var d map[string]any
		err := dec.Decode(&d)
		if errors.Is(err, io.EOF) {
			return out
		}
		if err != nil {
			t.Fatalf("%s: %v", path, err)
		}
		if d != nil {
			out = append(out, d)
		}
	}
}

// get walks a decoded document by keys.
func get(v any, keys ...string) any {
	for _, k := range keys {
		m, ok := v.(map[string]any)
		if !ok {
			return nil
		}
		v = m[k]
	}
	return v
}

func str(v any, keys ...string) string {
	s, _ := get(v, keys...).(string)
	return s
}

func list(v any, keys ...string) []any {
	l, _ := get(v, keys...).([]any)
	return l
}

// The Kubernetes manifests: well-formed objects in the genvelope
// namespace; the genvelope StatefulSet runs two replicas on NATS with
// mutual TLS, the web configuration and the access file from Secrets and
// ConfigMaps, every flag one the binary has; every pod non-root with a
// read-only root filesystem and no capabilities; every volume mounted
// exists; every Service selects pods; every pod has a NetworkPolicy.
func testKubernetesManifests(t *testing.T, b *binary) {
	files, _ := filepath.Glob("kubernetes/*.yaml")
	if len(files) == 0 {
		t.Fatal("no manifests in deploy/kubernetes")
	}
	type obj struct {
		file string
		d    map[string]any
	}
	var objs []obj
	for _, f := range files {
		for _, d := range docs(t, f) {
			objs = append(objs, obj{f, d})
		}
	}
	kinds := map[string]int{}
	podLabels := map[string]bool{}
	policed := map[string]bool{}
	var services []obj
	for _, o := range objs {
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
				cmd := list(c, "command")
				if len(cmd) != 2 || cmd[1] != "serve" {
					t.Errorf("%s: command %v, want the binary and serve", where, cmd)
				}
				var args []string
				for _, a := range list(c, "args") {
					args = append(args, a.(string))
				}
				checkServeArgs(t, b, where, args, "/var/lib/genvelope", true)
				if !slices.ContainsFunc(args, func(a string) bool { return strings.HasPrefix(a, "--nats=") }) {
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

// continued joins lines ending in a backslash.
func continued(s string) string { return strings.ReplaceAll(s, "\\\n", " ") }

// The container file: a non-root user, the state directory owned by it,
// and the default command's flags the binary's.
func testContainerfile(t *testing.T, b *binary) {
	data, err := os.ReadFile("container/Containerfile")
	if err != nil {
		t.Fatal(err)
	}
	text := continued(string(data))
	var entry, cmd []string
	user := ""
	chowned := false
	for _, line := range strings.Split(text, "\n") {
		word, rest, _ := strings.Cut(strings.TrimSpace(line), " ")
		switch word {
		case "ENTRYPOINT":
			if err := json.Unmarshal([]byte(rest), &entry); err != nil {
				t.Fatalf("ENTRYPOINT is not a JSON array: %v", err)
			}
		case "CMD":
			if err := json.Unmarshal([]byte(rest), &cmd); err != nil {
				t.Fatalf("CMD is not a JSON array: %v", err)
			}
		case "USER":
			user = rest
		case "COPY":
			if strings.Contains(rest, "--chown=65532:65532") && strings.HasSuffix(rest, " /var/lib/genvelope") {
				chowned = true
			}
		}
	}
	if user == "" || strings.HasPrefix(user, "0") || strings.HasPrefix(user, "root") {
		t.Errorf("USER %q: want a non-root user", user)
	}
	if !chowned {
		t.Error("the state directory /var/lib/genvelope is not created owned by the image's user")
	}
	if len(entry) != 2 || entry[1] != "serve" {
		t.Fatalf("ENTRYPOINT %v, want the binary and serve", entry)
	}
	checkServeArgs(t, b, "Containerfile CMD", cmd, "/var/lib/genvelope", true)
}

// execStart returns the unit's ExecStart arguments after `serve`.
func execStart(t *testing.T, unit string) (bin string, args []string) {
	t.Helper()
	for _, line := range strings.Split(continued(unit), "\n") {
		if rest, ok := strings.CutPrefix(line, "ExecStart="); ok {
			f := strings.Fields(rest)
			if len(f) < 2 || f[1] != "serve" {
				t.Fatalf("ExecStart %q: want the binary and serve", rest)
			}
			return f[0], f[2:]
		}
	}
	t.Fatal("no ExecStart")
	return "", nil
}

// The systemd unit: its flags the binary's, the sandboxing it promises,
// and `systemd-analyze verify` (with ExecStart pointed at a built
// binary) finding nothing.
func testSystemdUnit(t *testing.T, b *binary) {
	data, err := os.ReadFile("systemd/genvelope.service")
	if err != nil {
		t.Fatal(err)
	}
	unit := string(data)
	bin, args := execStart(t, unit)
	checkServeArgs(t, b, "systemd ExecStart", args, "/var/lib/genvelope", true)
	for _, want := range []string{"User=genvelope", "StateDirectory=genvelope", "NoNewPrivileges=yes", "ProtectSystem=strict",
		"CapabilityBoundingSet=\n", "PrivateDevices=yes", "SystemCallFilter=@system-service", "RestrictAddressFamilies="} {
		if !strings.Contains(unit, want) {
			t.Errorf("the unit lacks %q", strings.TrimSpace(want))
		}
	}
	analyze := testenv.NeedTool(t, "systemd-analyze", "apt-get install systemd")
	built := b.path
	dir := t.TempDir()
	path := filepath.Join(dir, "genvelope.service")
	if err := os.WriteFile(path, []byte(strings.Replace(unit, "ExecStart="+bin, "ExecStart="+built, 1)), 0o644); err != nil {
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

// The compose file of the HA try-out: its genvelope commands are valid
// and start (plaintext off loopback needs --insecure-plaintext).
func testComposeCommands(t *testing.T, b *binary) {
	d := docs(t, "ha/docker-compose.yml")
	n := 0
	for name, svc := range get(d[0], "services").(map[string]any) {
		if !strings.HasPrefix(name, "genvelope") {
			continue
		}
		var args []string
		for _, a := range list(svc, "command") {
			args = append(args, a.(string))
		}
		if len(args) == 0 || args[0] != "serve" {
			t.Errorf("%s: command %v, want serve", name, args)
			continue
		}
		n++
		checkServeArgs(t, b, "compose "+name, args[1:], "/var/lib/genvelope", false)
	}
	if n != 2 {
		t.Errorf("%d genvelope services in the compose file, want the pair", n)
	}
}
