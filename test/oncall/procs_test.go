package oncall

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"sync"
	"syscall"
	"testing"
	"time"
)

// waitLong bounds every wait for a program to come up.
const waitLong = 60 * time.Second

// needTool returns the path of an outside program. Missing, it skips the
// test with how to install it, or fails it when CI=true.
func needTool(t *testing.T, name, install string) string {
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

// moduleRoot returns the directory of the module's go.mod.
func moduleRoot(t *testing.T) string {
	t.Helper()
	dir, err := filepath.Abs(filepath.Join("..", ".."))
	if err != nil {
		t.Fatal(err)
	}
	if _, err := os.Stat(filepath.Join(dir, "go.mod")); err != nil {
		t.Fatalf("module root %s: %v", dir, err)
	}
	return dir
}

// buildGenvelope builds ./cmd/genvelope into dir and returns its path.
func buildGenvelope(t *testing.T, root, dir string) string {
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

// freePort returns a loopback port that was free a moment ago.
func freePort(t *testing.T) int {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	return ln.Addr().(*net.TCPAddr).Port
}

func addr(port int) string { return "127.0.0.1:" + strconv.Itoa(port) }

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

func (w *tail) lines(n int) string {
	w.mu.Lock()
	defer w.mu.Unlock()
	ls := bytes.Split(bytes.TrimRight(w.buf, "\n"), []byte("\n"))
	if len(ls) > n {
		ls = ls[len(ls)-n:]
	}
	return string(bytes.Join(ls, []byte("\n")))
}

// proc is an outside program run by the test, stopped when the test ends
// whatever happens: SIGTERM, then SIGKILL after a grace period.
type proc struct {
	name string
	cmd  *exec.Cmd
	out  *tail
	done chan struct{}
	err  error // set before done is closed
}

func startProc(t *testing.T, name, bin string, args ...string) *proc {
	t.Helper()
	p := &proc{name: name, cmd: exec.Command(bin, args...), out: &tail{}, done: make(chan struct{})}
	p.cmd.Stdout, p.cmd.Stderr = p.out, p.out
	if err := p.cmd.Start(); err != nil {
		t.Fatalf("start %s: %v", name, err)
	}
	go func() { p.err = p.cmd.Wait(); close(p.done) }()
	t.Cleanup(func() {
		if err := p.stop(10 * time.Second); err != nil {
			t.Logf("%s: %v", name, err)
		}
		if t.Failed() {
			t.Logf("%s output, last lines:\n%s", name, p.out.lines(40))
		}
	})
	return p
}

func (p *proc) exited() bool {
	select {
	case <-p.done:
		return true
	default:
		return false
	}
}

func (p *proc) stop(grace time.Duration) error {
	if p.exited() {
		return nil
	}
	_ = p.cmd.Process.Signal(syscall.SIGTERM)
	select {
	case <-p.done:
		return nil
	case <-time.After(grace):
		_ = p.cmd.Process.Kill()
		<-p.done
		return fmt.Errorf("did not stop within %s of SIGTERM: killed", grace)
	}
}

// failf fails the test with the program's state and output tail.
func (p *proc) failf(t *testing.T, format string, args ...any) {
	t.Helper()
	state := "running"
	if p.exited() {
		state = fmt.Sprintf("exited: %v", p.err)
	}
	t.Fatalf("%s; %s (%s), last output:\n%s", fmt.Sprintf(format, args...), p.name, state, p.out.lines(40))
}

// waitHTTP waits until GET url answers 200, failing when it does not
// within waitLong or the program exits.
func (p *proc) waitHTTP(t *testing.T, url string) {
	t.Helper()
	deadline := time.Now().Add(waitLong)
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
		if p.exited() {
			p.failf(t, "GET %s: %s", url, last)
		}
		if time.Now().After(deadline) {
			p.failf(t, "GET %s not 200 within %s: %s", url, waitLong, last)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// get returns the body of GET url, or "" with the error in it, for
// failure messages.
func get(url string) string {
	resp, err := http.Get(url)
	if err != nil {
		return err.Error()
	}
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return string(b)
}
