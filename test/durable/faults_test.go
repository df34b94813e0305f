package durable

import (
	"context"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/genvelope/genvelope/test/testenv"
)

// TestNATSUnreachableAtStart: serve exits 1 with an error naming the
// URL it could not reach.
func TestNATSUnreachableAtStart(t *testing.T) {
	if testing.Short() {
		t.Skip("builds genvelope")
	}
	dir := t.TempDir()
	url := "nats://127.0.0.1:" + strings.TrimPrefix(testenv.Addr(testenv.FreePort(t)), "127.0.0.1:")
	cmd := exec.Command(genvelope(t), "serve", "--fleet", fleetFile(t, dir, 2), "--state", filepath.Join(dir, "s.json"),
		"--journal", filepath.Join(dir, "journal.jsonl"), "--grpc-listen", "127.0.0.1:0", "--http-listen", "127.0.0.1:0", "--nats", url)
	out, err := cmd.CombinedOutput()
	var ee *exec.ExitError
	if !errorsAs(err, &ee) || ee.ExitCode() != 1 {
		t.Fatalf("serve with NATS unreachable: %v, want exit status 1; output:\n%s", err, out)
	}
	if !strings.Contains(string(out), url) || !strings.Contains(string(out), "unreachable") {
		t.Errorf("the error does not name %s as unreachable:\n%s", url, out)
	}
}

func errorsAs(err error, ee **exec.ExitError) bool {
	e, ok := err.(*exec.ExitError)
	if ok {
		*ee = e
	}
	return ok
}

// TestNATSLostDuringOperation: while NATS is down, every batch is
// answered UNAVAILABLE and nothing is acknowledged; when it is back the
// service resumes by itself, and what it applied is exactly what it
// acknowledged.
func TestNATSLostDuringOperation(t *testing.T) {
	if testing.Short() {
		t.Skip("starts nats-server and genvelope processes")
	}
	dir := t.TempDir()
	nd := startNATS(t, dir)
	const units = 4
	fleetPath := fleetFile(t, dir, units)
	statePath := filepath.Join(dir, "replica.json")
	r := startReplica(t, fleetPath, statePath, "--nats", nd.url(), "--nats-timeout", "1s")
	batches := newTraffic(units, 60).batches(3, nil)
	half := len(batches) / 2
	for _, b := range batches[:half] {
		pushUntilAnswered(t, r, b)
	}
	nd.proc.Kill()
	resp, err := tryPush(r, batches[half])
	if status.Code(err) != codes.Unavailable {
		t.Fatalf("Push with NATS down: %v, %v; want UNAVAILABLE", resp, err)
	}
	if !strings.Contains(err.Error(), "not acknowledged") {
		t.Errorf("UNAVAILABLE does not say the batch was not acknowledged: %v", err)
	}
	if body, _ := get("http://" + r.http + "/readyz"); !strings.Contains(body, "not connected") {
		t.Errorf("/readyz with NATS down: %q, want it to say not connected", body)
	}
	// The sweeps cannot go through the log: after a few seconds the
	// replica supervises stale telemetry by its own clock.
	deadline := time.Now().Add(testenv.WaitLong)
	for !strings.Contains(r.proc.Output(200), "supervising stale telemetry and shelves by this replica's clock") {
		if time.Now().After(deadline) {
			r.proc.Failf(t, "no supervision by the replica's own clock while NATS is down")
		}
		time.Sleep(100 * time.Millisecond)
	}
	nd.start(t) // same port, same store
	nd.waitJetStream(t, false)
	for _, b := range batches[half:] {
		pushUntilAnswered(t, r, b)
	}
	checkLedger(t, r, statePath, ledgerOf(batches))
}

// TestForeignMessageSkipped: messages on the stream that genvelope did
// not write are logged, counted and skipped; the service goes on.
func TestForeignMessageSkipped(t *testing.T) {
	if testing.Short() {
		t.Skip("starts nats-server and genvelope processes")
	}
	dir := t.TempDir()
	nd := startNATS(t, dir)
	const units = 3
	fleetPath := fleetFile(t, dir, units)
	statePath := filepath.Join(dir, "replica.json")
	r := startReplica(t, fleetPath, statePath, "--nats", nd.url())
	batches := newTraffic(units, 20).batches(2, nil)
	pushUntilAnswered(t, r, batches[0])

	nc, err := nats.Connect(nd.url())
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	ctx, cancel := context.WithTimeout(context.Background(), testenv.WaitLong)
	defer cancel()
	for _, m := range []*nats.Msg{
		{Subject: "genvelope.telemetry.3", Data: []byte("not telemetry")},
		{Subject: "genvelope.telemetry.3", Header: nats.Header{"Genvelope-Format": {"samples/1"}}, Data: []byte{200, 1, 2}},
		{Subject: "genvelope.ops", Header: nats.Header{"Genvelope-Format": {"op/1"}}, Data: []byte(`{"op":"explode"}`)},
		// A sweep in 2200 would make every unit stale and end every shelf.
		{Subject: "genvelope.ops", Header: nats.Header{"Genvelope-Format": {"op/1"}}, Data: []byte(`{"op":"sweep","at_unix_ns":7258118400000000000}`)},
	} {
		if err := nc.PublishMsg(m); err != nil {
			t.Fatal(err)
		}
	}
	if err := nc.FlushWithContext(ctx); err != nil {
		t.Fatal(err)
	}
	for _, b := range batches[1:] {
		pushUntilAnswered(t, r, b)
	}
	deadline := time.Now().Add(testenv.WaitLong)
	for r.metric(t, `genvelope_log_messages_total{result="foreign"}`) != 4 {
		if time.Now().After(deadline) {
			r.proc.Failf(t, "foreign messages counted: %v, want 4", r.metric(t, `genvelope_log_messages_total{result="foreign"}`))
		}
		time.Sleep(50 * time.Millisecond)
	}
	for series, v := range r.metrics(t, "genvelope_unit_data_state") {
		if strings.Contains(series, `state="stale"`) && v != 0 {
			t.Errorf("%s = %v after a foreign sweep in 2200: it was applied", series, v)
		}
	}
	if !strings.Contains(r.proc.Output(200), "foreign message in the log: skipped") {
		t.Error("the foreign messages were not logged")
	}
	checkLedger(t, r, statePath, ledgerOf(batches))
}
