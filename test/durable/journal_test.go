package durable

import (
	"context"
	"fmt"
	"net/http"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"google.golang.org/protobuf/types/known/durationpb"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/journal"
	"github.com/genvelope/genvelope/test/testenv"
)

// journalOf returns every entry of r's journal, oldest first.
func journalOf(t *testing.T, r *replica) []*pb.JournalEntry {
	t.Helper()
	jc := pb.NewJournalServiceClient(r.conn)
	var out []*pb.JournalEntry
	token := ""
	for {
		ctx, cancel := context.WithTimeout(context.Background(), testenv.WaitLong)
		resp, err := jc.ListJournal(ctx, &pb.ListJournalRequest{PageSize: 1000, PageToken: token})
		cancel()
		if err != nil {
			t.Fatalf("ListJournal: %v", err)
		}
		out = append(out, resp.Entries...)
		if token = resp.NextPageToken; token == "" {
			break
		}
	}
	slices.Reverse(out)
	return out
}

// journalFile returns the entries from the log in the journal file at
// path (of a stopped replica), oldest first, as ListJournal gives them.
func journalFile(t *testing.T, path string) []*pb.JournalEntry {
	t.Helper()
	j, err := journal.Open(path, journal.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer j.Close()
	es, more, err := j.Matching(journal.Filter{}, 1<<20)
	if err != nil || more {
		t.Fatalf("reading %s: %v (more %v)", path, err, more)
	}
	var out []*pb.JournalEntry
	for i := len(es) - 1; i >= 0; i-- {
		e := es[i]
		if e.LogSeq == 0 {
			continue
		}
		out = append(out, &pb.JournalEntry{Time: timestamppb.New(e.Time), UnitId: e.Unit, Limit: e.Limit, Change: e.Change,
			Level: e.Level, PreviousLevel: e.Prev, Value: e.Value, Threshold: e.Threshold, Actual: e.Actual, LimitValue: e.LimitAt,
			Units: e.Units, Message: e.Message, Operator: e.Operator, LogSeq: e.LogSeq})
	}
	return out
}

// waitSequence waits until r has applied the log up to seq.
func waitSequence(t *testing.T, r *replica, seq uint64) {
	t.Helper()
	deadline := time.Now().Add(testenv.WaitLong)
	for appliedSeq(t, r) < seq {
		if time.Now().After(deadline) {
			t.Fatalf("applied %d, want %d", appliedSeq(t, r), seq)
		}
		time.Sleep(50 * time.Millisecond)
	}
}

// journalLine is what two replicas' journals must agree on for an entry
// from the log: everything but the journal's own numbering and the wall
// clock at which it was written.
func journalLine(e *pb.JournalEntry) string {
	f := func(x *float64) string {
		if x == nil {
			return "-"
		}
		return fmt.Sprint(*x)
	}
	return fmt.Sprintf("seq %d | %s | %s %s | %s %s<-%s | value %s thr %s actual %s limit %s %s | %s | %s",
		e.LogSeq, e.Time.AsTime().UTC().Format(time.RFC3339Nano), e.UnitId, e.Limit, e.Change, e.Level, e.PreviousLevel,
		f(e.Value), f(e.Threshold), f(e.Actual), f(e.LimitValue), e.Units, e.Operator, e.Message)
}

// waitFile waits until path exists.
func waitFile(t *testing.T, path string) {
	t.Helper()
	deadline := time.Now().Add(testenv.WaitLong)
	for {
		if _, err := os.Stat(path); err == nil {
			return
		}
		if time.Now().After(deadline) {
			t.Fatalf("%s not written", path)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// appliedSeq is the last log sequence r has applied.
func appliedSeq(t *testing.T, r *replica) uint64 {
	return uint64(r.metric(t, "genvelope_log_applied_sequence"))
}

// TestReplicasJournalsAgree: two replicas take the traffic in turn and
// operator actions of every kind through either (acknowledge, shelve,
// unshelve, reset, discard, reload); one of them is killed with SIGKILL
// between its checkpoints and restarted from the last. Their journals
// then hold the same entries (time, unit, limit, change, levels,
// quantities, operator, sentence, log sequence) in the same order:
// every entry is written from the log, none twice, none lost.
func TestReplicasJournalsAgree(t *testing.T) {
	if testing.Short() {
		t.Skip("starts nats-server and genvelope processes")
	}
	dir := t.TempDir()
	nd := startNATS(t, dir)
	const units = 4
	fleetPath := fleetFile(t, dir, units)
	// Telemetry stale after 3 s, so that the wall-clock supervision
	// raises its alarms within the test.
	body, err := os.ReadFile(fleetPath)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(fleetPath, append([]byte("alarms:\n  limits:\n    stale_telemetry: {warning: 3, critical: 6}\n"), body...), 0o644); err != nil {
		t.Fatal(err)
	}
	a := startReplica(t, fleetPath, filepath.Join(dir, "a.json"), "--nats", nd.url(), "--nats-checkpoint-interval", "200ms")
	b := startReplica(t, fleetPath, filepath.Join(dir, "b.json"), "--nats", nd.url(), "--nats-checkpoint-interval", "2s")
	tr := newTraffic(units, 90)
	batches := tr.batches(2, nil)
	first, second := batches[:15], batches[15:]
	for i, batch := range first {
		pushUntilAnswered(t, []*replica{a, b}[i%2], batch)
	}

	waitFile(t, filepath.Join(dir, "b.json")) // b's first checkpoint

	ctx, cancel := context.WithTimeout(context.Background(), testenv.WaitLong)
	defer cancel()
	ja, jb := pb.NewJournalServiceClient(a.conn), pb.NewJournalServiceClient(b.conn)
	// The traffic overloads every field: its alarm is active.
	if _, err := a.alarms.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: unitID(1), Limit: "field", Operator: "desk 1"}); err != nil {
		t.Fatalf("AcknowledgeAlarm: %v", err)
	}
	if _, err := b.alarms.ShelveAlarm(ctx, &pb.ShelveAlarmRequest{UnitId: unitID(2), Limit: "field", Duration: durationpb.New(time.Hour), Operator: "desk 2"}); err != nil {
		t.Fatalf("ShelveAlarm: %v", err)
	}
	if _, err := a.alarms.ShelveAlarm(ctx, &pb.ShelveAlarmRequest{UnitId: unitID(2), Limit: "field", Operator: "desk 1"}); err != nil {
		t.Fatalf("unshelve: %v", err)
	}
	// A shelf that a sweep ends.
	if _, err := b.alarms.ShelveAlarm(ctx, &pb.ShelveAlarmRequest{UnitId: unitID(3), Limit: "field", Duration: durationpb.New(2 * time.Second), Operator: "desk 2"}); err != nil {
		t.Fatalf("ShelveAlarm for 2 s: %v", err)
	}
	if _, err := jb.ResetThermal(ctx, &pb.ResetThermalRequest{UnitId: unitID(0), Winding: "field", Operator: "engineer", Reason: "sensor fault"}); err != nil {
		t.Fatalf("ResetThermal: %v", err)
	}
	last := first[len(first)-1]
	if _, err := ja.DiscardSample(ctx, &pb.DiscardSampleRequest{UnitId: unitID(3), Time: last[len(last)-1].Time, Operator: "engineer", Reason: "spike"}); err != nil {
		t.Fatalf("DiscardSample: %v", err)
	}
	// Refused before the log: no operator; a sample not among the recent.
	if _, err := ja.ResetThermal(ctx, &pb.ResetThermalRequest{UnitId: unitID(0)}); err == nil {
		t.Error("ResetThermal without an operator was accepted")
	}
	if _, err := jb.DiscardSample(ctx, &pb.DiscardSampleRequest{UnitId: unitID(3), Time: first[0][0].Time, Operator: "engineer"}); err == nil {
		t.Error("DiscardSample of an old sample was accepted")
	}
	resp, err := http.Post("http://"+b.http+"/-/reload", "", nil)
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	if resp.StatusCode != http.StatusOK {
		t.Fatalf("reload: %s", resp.Status)
	}

	// b dies right after the actions, between its checkpoints (every
	// 2 s), and comes back from the last one: it applies the log again
	// from there, and its journal, ahead of the checkpoint, must take
	// nothing twice.
	b.proc.Kill()
	for _, batch := range second[:10] {
		pushUntilAnswered(t, a, batch)
	}
	b.start(t)
	if !strings.Contains(b.proc.Output(200), "checkpoint restored") {
		t.Error("the restart did not restore a checkpoint")
	}
	if n := b.metric(t, "genvelope_journal_replayed_entries_total"); !(n > 0) {
		t.Errorf("journal entries skipped on the replay after the restart: %v; want some (the actions came after the checkpoint)", n)
	}
	for i, batch := range second[10:] {
		pushUntilAnswered(t, []*replica{a, b}[i%2], batch)
	}
	// The telemetry stops: the sweeps raise stale telemetry to critical
	// on every unit, at the same place in the log on both replicas.
	staleCritical := func(r *replica) int {
		n := 0
		for _, e := range journalOf(t, r) {
			if e.Limit == "stale_telemetry" && e.Level == "critical" {
				n++
			}
		}
		return n
	}
	for deadline := time.Now().Add(testenv.WaitLong); staleCritical(a) < units || staleCritical(b) < units; {
		if time.Now().After(deadline) {
			t.Fatalf("stale telemetry not critical on every unit of both replicas: %d, %d", staleCritical(a), staleCritical(b))
		}
		time.Sleep(200 * time.Millisecond)
	}
	// The same alarms, with the same states, on both.
	alarmsOf := func(r *replica) []string {
		ctx, cancel := context.WithTimeout(context.Background(), testenv.WaitLong)
		defer cancel()
		resp, err := r.alarms.ListAlarms(ctx, &pb.ListAlarmsRequest{})
		if err != nil {
			t.Fatal(err)
		}
		var out []string
		for _, ev := range resp.Alarms {
			out = append(out, fmt.Sprintf("%s %s %s since %s ack %v shelved %v value %v", ev.UnitId, ev.Limit, ev.Level,
				ev.Time.AsTime().Format(time.RFC3339Nano), ev.Acknowledged, ev.GetShelvedUntil().AsTime(), ev.Value))
		}
		return out
	}
	aa, ab := sameMoment(t, a, b, alarmsOf)
	if len(aa) == 0 || !slices.Equal(aa, ab) {
		t.Errorf("active alarms differ:\n first  %q\n second %q", aa, ab)
	}

	// Entries from the log up to the sequence both have applied are
	// final on both (sweeps go on adding entries meanwhile).
	upTo := min(appliedSeq(t, a), appliedSeq(t, b))
	pick := func(r *replica) ([]string, map[string]int) {
		var out []string
		changes := map[string]int{}
		for _, e := range journalOf(t, r) {
			if e.LogSeq == 0 {
				t.Errorf("an entry not from the log: %s", journalLine(e))
				continue
			}
			if e.LogSeq <= upTo {
				out = append(out, journalLine(e))
				changes[e.Change]++
				if e.Limit == "stale_telemetry" {
					changes["stale_telemetry"]++
				}
				if strings.Contains(e.Message, "shelf expired") {
					changes["shelf expired"]++
				}
			}
		}
		return out, changes
	}
	la, ca := pick(a)
	lb, _ := pick(b)
	for _, c := range []string{"level", "acknowledged", "shelved", "unshelved", "reset", "discard", "reload", "stale_telemetry", "shelf expired"} {
		if ca[c] == 0 {
			t.Errorf("no %q entry in the journal (%v): the test does not exercise it", c, ca)
		}
	}
	if !slices.Equal(la, lb) {
		n := min(len(la), len(lb))
		for i := 0; i < n; i++ {
			if la[i] != lb[i] {
				t.Errorf("entry %d differs:\n first  %s\n second %s", i, la[i], lb[i])
				break
			}
		}
		t.Errorf("the journals differ: %d entries on the first replica, %d on the second (up to log sequence %d)", len(la), len(lb), upTo)
	}
	seen := map[string]bool{}
	for _, l := range lb {
		if seen[l] {
			t.Errorf("entry twice on the restarted replica: %s", l)
		}
		seen[l] = true
	}
	t.Logf("%d journal entries from the log agree (up to sequence %d): %v", len(la), upTo, ca)
}
