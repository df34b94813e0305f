package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"
)

// moduleRoot returns the directory of the go.mod that holds the
// working directory.
func moduleRoot(ctx context.Context) (string, error) {
	out, err := exec.CommandContext(ctx, "go", "env", "GOMOD").Output()
	if err != nil {
		return "", fmt.Errorf("go env GOMOD: %w", err)
	}
	gomod := strings.TrimSpace(string(out))
	if gomod == "" || gomod == os.DevNull {
		return "", errors.New("not inside a Go module: run from the genvelope repository or pass -root")
	}
	return filepath.Dir(gomod), nil
}

// buildGenvelope builds ./cmd/genvelope of the module at root into dir.
func buildGenvelope(ctx context.Context, root, dir string) (string, error) {
	bin := filepath.Join(dir, "genvelope")
	cmd := exec.CommandContext(ctx, "go", "build", "-o", bin, "./cmd/genvelope")
	cmd.Dir = root
	if out, err := cmd.CombinedOutput(); err != nil {
		return "", fmt.Errorf("go build ./cmd/genvelope: %w\n%s", err, out)
	}
	return bin, nil
}

// proc is a server running as a child process.
type proc struct {
	name    string
	cmd     *exec.Cmd
	logPath string
	stdin   io.WriteCloser // the sink ends when it is closed; nil for serve
	done    chan struct{}  // closed when the process has been waited for
	waitErr error

	grpcAddr, httpAddr string
	// companion is a process whose CPU counts with this one's (the
	// nats-server behind a durable service); 0 for none.
	companion int
	// companionPprof is the companion's profiling HTTP address (host:port),
	// "" for none.
	companionPprof string
}

// lineWatcher is the stdout or stderr of a child: it copies everything
// to a log file and hands each complete line to a function.
type lineWatcher struct {
	mu   sync.Mutex
	out  io.Writer
	buf  []byte
	line func(string)
}

func (w *lineWatcher) Write(p []byte) (int, error) {
	w.mu.Lock()
	defer w.mu.Unlock()
	if _, err := w.out.Write(p); err != nil {
		return 0, err
	}
	w.buf = append(w.buf, p...)
	for {
		i := bytes.IndexByte(w.buf, '\n')
		if i < 0 {
			break
		}
		w.line(string(w.buf[:i]))
		w.buf = w.buf[i+1:]
	}
	return len(p), nil
}

// startProc starts bin with args, and env added to the environment; stdout and stderr go to logPath and
// each of their lines to onLine. The child gets SIGTERM should the
// harness die first.
func startProc(name, bin string, args, env []string, logPath string, withStdin bool, onLine func(string)) (*proc, error) {
	f, err := os.Create(logPath)
	if err != nil {
		return nil, err
	}
	w := &lineWatcher{out: f, line: onLine}
	cmd := exec.Command(bin, args...)
	// In the run's directory, so that whatever the child writes by a
	// relative path stays there and goes with it.
	cmd.Dir = filepath.Dir(logPath)
	cmd.Stdout, cmd.Stderr = w, w
	cmd.SysProcAttr = &syscall.SysProcAttr{Pdeathsig: syscall.SIGTERM}
	if len(env) > 0 {
		cmd.Env = append(os.Environ(), env...)
	}
	p := &proc{name: name, cmd: cmd, logPath: logPath, done: make(chan struct{})}
	if withStdin {
		if p.stdin, err = cmd.StdinPipe(); err != nil {
			f.Close()
			return nil, err
		}
	}
	if err := cmd.Start(); err != nil {
		f.Close()
		return nil, fmt.Errorf("start %s: %w", name, err)
	}
	go func() {
		p.waitErr = cmd.Wait()
		f.Close()
		close(p.done)
	}()
	return p, nil
}

// cpu returns the CPU time of the child and its companion together, and
// the companion's alone.
func (p *proc) cpu() (all, companion time.Duration) {
	t, _ := readCPU(p.pid())
	if p.companion != 0 {
		companion, _ = readCPU(p.companion)
	}
	return t + companion, companion
}

// pid returns the child's process id.
func (p *proc) pid() int { return p.cmd.Process.Pid }

// stop sends SIGTERM and waits up to timeout for the child to exit; it
// returns the exit code, or an error when the child had to be killed.
func (p *proc) stop(timeout time.Duration) (int, error) {
	select {
	case <-p.done:
	default:
		if err := p.cmd.Process.Signal(syscall.SIGTERM); err != nil && !errors.Is(err, os.ErrProcessDone) {
			return -1, fmt.Errorf("signal %s: %w", p.name, err)
		}
		t := time.NewTimer(timeout)
		defer t.Stop()
		select {
		case <-p.done:
		case <-t.C:
			if p.stdin != nil {
				p.stdin.Close()
			}
			_ = p.cmd.Process.Kill()
			<-p.done
			return -1, fmt.Errorf("%s did not exit within %s of SIGTERM; killed (log: %s)", p.name, timeout, p.logPath)
		}
	}
	code := p.cmd.ProcessState.ExitCode()
	if code != 0 {
		return code, fmt.Errorf("%s exited with status %d (%v; log: %s)", p.name, code, p.waitErr, p.logPath)
	}
	return 0, nil
}

// exited reports whether the child has ended.
func (p *proc) exited() bool {
	select {
	case <-p.done:
		return true
	default:
		return false
	}
}

// serveFlags returns the flags "genvelope help serve" lists, so that the
// harness passes only those the binary knows.
func serveFlags(ctx context.Context, bin string) (map[string]bool, error) {
	out, err := exec.CommandContext(ctx, bin, "help", "serve").CombinedOutput()
	if err != nil {
		return nil, fmt.Errorf("%s help serve: %w\n%s", bin, err, out)
	}
	flags := map[string]bool{}
	for line := range strings.Lines(string(out)) {
		if f, ok := strings.CutPrefix(strings.TrimSpace(line), "-"); ok && strings.HasPrefix(line, "  -") {
			name, _, _ := strings.Cut(f, " ")
			flags[name] = true
		}
	}
	return flags, nil
}

// startServe starts genvelope serve on ports the kernel picks, reads
// the bound addresses from its JSON log and waits for /readyz.
func startServe(ctx context.Context, log *slog.Logger, name, bin, fleetPath, dir string, pprof, state bool, env, extra []string, timeout time.Duration) (*proc, time.Duration, error) {
	known, err := serveFlags(ctx, bin)
	if err != nil {
		return nil, 0, err
	}
	for _, f := range []string{"fleet", "grpc-listen", "http-listen", "log-format"} {
		if !known[f] {
			return nil, 0, fmt.Errorf("%s serve has no --%s flag; the harness needs it", bin, f)
		}
	}
	args := []string{"serve", "--fleet", fleetPath, "--grpc-listen", "127.0.0.1:0", "--http-listen", "127.0.0.1:0", "--log-format", "json"}
	if pprof {
		if !known["pprof"] {
			return nil, 0, fmt.Errorf("%s serve has no --pprof flag", bin)
		}
		args = append(args, "--pprof")
	}
	// A state file of its own in the run's directory, as in production,
	// or none; never one left by an earlier run, which would hold later
	// timestamps than this run sends.
	if known["state"] {
		if state {
			args = append(args, "--state", filepath.Join(dir, name+"-state.json"))
		} else {
			args = append(args, "--state=")
		}
	}
	args = append(args, extra...)
	type addrs struct{ grpc, http string }
	found := make(chan addrs, 1)
	var once sync.Once
	start := time.Now()
	p, err := startProc("genvelope serve", bin, args, env, filepath.Join(dir, name+".log"), false, func(line string) {
		var rec struct {
			Msg  string `json:"msg"`
			GRPC string `json:"grpc"`
			HTTP string `json:"http"`
		}
		if json.Unmarshal([]byte(line), &rec) == nil && rec.Msg == "genvelope serving" && rec.GRPC != "" && rec.HTTP != "" {
			once.Do(func() { found <- addrs{rec.GRPC, rec.HTTP} })
		}
	})
	if err != nil {
		return nil, 0, err
	}
	fail := func(err error) (*proc, time.Duration, error) {
		_, _ = p.stop(5 * time.Second)
		return nil, 0, fmt.Errorf("%w (log: %s)", err, p.logPath)
	}
	t := time.NewTimer(timeout)
	defer t.Stop()
	select {
	case a := <-found:
		p.grpcAddr, p.httpAddr = a.grpc, a.http
	case <-p.done:
		return fail(errors.New("genvelope serve exited before serving"))
	case <-t.C:
		return fail(fmt.Errorf("genvelope serve did not log its addresses within %s", timeout))
	case <-ctx.Done():
		return fail(ctx.Err())
	}
	client := &http.Client{Timeout: 2 * time.Second}
	for {
		req, _ := http.NewRequestWithContext(ctx, http.MethodGet, "http://"+p.httpAddr+"/readyz", nil)
		if resp, err := client.Do(req); err == nil {
			_, _ = io.Copy(io.Discard, resp.Body)
			resp.Body.Close()
			if resp.StatusCode == http.StatusOK {
				break
			}
		}
		select {
		case <-p.done:
			return fail(errors.New("genvelope serve exited before it was ready"))
		case <-t.C:
			return fail(fmt.Errorf("genvelope serve not ready within %s", timeout))
		case <-ctx.Done():
			return fail(ctx.Err())
		case <-time.After(20 * time.Millisecond):
		}
	}
	took := time.Since(start)
	log.Info("genvelope serve ready", "as", name, "pid", p.pid(), "grpc", p.grpcAddr, "http", p.httpAddr, "startup", took.Round(time.Millisecond))
	return p, took, nil
}

// sinkListenPrefix starts the line a sink prints with its bound address.
const sinkListenPrefix = "LISTEN "

// startSink re-executes this program (or test binary) as a bare sink
// and reads the address it bound.
func startSink(ctx context.Context, log *slog.Logger, dir string, timeout time.Duration, tlsFiles ...string) (*proc, error) {
	exe, err := os.Executable()
	if err != nil {
		return nil, fmt.Errorf("find the harness binary: %w", err)
	}
	found := make(chan string, 1)
	var once sync.Once
	p, err := startProc("bare sink", exe, append([]string{sinkFlag, "127.0.0.1:0"}, tlsFiles...), nil, filepath.Join(dir, "sink.log"), true, func(line string) {
		if a, ok := strings.CutPrefix(line, sinkListenPrefix); ok {
			once.Do(func() { found <- strings.TrimSpace(a) })
		}
	})
	if err != nil {
		return nil, err
	}
	t := time.NewTimer(timeout)
	defer t.Stop()
	select {
	case p.grpcAddr = <-found:
	case <-p.done:
		return nil, fmt.Errorf("the bare sink exited before listening (log: %s)", p.logPath)
	case <-t.C:
		_, _ = p.stop(5 * time.Second)
		return nil, fmt.Errorf("the bare sink did not listen within %s (log: %s)", timeout, p.logPath)
	case <-ctx.Done():
		_, _ = p.stop(5 * time.Second)
		return nil, ctx.Err()
	}
	log.Info("bare sink ready", "pid", p.pid(), "grpc", p.grpcAddr)
	return p, nil
}

// startNATS starts a single JetStream node (nats-server from PATH, or
// bin) on a free loopback port with its store in dir, and waits until
// it takes connections. It returns the process, its URL and, with
// pprof, the address of its profiling HTTP port.
func startNATS(ctx context.Context, log *slog.Logger, bin, dir string, pprof bool, timeout time.Duration) (_ *proc, url, pprofAddr string, _ error) {
	if bin == "" {
		bin = "nats-server"
	}
	path, err := exec.LookPath(bin)
	if err != nil {
		return nil, "", "", fmt.Errorf("-nats needs nats-server (apt-get install nats-server, or -nats-server BIN): %w", err)
	}
	addr, err := freePort()
	if err != nil {
		return nil, "", "", err
	}
	host, port, _ := net.SplitHostPort(addr)
	args := []string{"-js", "-sd", filepath.Join(dir, "jetstream"), "-a", host, "-p", port}
	if pprof {
		if pprofAddr, err = freePort(); err != nil {
			return nil, "", "", err
		}
		_, pport, _ := net.SplitHostPort(pprofAddr)
		args = append(args, "--profile", pport)
	}
	p, err := startProc("nats-server", path, args, nil, filepath.Join(dir, "nats-server.log"), false, func(string) {})
	if err != nil {
		return nil, "", "", err
	}
	deadline := time.Now().Add(timeout)
	for {
		c, err := net.DialTimeout("tcp", addr, time.Second)
		if err == nil {
			c.Close()
			break
		}
		if p.exited() || time.Now().After(deadline) || ctx.Err() != nil {
			_, _ = p.stop(5 * time.Second)
			return nil, "", "", fmt.Errorf("nats-server did not listen on %s (log: %s)", addr, p.logPath)
		}
		time.Sleep(20 * time.Millisecond)
	}
	log.Info("nats-server ready", "pid", p.pid(), "addr", addr, "pprof", pprofAddr)
	return p, "nats://" + addr, pprofAddr, nil
}

// freePort returns a loopback address with a port the kernel had free.
func freePort() (string, error) {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return "", err
	}
	defer ln.Close()
	return ln.Addr().String(), nil
}

// memory is a process's resident set, from /proc/PID/status.
type memory struct {
	RSSKiB int64 `json:"vm_rss_kib"`
	HWMKiB int64 `json:"vm_hwm_kib"`
}

func readMemory(pid int) (memory, error) {
	f, err := os.Open(fmt.Sprintf("/proc/%d/status", pid))
	if err != nil {
		return memory{}, err
	}
	defer f.Close()
	var m memory
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		k, v, ok := strings.Cut(sc.Text(), ":")
		if !ok {
			continue
		}
		var dst *int64
		switch k {
		case "VmRSS":
			dst = &m.RSSKiB
		case "VmHWM":
			dst = &m.HWMKiB
		default:
			continue
		}
		fs := strings.Fields(v)
		if len(fs) == 0 {
			continue
		}
		if *dst, err = strconv.ParseInt(fs[0], 10, 64); err != nil {
			return memory{}, fmt.Errorf("/proc/%d/status %s: %w", pid, k, err)
		}
	}
	return m, sc.Err()
}

// clockTicks is USER_HZ, the unit of the CPU times in /proc/PID/stat;
// it is 100 on every Linux architecture Go supports.
const clockTicks = 100

// readCPU returns the user+system CPU time a process has used.
func readCPU(pid int) (time.Duration, error) {
	b, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", pid))
	if err != nil {
		return 0, err
	}
	// The command name, field 2, is in parentheses and may hold spaces.
	i := bytes.LastIndexByte(b, ')')
	if i < 0 {
		return 0, fmt.Errorf("/proc/%d/stat: no command name", pid)
	}
	fs := strings.Fields(string(b[i+1:]))
	// fs[0] is field 3 (state); utime and stime are fields 14 and 15.
	if len(fs) < 13 {
		return 0, fmt.Errorf("/proc/%d/stat: %d fields", pid, len(fs))
	}
	ut, err1 := strconv.ParseInt(fs[11], 10, 64)
	stt, err2 := strconv.ParseInt(fs[12], 10, 64)
	if err := errors.Join(err1, err2); err != nil {
		return 0, fmt.Errorf("/proc/%d/stat: %w", pid, err)
	}
	return time.Duration(ut+stt) * time.Second / clockTicks, nil
}

// machineCPU returns the CPU time all processes of the machine have
// used (busy, not idle or iowait), from the first line of /proc/stat.
func machineCPU() (time.Duration, error) {
	b, err := os.ReadFile("/proc/stat")
	if err != nil {
		return 0, err
	}
	line, _, _ := bytes.Cut(b, []byte("\n"))
	fs := strings.Fields(string(line))
	if len(fs) < 8 || fs[0] != "cpu" {
		return 0, errors.New("/proc/stat: no cpu line")
	}
	var busy int64
	// user nice system idle iowait irq softirq steal ...: all but idle
	// and iowait; guest time is already in user.
	for i, f := range fs[1:min(len(fs), 9)] {
		if i == 3 || i == 4 {
			continue
		}
		v, err := strconv.ParseInt(f, 10, 64)
		if err != nil {
			return 0, fmt.Errorf("/proc/stat: %w", err)
		}
		busy += v
	}
	return time.Duration(busy) * time.Second / clockTicks, nil
}

// selfCPU returns the CPU time the harness itself has used.
func selfCPU() time.Duration {
	var ru syscall.Rusage
	if err := syscall.Getrusage(syscall.RUSAGE_SELF, &ru); err != nil {
		return 0
	}
	return time.Duration(ru.Utime.Nano() + ru.Stime.Nano())
}
