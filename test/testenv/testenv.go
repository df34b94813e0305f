// Package testenv is what the end-to-end tests share: finding outside
// programs (skipping locally, failing under CI=true), building genvelope,
// free loopback ports, and running programs that are always stopped when
// the test ends.
package testenv

import (
	"bytes"
	"context"
	"fmt"
	"math"
	"net"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"
)

// WaitLong bounds every wait: generous, since nothing here is about speed.
const WaitLong = 60 * time.Second

// NeedTool returns the path of an outside program. Missing, it skips the
// test with how to install it, or fails it when CI=true.
func NeedTool(t *testing.T, name, install string) string {
	t.Helper()
	p, err := exec.LookPath(name)
	if err == nil {
		return p
	}
	msg := fmt.Sprintf("%s not found on PATH: install it with `%s`", name, install)
	if os.Getenv("CI") == "true" {
		t.Fatalf("%s (CI=true: outside programs are required)", msg)
	}
	t.Skip(msg)
	return ""
}

// ModuleRoot returns the directory of the module's go.mod, found by
// walking up from the test's working directory.
func ModuleRoot(t *testing.T) string {
	t.Helper()
	dir, err := os.Getwd()
	if err != nil {
		t.Fatal(err)
	}
	for {
		if _, err := os.Stat(filepath.Join(dir, "go.mod")); err == nil {
			return dir
		}
		up := filepath.Dir(dir)
		if up == dir {
			t.Fatal("no go.mod above the test's directory")
		}
		dir = up
	}
}

// BuildGenvelope builds ./cmd/genvelope into dir and returns its path.
func BuildGenvelope(t *testing.T, root, dir string) string {
	t.Helper()
	bin := filepath.Join(dir, "genvelope")
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Minute)
	defer cancel()
	cmd := exec.CommandContext(ctx, "go", "build", "-o", bin, "./cmd/genvelope")
	cmd.Dir = root
	if out, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("go build ./cmd/genvelope: %v\n%s", err, out)
	}
	return bin
}

// FreePort returns a loopback port that was free a moment ago.
func FreePort(t *testing.T) int {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	return ln.Addr().(*net.TCPAddr).Port
}

// tail keeps the last bytes written to it, for failure messages.
type tail struct {
	mu  sync.Mutex
	buf []byte
}

const tailKeep = 64 << 10

func (w *tail) Write(p []byte) (int, error) {
	w.mu.Lock()
	defer w.mu.Unlock()
	w.buf = append(w.buf, p...)
	if len(w.buf) > tailKeep {
		w.buf = append([]byte(nil), w.buf[len(w.buf)-tailKeep:]...)
	}
	return len(p), nil
}

// lines returns the last n lines.
func (w *tail) lines(n int) string {
	w.mu.Lock()
	defer w.mu.Unlock()
	ls := bytes.Split(bytes.TrimRight(w.buf, "\n"), []byte("\n"))
	if len(ls) > n {
		ls = ls[len(ls)-n:]
	}
	return string(bytes.Join(ls, []byte("\n")))
}

// Proc is an outside program run by a test. It is stopped when the test
// ends, whatever happens.
type Proc struct {
	name   string
	cmd    *exec.Cmd
	stderr *tail
	done   chan struct{}
	err    error // set before done is closed
}

// StartProc starts bin with args; it is stopped when the test ends.
func StartProc(t *testing.T, name, bin string, args ...string) *Proc {
	t.Helper()
	p := &Proc{name: name, cmd: exec.Command(bin, args...), stderr: &tail{}, done: make(chan struct{})}
	p.cmd.Stdout = p.stderr
	p.cmd.Stderr = p.stderr
	if err := p.cmd.Start(); err != nil {
		t.Fatalf("start %s: %v", name, err)
	}
	go func() { p.err = p.cmd.Wait(); close(p.done) }()
	t.Cleanup(func() {
		if err := p.Stop(10 * time.Second); err != nil && !p.Exited() {
			t.Logf("%s: %v", name, err)
		}
		if t.Failed() {
			t.Logf("%s output, last lines:\n%s", name, p.stderr.lines(40))
		}
	})
	return p
}

// Output returns the last n lines the program wrote (stdout and stderr).
func (p *Proc) Output(n int) string { return p.stderr.lines(n) }

// Exited reports whether the program has ended.
func (p *Proc) Exited() bool {
	select {
	case <-p.done:
		return true
	default:
		return false
	}
}

// Stop sends SIGTERM, waits up to grace, then kills. It returns the
// program's exit error (nil for exit status 0).
func (p *Proc) Stop(grace time.Duration) error {
	if !p.Exited() {
		_ = p.cmd.Process.Signal(syscall.SIGTERM)
		select {
		case <-p.done:
		case <-time.After(grace):
			_ = p.cmd.Process.Kill()
			<-p.done
			return fmt.Errorf("%s did not stop within %s of SIGTERM: killed", p.name, grace)
		}
	}
	return p.err
}

// Failf fails the test with the program's output tail.
func (p *Proc) Failf(t *testing.T, format string, args ...any) {
	t.Helper()
	state := "running"
	if p.Exited() {
		state = fmt.Sprintf("exited: %v", p.err)
	}
	t.Fatalf("%s; %s (%s), last output:\n%s", fmt.Sprintf(format, args...), p.name, state, p.stderr.lines(40))
}

// WaitHTTP waits until GET url answers 200, or fails with the program's
// output when it does not within WaitLong or the program exits.
func (p *Proc) WaitHTTP(t *testing.T, url string) {
	t.Helper()
	deadline := time.Now().Add(WaitLong)
	var last string
	for {
		resp, err := http.Get(url)
		if err == nil {
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				return
			}
			last = resp.Status
		} else {
			last = err.Error()
		}
		if p.Exited() {
			p.Failf(t, "GET %s: %s", url, last)
		}
		if time.Now().After(deadline) {
			p.Failf(t, "GET %s not 200 within %s: %s", url, WaitLong, last)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// Addr returns the loopback address of port.
func Addr(port int) string { return "127.0.0.1:" + strconv.Itoa(port) }

// RelClose reports whether a and b agree within tol relative to the
// larger magnitude.
func RelClose(a, b, tol float64) bool {
	return a == b || math.Abs(a-b) <= tol*math.Max(math.Abs(a), math.Abs(b))
}

// PID returns the program's process id.
func (p *Proc) PID() int { return p.cmd.Process.Pid }

// VmHWM returns the peak resident set size of process pid, in bytes
// (Linux /proc/PID/status), or 0 when it cannot be read.
func VmHWM(pid int) int64 {
	b, err := os.ReadFile(fmt.Sprintf("/proc/%d/status", pid))
	if err != nil {
		return 0
	}
	for _, line := range strings.Split(string(b), "\n") {
		if rest, ok := strings.CutPrefix(line, "VmHWM:"); ok {
			kb, err := strconv.ParseInt(strings.TrimSpace(strings.TrimSuffix(strings.TrimSpace(rest), "kB")), 10, 64)
			if err != nil {
				return 0
			}
			return kb << 10
		}
	}
	return 0
}

// Kill sends SIGKILL and waits until the program is gone.
func (p *Proc) Kill() {
	if !p.Exited() {
		_ = p.cmd.Process.Kill()
		<-p.done
	}
}

// StartNATS starts one JetStream nats-server on a free loopback port with
// its store under dir, stopped when the test ends, and returns its URL.
// It needs the nats-server program (NeedTool); a client retries until
// the server takes connections.
func StartNATS(t *testing.T, dir string) string {
	t.Helper()
	bin := NeedTool(t, "nats-server", "apt-get install nats-server")
	port := FreePort(t)
	StartProc(t, "nats-server", bin, "-js", "-sd", filepath.Join(dir, "js"), "-a", "127.0.0.1", "-p", strconv.Itoa(port))
	return "nats://" + Addr(port)
}
