// Package deploy holds what an operator installs. Its tests read every
// install file (the Kubernetes manifests, the container files, the
// systemd unit, the HA pair's compose file, NATS and Prometheus
// configurations) and check them against the binary's own flags and
// flag parser, the containers that run them, and the hardening they
// promise, with systemd-analyze, nats-server and promtool run for real.
//
// This file: the binary and its flags, the genvelope command lines of
// every install file (one reader per file, one parser of arguments),
// and the checks every command line gets. files_test.go: what each kind
// of file promises beyond its command line.
package deploy

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"

	"go.yaml.in/yaml/v3"

	"github.com/genvelope/genvelope/test/testenv"
)

// stateDir is where every install keeps the state and the journal.
const stateDir = "/var/lib/genvelope"

// binary is a fresh build of genvelope and the flags `genvelope serve`
// accepts, read from its help: whether each takes a value.
type binary struct {
	path  string
	flags map[string]bool
}

func build(t *testing.T) *binary {
	t.Helper()
	b := &binary{path: testenv.BuildGenvelope(t, testenv.ModuleRoot(t), t.TempDir()), flags: map[string]bool{}}
	out, err := exec.Command(b.path, "help", "serve").CombinedOutput()
	if err != nil {
		t.Fatalf("genvelope help serve: %v\n%s", err, out)
	}
	for _, m := range regexp.MustCompile(`(?m)^\s+-([a-z0-9-]+)( \S+)?$`).FindAllStringSubmatch(string(out), -1) {
		b.flags[m[1]] = m[2] != ""
	}
	if len(b.flags) < 20 || !b.flags["nats"] || !b.flags["fleet"] || b.flags["insecure-plaintext"] {
		t.Fatalf("could not read serve's flags from its help:\n%s", out)
	}
	return b
}

// commandLine is one genvelope command line of an install file, with
// what its container or unit offers it.
type commandLine struct {
	where string   // file and service, container or unit
	args  []string // after the program: serve ...
	// hardened: TLS on both listeners, mutual TLS on gRPC, the access
	// file, no --insecure-plaintext (everything but the plaintext HA
	// try-out of the compose file).
	hardened bool
	mounts   []string // writable or mounted paths: volumes, the unit's StateDirectory
	ports    []int    // ports published or declared; nil: the install declares none (systemd)
	// Kubernetes probes: path (or "tcp") by port; nil: no probes.
	readiness, liveness map[int]string
	natsNodes           []string // host:port of the NATS nodes the install runs
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

// strs is a list of scalars as strings.
func strs(v any, keys ...string) []string {
	var out []string
	for _, x := range list(v, keys...) {
		out = append(out, fmt.Sprint(x))
	}
	return out
}

// kubernetesDocs is every object of deploy/kubernetes, with its file.
type kubeObject struct {
	file string
	d    map[string]any
}

func kubernetesDocs(t *testing.T) []kubeObject {
	t.Helper()
	files, _ := filepath.Glob("kubernetes/*.yaml")
	if len(files) == 0 {
		t.Fatal("no manifests in deploy/kubernetes")
	}
	var objs []kubeObject
	for _, f := range files {
		for _, d := range docs(t, f) {
			objs = append(objs, kubeObject{f, d})
		}
	}
	return objs
}

// composeFile is the HA try-out's compose file.
const composeFile = "ha/docker-compose.yml"

// composeImage is the image the compose file builds from ha/Dockerfile.
const composeImage = "genvelope:local"

// composeLines returns the genvelope command lines of the compose file:
// the services that run its image.
func composeLines(t *testing.T) []commandLine {
	t.Helper()
	services, _ := get(docs(t, composeFile)[0], "services").(map[string]any)
	var nats []string
	for name, svc := range services {
		if strings.HasPrefix(str(svc, "image"), "nats:") {
			nats = append(nats, name+":4222") // nats.conf: listen 0.0.0.0:4222
		}
	}
	var out []commandLine
	for name, svc := range services {
		if str(svc, "image") != composeImage {
			continue
		}
		c := commandLine{where: composeFile + " " + name, args: strs(svc, "command"), natsNodes: nats, ports: []int{}}
		for _, v := range strs(svc, "volumes") {
			parts := strings.Split(v, ":")
			c.mounts = append(c.mounts, parts[1])
		}
		for _, p := range strs(svc, "ports") {
			n, err := strconv.Atoi(p[strings.LastIndexByte(p, ':')+1:])
			if err != nil {
				t.Fatalf("%s: port %q", c.where, p)
			}
			c.ports = append(c.ports, n)
		}
		out = append(out, c)
	}
	return out
}

// kubernetesLines returns the genvelope command lines of the manifests:
// every container of a genvelope image.
func kubernetesLines(t *testing.T) []commandLine {
	t.Helper()
	objs := kubernetesDocs(t)
	var nats []string
	for _, o := range objs {
		if str(o.d, "kind") == "StatefulSet" && str(o.d, "metadata", "name") == "genvelope-nats" {
			n, _ := get(o.d, "spec", "replicas").(int)
			for i := range n {
				nats = append(nats, fmt.Sprintf("genvelope-nats-%d.%s:4222", i, str(o.d, "spec", "serviceName")))
			}
		}
	}
	var out []commandLine
	for _, o := range objs {
		for _, ct := range list(o.d, "spec", "template", "spec", "containers") {
			if !strings.HasPrefix(str(ct, "image"), "genvelope") {
				continue
			}
			args := strs(ct, "args")
			switch cmd := strs(ct, "command"); {
			case len(cmd) > 0: // the container's own command: after the program
				args = append(cmd[1:], args...)
			case str(ct, "image") == "genvelope:latest":
				// The image of container/Containerfile: its entrypoint
				// runs serve (TestContainerImages).
				args = append([]string{"serve"}, args...)
			}
			c := commandLine{where: fmt.Sprintf("%s %s %s", o.file, str(o.d, "metadata", "name"), str(ct, "name")), args: args,
				hardened: true, ports: []int{}, readiness: map[int]string{}, liveness: map[int]string{}, natsNodes: nats}
			for _, vm := range list(ct, "volumeMounts") {
				c.mounts = append(c.mounts, str(vm, "mountPath"))
			}
			named := map[string]int{}
			for _, p := range list(ct, "ports") {
				n, _ := get(p, "containerPort").(int)
				c.ports = append(c.ports, n)
				named[str(p, "name")] = n
			}
			portOf := func(v any) int { // a number, or a port's name
				if n, ok := v.(int); ok {
					return n
				}
				return named[fmt.Sprint(v)]
			}
			for probe, into := range map[string]map[int]string{"readinessProbe": c.readiness, "livenessProbe": c.liveness} {
				if g := get(ct, probe, "httpGet"); g != nil {
					into[portOf(get(g, "port"))] = str(g, "path")
				}
				if g := get(ct, probe, "tcpSocket"); g != nil {
					into[portOf(get(g, "port"))] = "tcp"
				}
			}
			out = append(out, c)
		}
	}
	return out
}

// containerFile is what a Containerfile or Dockerfile says.
type containerFile struct {
	entry, cmd, volumes []string
	expose              []int
	user                string
	stateChowned        bool // the state directory is created owned by 65532
}

// readContainerFile reads the instructions the tests look at (JSON
// arrays must be JSON; continued lines are joined).
func readContainerFile(t *testing.T, path string) containerFile {
	t.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var f containerFile
	for _, line := range strings.Split(continued(string(data)), "\n") {
		word, rest, _ := strings.Cut(strings.TrimSpace(line), " ")
		var into *[]string
		switch word {
		case "ENTRYPOINT":
			into = &f.entry
		case "CMD":
			into = &f.cmd
		case "VOLUME":
			into = &f.volumes
		case "EXPOSE":
			for _, p := range strings.Fields(rest) {
				n, err := strconv.Atoi(p)
				if err != nil {
					t.Fatalf("%s: EXPOSE %q", path, p)
				}
				f.expose = append(f.expose, n)
			}
		case "USER":
			f.user = rest
		case "COPY":
			if strings.Contains(rest, "--chown=65532:65532") && strings.HasSuffix(rest, " "+stateDir) {
				f.stateChowned = true
			}
		}
		if into != nil {
			var words []string
			if err := json.Unmarshal([]byte(rest), &words); err != nil {
				t.Fatalf("%s: %s is not a JSON array: %v", path, word, err)
			}
			*into = append(*into, words...)
		}
	}
	return f
}

// continued joins lines ending in a backslash.
func continued(s string) string { return strings.ReplaceAll(s, "\\\n", " ") }

// containerfile is the hardened image's file.
const containerfile = "container/Containerfile"

// containerfileLine returns the command line of the image of
// container/Containerfile: its ENTRYPOINT and CMD, its VOLUME and the
// configuration directory its comment mounts, its EXPOSE.
func containerfileLine(t *testing.T) commandLine {
	t.Helper()
	f := readContainerFile(t, containerfile)
	c := commandLine{where: containerfile, hardened: true, mounts: append([]string{"/etc/genvelope"}, f.volumes...), ports: append([]int{}, f.expose...)}
	if len(f.entry) > 0 {
		c.args = append(slices.Clone(f.entry[1:]), f.cmd...) // after the program
	}
	return c
}

// systemdUnit is the hardened unit file.
const systemdUnit = "systemd/genvelope.service"

// execStart returns the unit's ExecStart program and arguments.
func execStart(t *testing.T, unit string) (bin string, args []string) {
	t.Helper()
	for _, line := range strings.Split(continued(unit), "\n") {
		if rest, ok := strings.CutPrefix(line, "ExecStart="); ok {
			f := strings.Fields(rest)
			if len(f) < 2 {
				t.Fatalf("ExecStart %q: want the binary and serve", rest)
			}
			return f[0], f[1:]
		}
	}
	t.Fatal("no ExecStart")
	return "", nil
}

// systemdLine returns the unit's command line; what it may write is its
// StateDirectory (ProtectSystem=strict makes the rest read-only).
func systemdLine(t *testing.T) commandLine {
	t.Helper()
	data, err := os.ReadFile(systemdUnit)
	if err != nil {
		t.Fatal(err)
	}
	_, args := execStart(t, string(data))
	c := commandLine{where: systemdUnit, args: args, hardened: true}
	for _, line := range strings.Split(string(data), "\n") {
		if dirs, ok := strings.CutPrefix(line, "StateDirectory="); ok {
			for _, d := range strings.Fields(dirs) {
				c.mounts = append(c.mounts, "/var/lib/"+d)
			}
		}
	}
	return c
}

// allLines is every genvelope command line of the install files.
func allLines(t *testing.T) []commandLine {
	t.Helper()
	lines := append(composeLines(t), kubernetesLines(t)...)
	return append(lines, containerfileLine(t), systemdLine(t))
}

// TestInstallFiles builds the binary once and checks every genvelope
// command line of the install files against it, and the systemd unit
// with systemd-analyze.
func TestInstallFiles(t *testing.T) {
	b := build(t)
	lines := allLines(t)
	// The two of the compose file, the manifests' pair, the image, the unit.
	if len(lines) < 5 {
		t.Fatalf("found %d genvelope command lines; want those of the compose file, the manifests, the Containerfile and the unit", len(lines))
	}
	for _, c := range lines {
		t.Run(c.where, func(t *testing.T) { checkLine(t, b, c) })
	}
	t.Run("systemd-analyze", func(t *testing.T) { testSystemdAnalyze(t, b) })
}

// checkLine checks one command line: the binary's own flag parser takes
// it (the line with -h appended); every argument is a flag serve has;
// the fleet, state and journal are given, the state and journal under
// the state directory and on something writable that outlives the
// container; a listener off loopback has TLS or says
// --insecure-plaintext, and a hardened line has TLS, mutual TLS, the web
// configuration and the access file; the listen ports are the ones
// published and probed, /readyz and /healthz are probed on the HTTP
// port; with --nats the URLs are the NATS nodes deployed, with as many
// stream replicas as nodes.
func checkLine(t *testing.T, b *binary, c commandLine) {
	if len(c.args) == 0 || c.args[0] != "serve" {
		t.Fatalf("command %q does not run serve", c.args)
	}
	out, err := exec.Command(b.path, append(slices.Clone(c.args), "-h")...).CombinedOutput()
	if err != nil || !strings.Contains(string(out), "Usage: genvelope serve") {
		t.Errorf("genvelope refuses %q: %v\n%s", c.args, err, out)
	}
	val := map[string]string{}
	for i := 1; i < len(c.args); i++ {
		a := c.args[i]
		if !strings.HasPrefix(a, "-") {
			t.Errorf("stray argument %q (a missing flag, or a subcommand where none belongs)", a)
			continue
		}
		name, v, hasV := strings.Cut(strings.TrimLeft(a, "-"), "=")
		takes, ok := b.flags[name]
		if !ok {
			t.Errorf("genvelope serve has no flag --%s", name)
			continue
		}
		if takes && !hasV && i+1 < len(c.args) {
			i++
			v = c.args[i]
		}
		val[name] = v
	}

	for _, f := range []string{"fleet", "state", "journal"} {
		if val[f] == "" {
			t.Errorf("no --%s", f)
		}
	}
	// The state (the checkpoint with --nats) and the journal: in the
	// state directory, on a volume, not at their defaults relative to the
	// working directory, which is on the image's (read-only, or lost with
	// the container) root.
	for _, f := range []string{"state", "journal"} {
		v := val[f]
		if v == "" {
			continue
		}
		if !strings.HasPrefix(v, stateDir+"/") {
			t.Errorf("--%s %s is not under the state directory %s", f, v, stateDir)
		}
		onVolume := false
		for _, mp := range c.mounts {
			onVolume = onVolume || strings.HasPrefix(v, strings.TrimSuffix(mp, "/")+"/")
		}
		if !onVolume {
			t.Errorf("--%s %q is not on a volume (mounts %v): it must survive the container", f, v, c.mounts)
		}
	}

	_, insecure := val["insecure-plaintext"]
	if c.hardened {
		for _, f := range []string{"grpc-tls-cert", "grpc-tls-key", "grpc-client-ca", "web-config", "access"} {
			if val[f] == "" {
				t.Errorf("hardened, but no --%s", f)
			}
		}
		if insecure {
			t.Error("hardened, but --insecure-plaintext")
		}
	} else if !insecure && (val["grpc-tls-cert"] == "" || val["web-config"] == "") {
		t.Error("listens off loopback without TLS and without --insecure-plaintext: the service refuses to start")
	}

	port := func(flag string) int {
		_, p, err := net.SplitHostPort(val[flag])
		n, err2 := strconv.Atoi(p)
		if err != nil || err2 != nil {
			t.Fatalf("--%s %q is not host:port", flag, val[flag])
		}
		return n
	}
	grpcPort, httpPort := port("grpc-listen"), port("http-listen")
	if c.ports != nil {
		for _, p := range []int{grpcPort, httpPort} {
			if !slices.Contains(c.ports, p) {
				t.Errorf("listens on %d but the container's ports are %v", p, c.ports)
			}
		}
	}
	if c.readiness != nil {
		if got := c.readiness[httpPort]; got != "/readyz" && got != "tcp" {
			t.Errorf("readiness probes %v; want /readyz on the HTTP port %d", c.readiness, httpPort)
		}
		if got, ok := c.liveness[httpPort]; len(c.liveness) > 0 && (!ok || got != "/healthz" && got != "tcp") {
			t.Errorf("liveness probes %v; want /healthz on the HTTP port %d", c.liveness, httpPort)
		}
	}

	if val["nats"] == "" {
		return
	}
	var hosts []string
	for _, u := range strings.Split(val["nats"], ",") {
		pu, err := url.Parse(u)
		if err != nil || pu.Scheme != "nats" {
			t.Errorf("--nats URL %q: %v", u, err)
			continue
		}
		hosts = append(hosts, pu.Host)
	}
	slices.Sort(hosts)
	nodes := slices.Sorted(slices.Values(c.natsNodes))
	if !slices.Equal(hosts, nodes) {
		t.Errorf("--nats names %v; the install runs NATS nodes %v", hosts, nodes)
	}
	if val["nats-replicas"] != strconv.Itoa(len(nodes)) {
		t.Errorf("--nats-replicas %q with %d NATS nodes", val["nats-replicas"], len(nodes))
	}
}
