package ha

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

// commandLine is one genvelope command line of the deploy files, with
// what its container offers it.
type commandLine struct {
	where  string   // file and service or container
	args   []string // after the program: serve ...
	mounts []string // volume mount paths in the container
	ports  []int    // container ports published or declared
	// Kubernetes probes: path (or "tcp") by port.
	readiness, liveness map[int]string
	natsNodes           []string // host:port of the NATS nodes the deploy runs
}

func readYAML(t *testing.T, path string) []map[string]any {
	t.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	dec := yaml.NewDecoder(bytes.NewReader(data))
	var docs []map[string]any
	for {
		var d map[string]any
		if err := dec.Decode(&d); errors.Is(err, io.EOF) {
			return docs
		} else if err != nil {
			t.Fatalf("%s: %v", path, err)
		}
		if d != nil {
			docs = append(docs, d)
		}
	}
}

// m and list walk the decoded YAML.
func m(v any, keys ...string) any {
	for _, k := range keys {
		mm, _ := v.(map[string]any)
		v = mm[k]
	}
	return v
}

func list(v any) []any { l, _ := v.([]any); return l }

func strs(v any) []string {
	var out []string
	for _, x := range list(v) {
		out = append(out, fmt.Sprint(x))
	}
	return out
}

// composeLines returns the genvelope command lines of the compose file.
func composeLines(t *testing.T) []commandLine {
	doc := readYAML(t, "docker-compose.yml")[0]
	services, _ := m(doc, "services").(map[string]any)
	var nats []string
	for name, svc := range services {
		if img := fmt.Sprint(m(svc, "image")); strings.HasPrefix(img, "nats:") {
			nats = append(nats, name+":4222") // nats.conf: listen 0.0.0.0:4222
		}
	}
	var out []commandLine
	for name, svc := range services {
		if fmt.Sprint(m(svc, "image")) != "genvelope:local" {
			continue
		}
		c := commandLine{where: "docker-compose.yml " + name, args: strs(m(svc, "command")), natsNodes: nats}
		for _, v := range strs(m(svc, "volumes")) {
			parts := strings.Split(v, ":")
			c.mounts = append(c.mounts, parts[1])
		}
		for _, p := range strs(m(svc, "ports")) {
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

// kubernetesLines returns the genvelope command lines of the manifests.
func kubernetesLines(t *testing.T) []commandLine {
	files, _ := filepath.Glob("../kubernetes/*.yaml")
	var docs []map[string]any
	for _, f := range files {
		docs = append(docs, readYAML(t, f)...)
	}
	var nats []string
	for _, d := range docs {
		if m(d, "kind") == "StatefulSet" && m(d, "metadata", "name") == "genvelope-nats" {
			n, _ := m(d, "spec", "replicas").(int)
			svc := fmt.Sprint(m(d, "spec", "serviceName"))
			for i := range n {
				nats = append(nats, fmt.Sprintf("genvelope-nats-%d.%s:4222", i, svc))
			}
		}
	}
	var out []commandLine
	for _, d := range docs {
		for _, ct := range list(m(d, "spec", "template", "spec", "containers")) {
			if !strings.HasPrefix(fmt.Sprint(m(ct, "image")), "genvelope") {
				continue
			}
			args := strs(m(ct, "args"))
			switch cmd := strs(m(ct, "command")); {
			case len(cmd) > 0: // the container's own command: after the program
				args = append(cmd[1:], args...)
			case m(ct, "image") == "genvelope:latest":
				// The image of deploy/container/Containerfile: its
				// entrypoint runs serve (TestEntrypoints).
				args = append([]string{"serve"}, args...)
			}
			c := commandLine{where: fmt.Sprintf("kubernetes %s %s", m(d, "metadata", "name"), m(ct, "name")), args: args,
				readiness: map[int]string{}, liveness: map[int]string{}, natsNodes: nats}
			for _, vm := range list(m(ct, "volumeMounts")) {
				c.mounts = append(c.mounts, fmt.Sprint(m(vm, "mountPath")))
			}
			named := map[string]int{}
			for _, p := range list(m(ct, "ports")) {
				n, _ := m(p, "containerPort").(int)
				c.ports = append(c.ports, n)
				named[fmt.Sprint(m(p, "name"))] = n
			}
			portOf := func(v any) int { // a number, or a port's name
				if n, ok := v.(int); ok {
					return n
				}
				return named[fmt.Sprint(v)]
			}
			for probe, into := range map[string]map[int]string{"readinessProbe": c.readiness, "livenessProbe": c.liveness} {
				if g := m(ct, probe, "httpGet"); g != nil {
					into[portOf(m(g, "port"))] = fmt.Sprint(m(g, "path"))
				}
				if g := m(ct, probe, "tcpSocket"); g != nil {
					into[portOf(m(g, "port"))] = "tcp"
				}
			}
			out = append(out, c)
		}
	}
	return out
}

// containerfileLine returns the command line of the image of
// deploy/container/Containerfile: its ENTRYPOINT and CMD, its VOLUME,
// the configuration directory its comment mounts, its EXPOSE.
func containerfileLine(t *testing.T) commandLine {
	b, err := os.ReadFile("../container/Containerfile")
	if err != nil {
		t.Fatal(err)
	}
	text := strings.ReplaceAll(string(b), "\\\n", " ")
	c := commandLine{where: "deploy/container/Containerfile", mounts: []string{"/etc/genvelope"}}
	for _, line := range strings.Split(text, "\n") {
		instr, rest, _ := strings.Cut(line, " ")
		var words []string
		switch instr {
		case "ENTRYPOINT", "CMD", "VOLUME":
			if err := json.Unmarshal([]byte(rest), &words); err != nil {
				t.Fatalf("Containerfile %s %s: %v", instr, rest, err)
			}
		case "EXPOSE":
			for _, p := range strings.Fields(rest) {
				n, _ := strconv.Atoi(p)
				c.ports = append(c.ports, n)
			}
		}
		switch instr {
		case "ENTRYPOINT":
			c.args = append(words[1:], c.args...) // after the program
		case "CMD":
			c.args = append(c.args, words...)
		case "VOLUME":
			c.mounts = append(c.mounts, words...)
		}
	}
	return c
}

// serveFlags returns serve's flags from its help, and whether each takes
// a value.
func serveFlags(t *testing.T, bin string) map[string]bool {
	out, err := exec.Command(bin, "help", "serve").CombinedOutput()
	if err != nil {
		t.Fatalf("genvelope help serve: %v\n%s", err, out)
	}
	flags := map[string]bool{}
	for _, sm := range regexp.MustCompile(`(?m)^\s+-([a-z0-9-]+)( \S+)?$`).FindAllStringSubmatch(string(out), -1) {
		flags[sm[1]] = sm[2] != ""
	}
	if len(flags) < 20 || !flags["nats"] || !flags["fleet"] {
		t.Fatalf("could not read serve's flags from its help:\n%s", out)
	}
	return flags
}

// TestGenvelopeCommandLines: every genvelope command line of the compose
// file and the Kubernetes manifests is one the binary accepts (its own
// flag parser: the line with -h appended), and fits its container: the
// listen ports are the ones published and probed, /readyz and /healthz
// are probed on the HTTP port, with --nats the checkpoint and the
// journal are on a volume and the NATS URLs are the nodes deployed, with
// as many stream replicas as nodes.
func TestGenvelopeCommandLines(t *testing.T) {
	if testing.Short() {
		t.Skip("builds genvelope")
	}
	bin := testenv.BuildGenvelope(t, testenv.ModuleRoot(t), t.TempDir())
	known := serveFlags(t, bin)
	lines := append(composeLines(t), kubernetesLines(t)...)
	lines = append(lines, containerfileLine(t))
	if len(lines) < 4 {
		t.Fatalf("found %d genvelope command lines; want the two of the compose file and those of the manifests", len(lines))
	}
	for _, c := range lines {
		t.Run(c.where, func(t *testing.T) {
			if len(c.args) == 0 || c.args[0] != "serve" {
				t.Fatalf("command %q does not run serve", c.args)
			}
			out, err := exec.Command(bin, append(slices.Clone(c.args), "-h")...).CombinedOutput()
			if err != nil || !strings.Contains(string(out), "Usage: genvelope serve") {
				t.Errorf("genvelope refuses %q: %v\n%s", c.args, err, out)
			}
			vals := map[string]string{}
			for i := 1; i < len(c.args); i++ {
				a := c.args[i]
				name, val, hasVal := strings.Cut(strings.TrimLeft(a, "-"), "=")
				takes, ok := known[name]
				if !strings.HasPrefix(a, "-") || !ok {
					t.Errorf("argument %q is not a flag of genvelope serve", a)
					continue
				}
				if takes && !hasVal {
					i++
					if i < len(c.args) {
						val = c.args[i]
					}
				}
				vals[name] = val
			}
			port := func(flag string) int {
				_, p, err := net.SplitHostPort(vals[flag])
				n, err2 := strconv.Atoi(p)
				if err != nil || err2 != nil {
					t.Fatalf("--%s %q is not host:port", flag, vals[flag])
				}
				return n
			}
			grpcPort, httpPort := port("grpc-listen"), port("http-listen")
			for _, p := range []int{grpcPort, httpPort} {
				if !slices.Contains(c.ports, p) {
					t.Errorf("listens on %d but the container's ports are %v", p, c.ports)
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
			// The state (the checkpoint with --nats) and the journal: on
			// a volume, not at their defaults relative to the working
			// directory, which is on the image's (read-only, or lost
			// with the container) root.
			for _, f := range []string{"state", "journal"} {
				v, set := vals[f]
				if set && v == "" {
					continue // keeps none
				}
				onVolume := false
				for _, mp := range c.mounts {
					onVolume = onVolume || strings.HasPrefix(v, strings.TrimSuffix(mp, "/")+"/")
				}
				if !onVolume {
					t.Errorf("--%s %q is not on a volume (mounts %v): it must survive the container", f, v, c.mounts)
				}
			}
			if vals["nats"] == "" {
				return
			}
			var hosts []string
			for _, u := range strings.Split(vals["nats"], ",") {
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
				t.Errorf("--nats names %v; the deploy runs NATS nodes %v", hosts, nodes)
			}
			if vals["nats-replicas"] != strconv.Itoa(len(nodes)) {
				t.Errorf("--nats-replicas %q with %d NATS nodes", vals["nats-replicas"], len(nodes))
			}
		})
	}
	// Prometheus scrapes each replica's HTTP port.
	for _, f := range []string{"prometheus-a.yml", "prometheus-b.yml"} {
		b, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(string(b), `"genvelope-a:9471", "genvelope-b:9471"`) {
			t.Errorf("%s does not scrape genvelope-a:9471 and genvelope-b:9471", f)
		}
	}
}

// TestNATSConfigs: every NATS configuration of deploy/ parses with
// nats-server -t: deploy/ha/nats.conf, and the one in the Kubernetes
// ConfigMap. Their variables get values as the containers give them.
// The Debian nats-server may be older than the image the deploy runs
// (2.10): keys it does not know yet (sync_interval, 2.10) are checked
// by dropping them, and the test says so.
func TestNATSConfigs(t *testing.T) {
	bin := testenv.NeedTool(t, "nats-server", "apt-get install nats-server")
	ver, _ := exec.Command(bin, "--version").CombinedOutput()
	old := regexp.MustCompile(`v2\.[0-9]\.`).Match(ver) // before 2.10
	confs := map[string]string{}
	b, err := os.ReadFile("nats.conf")
	if err != nil {
		t.Fatal(err)
	}
	confs["deploy/ha/nats.conf"] = string(b)
	for _, d := range readYAML(t, "../kubernetes/nats.yaml") {
		if m(d, "kind") == "ConfigMap" {
			confs["deploy/kubernetes/nats.yaml ConfigMap "+fmt.Sprint(m(d, "metadata", "name"))] = fmt.Sprint(m(d, "data", "nats.conf"))
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

// TestEntrypoints: the images the deploy files name run what the
// command lines assume: genvelope:local (deploy/ha/Dockerfile) the bare
// program, genvelope:latest (deploy/container/Containerfile) serve.
func TestEntrypoints(t *testing.T) {
	for file, want := range map[string]string{
		"Dockerfile":                 `ENTRYPOINT ["/usr/local/bin/genvelope"]`,
		"../container/Containerfile": `ENTRYPOINT ["/usr/local/bin/genvelope", "serve"]`,
	} {
		b, err := os.ReadFile(file)
		if err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(string(b), want) {
			t.Errorf("%s has no %s", file, want)
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
