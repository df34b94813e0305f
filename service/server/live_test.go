package server_test

import (
	"encoding/csv"
	"errors"
	"io"
	"log/slog"
	"math"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/types/known/durationpb"
	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
	"github.com/genvelope/genvelope/service/ingest"
	"github.com/genvelope/genvelope/service/server"
	"github.com/genvelope/genvelope/service/state"
)

// raiseVPerHz pushes harrowmere-1 at 22 kV (1.1 pu at rated frequency:
// past the 1.05 pu volts-per-hertz limit, IEC 60034-1 and IEEE C50.13
// common practice) for 10 s of sample time: the alarm rises after its
// 5 s on-delay.
func raiseVPerHz(t *testing.T, r *running, t0 time.Time) {
	t.Helper()
	var batch []*pb.Sample
	for i := range 10 {
		batch = append(batch, sample("harrowmere-1", t0.Add(time.Duration(i)*time.Second), 250, 50, 22))
	}
	r.push(t, ctxT(t), batch...)
}

// The journal over gRPC: the alarm's rise, its acknowledgement and
// shelve with the operator, filters, paging through every entry once,
// the page and the CSV on the web; bad filters and tokens are
// INVALID_ARGUMENT with a BadRequest detail.
func TestJournalOverGRPCAndWeb(t *testing.T) {
	dir := t.TempDir()
	r := start(t, server.Config{JournalPath: filepath.Join(dir, "journal.jsonl")})
	ctx := ctxT(t)
	ac, jc := pb.NewAlarmServiceClient(r.conn), pb.NewJournalServiceClient(r.conn)
	raiseVPerHz(t, r, time.Now().Add(-10*time.Minute).Truncate(time.Second))
	if _, err := ac.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: "harrowmere-1", Limit: "volts_per_hertz", Operator: "a.sorensen"}); err != nil {
		t.Fatal(err)
	}
	if _, err := ac.ShelveAlarm(ctx, &pb.ShelveAlarmRequest{UnitId: "harrowmere-1", Limit: "volts_per_hertz", Duration: durationpb.New(time.Hour), Operator: "a.sorensen", Reason: "exciter test"}); err != nil {
		t.Fatal(err)
	}
	// Acknowledge without a name: refused.
	_, err := ac.AcknowledgeAlarm(ctx, &pb.AcknowledgeAlarmRequest{UnitId: "harrowmere-1", Limit: "volts_per_hertz"})
	if status.Code(err) != codes.InvalidArgument {
		t.Errorf("acknowledge without an operator: %v, want INVALID_ARGUMENT", err)
	}
	all, err := jc.ListJournal(ctx, &pb.ListJournalRequest{Filter: &pb.JournalFilter{UnitIds: []string{"harrowmere-1"}, Limits: []string{"volts_per_hertz"}}})
	if err != nil {
		t.Fatal(err)
	}
	var changes []string
	for _, e := range all.Entries {
		changes = append(changes, e.Change)
	}
	// Newest first: shelved, acknowledged, then the rise.
	if len(all.Entries) != 3 || strings.Join(changes, ",") != "shelved,acknowledged,level" {
		t.Fatalf("journal %v, want shelved, acknowledged, level", changes)
	}
	rise, ack := all.Entries[2], all.Entries[1]
	if rise.Level != "warning" && rise.Level != "critical" || rise.Value == nil || !strings.Contains(rise.Message, "volts per hertz") {
		t.Errorf("rise entry %v", rise)
	}
	if ack.Operator != "a.sorensen" || !strings.Contains(all.Entries[0].Message, "exciter test") {
		t.Errorf("operator entries %v / %v", ack, all.Entries[0])
	}
	// Paging: one entry a page, every entry once.
	seen := map[uint64]bool{}
	tok := ""
	for range 100 {
		p, err := jc.ListJournal(ctx, &pb.ListJournalRequest{PageSize: 1, PageToken: tok})
		if err != nil {
			t.Fatal(err)
		}
		for _, e := range p.Entries {
			if seen[e.Seq] {
				t.Fatalf("entry %d twice", e.Seq)
			}
			seen[e.Seq] = true
		}
		if tok = p.NextPageToken; tok == "" {
			break
		}
	}
	whole, _ := jc.ListJournal(ctx, &pb.ListJournalRequest{PageSize: 1000})
	if len(seen) != len(whole.Entries) || len(seen) < 3 {
		t.Errorf("paging saw %d entries, the journal has %d", len(seen), len(whole.Entries))
	}
	for _, tc := range []struct {
		name  string
		req   *pb.ListJournalRequest
		field string
	}{
		{"forged token", &pb.ListJournalRequest{PageToken: "not-a-token"}, "page_token"},
		{"unknown change", &pb.ListJournalRequest{Filter: &pb.JournalFilter{Changes: []string{"exploded"}}}, "filter"},
		{"unknown limit", &pb.ListJournalRequest{Filter: &pb.JournalFilter{Limits: []string{"turbine"}}}, "filter.limits"},
		{"unknown level", &pb.ListJournalRequest{Filter: &pb.JournalFilter{MinLevel: "loud"}}, "filter"},
		{"empty window", &pb.ListJournalRequest{Filter: &pb.JournalFilter{Since: timestamppb.Now(), Until: timestamppb.New(time.Now().Add(-time.Hour))}}, "filter"},
		{"page too large", &pb.ListJournalRequest{PageSize: 5000}, "page_size"},
	} {
		_, err := jc.ListJournal(ctx, tc.req)
		st := status.Convert(err)
		if st.Code() != codes.InvalidArgument {
			t.Errorf("%s: %v, want INVALID_ARGUMENT", tc.name, err)
			continue
		}
		var br *errdetails.BadRequest
		for _, d := range st.Details() {
			if b, ok := d.(*errdetails.BadRequest); ok {
				br = b
			}
		}
		if br == nil || len(br.FieldViolations) == 0 || br.FieldViolations[0].Field != tc.field {
			t.Errorf("%s: details %v, want a BadRequest on %s", tc.name, st.Details(), tc.field)
		}
	}
	// The web page and the CSV.
	resp, err := http.Get(r.base + "/journal?unit=harrowmere-1&change=acknowledged")
	if err != nil {
		t.Fatal(err)
	}
	body, _ := io.ReadAll(resp.Body)
	resp.Body.Close()
	if resp.StatusCode != http.StatusOK || !strings.Contains(string(body), "a.sorensen") || strings.Contains(string(body), "exciter test") {
		t.Errorf("journal page %d: want the acknowledgement only", resp.StatusCode)
	}
	resp, err = http.Get(r.base + "/journal?unit=harrowmere-1&format=csv")
	if err != nil {
		t.Fatal(err)
	}
	recs, err := csv.NewReader(resp.Body).ReadAll()
	resp.Body.Close()
	if err != nil || len(recs) < 4 || recs[0][0] != "seq" || !strings.HasPrefix(resp.Header.Get("Content-Type"), "text/csv") {
		t.Errorf("CSV: %d rows, err %v, type %s", len(recs), err, resp.Header.Get("Content-Type"))
	}
}

// Reset and discard: the unknown unit is NOT_FOUND, a sample time that
// is not one of the unit's recent ones NOT_FOUND, no operator
// INVALID_ARGUMENT; done, they are journalled and the heating is gone.
func TestResetAndDiscard(t *testing.T) {
	r := start(t, server.Config{JournalPath: filepath.Join(t.TempDir(), "j")})
	ctx := ctxT(t)
	jc := pb.NewJournalServiceClient(r.conn)
	for _, tc := range []struct {
		name string
		call func() error
		want codes.Code
	}{
		{"reset unknown unit", func() error {
			_, err := jc.ResetThermal(ctx, &pb.ResetThermalRequest{UnitId: "nowhere-9", Operator: "op"})
			return err
		}, codes.NotFound},
		{"discard unknown unit", func() error {
			_, err := jc.DiscardSample(ctx, &pb.DiscardSampleRequest{UnitId: "nowhere-9", Time: timestamppb.Now(), Operator: "op"})
			return err
		}, codes.NotFound},
		{"discard unknown sample", func() error {
			_, err := jc.DiscardSample(ctx, &pb.DiscardSampleRequest{UnitId: "larchwater-2", Time: timestamppb.Now(), Operator: "op"})
			return err
		}, codes.NotFound},
		{"reset without operator", func() error {
			_, err := jc.ResetThermal(ctx, &pb.ResetThermalRequest{UnitId: "larchwater-2"})
			return err
		}, codes.InvalidArgument},
		{"reset bad winding", func() error {
			_, err := jc.ResetThermal(ctx, &pb.ResetThermalRequest{UnitId: "larchwater-2", Winding: "rotor", Operator: "op"})
			return err
		}, codes.InvalidArgument},
	} {
		if got := status.Code(tc.call()); got != tc.want {
			t.Errorf("%s: %v, want %v", tc.name, got, tc.want)
		}
	}
	// 146 % field current (larchwater-2 rated_a 1320 A) for 10 s.
	t0 := time.Now().Add(-10 * time.Minute).Truncate(time.Second)
	var batch []*pb.Sample
	for i := range 11 {
		s := sample("larchwater-2", t0.Add(time.Duration(i)*time.Second), 80, 10, 13.8)
		s.FieldA = f64(1.46 * 1320)
		batch = append(batch, s)
	}
	r.push(t, ctx, batch...)
	used := func() float64 {
		u, err := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: "larchwater-2"})
		if err != nil {
			t.Fatal(err)
		}
		return u.FieldThermalUsedRatio
	}
	before := used()
	if _, err := jc.DiscardSample(ctx, &pb.DiscardSampleRequest{UnitId: "larchwater-2", Time: timestamppb.New(t0.Add(5 * time.Second)), Operator: "op", Reason: "spike"}); err != nil {
		t.Fatal(err)
	}
	// One second held at 1.46: (1.46² − 1) × 1 s of the C50.13 integral
	// (K = 33.75 s), up to what the wall clock added meanwhile.
	if after := used(); before-after < 0.9*(1.46*1.46-1)/33.75 {
		t.Errorf("discard took %.4f off, want about %.4f", before-after, (1.46*1.46-1)/33.75)
	}
	if _, err := jc.ResetThermal(ctx, &pb.ResetThermalRequest{UnitId: "larchwater-2", Operator: "op", Reason: "winding inspected"}); err != nil {
		t.Fatal(err)
	}
	if u := used(); u > 0.01 {
		t.Errorf("after reset %.4f used", u)
	}
	es, err := jc.ListJournal(ctx, &pb.ListJournalRequest{Filter: &pb.JournalFilter{Changes: []string{"reset", "discard"}}})
	if err != nil || len(es.Entries) != 2 || es.Entries[0].Operator != "op" || !strings.Contains(es.Entries[0].Message, "winding inspected") {
		t.Errorf("journal %v %v", es, err)
	}
}

// A state directory where nothing can be written: the failures are
// counted and /readyz reports degraded after state.DegradedAfter.
func TestStateSaveFailuresDegrade(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "state")
	if err := os.Mkdir(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	r := start(t, server.Config{StatePath: filepath.Join(dir, "state.json"), StateInterval: 20 * time.Millisecond})
	// Read-only; root ignores the mode bits, so the directory also goes.
	if err := os.Chmod(dir, 0o555); err != nil {
		t.Fatal(err)
	}
	if os.Geteuid() == 0 {
		if err := os.RemoveAll(dir); err != nil {
			t.Fatal(err)
		}
	}
	defer os.Chmod(dir, 0o755)
	deadline := time.Now().Add(waitLong)
	for {
		resp, err := http.Get(r.base + "/readyz")
		if err != nil {
			t.Fatal(err)
		}
		body, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		if resp.StatusCode == http.StatusServiceUnavailable && strings.Contains(string(body), "degraded") {
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("/readyz still %d %q", resp.StatusCode, body)
		}
		time.Sleep(20 * time.Millisecond)
	}
	fams := r.scrape(t)
	if n, ok := metricValue(fams, "genvelope_state_save_failures_total", nil); !ok || n < state.DegradedAfter {
		t.Errorf("genvelope_state_save_failures_total %v (present %v), want at least %d", n, ok, state.DegradedAfter)
	}
}

// A state file that parses and carries a valid checksum but holds
// impossible values (a zero voltage, a negative accumulator): each bad
// unit is dropped and logged, the good one restored. (NaN cannot be
// written in JSON; a file with one does not parse and is moved aside.)
func TestCorruptButParseableState(t *testing.T) {
	path := filepath.Join(t.TempDir(), "state.json")
	at := time.Now().Add(-time.Minute).Truncate(time.Second)
	good := ingest.UnitSnapshot{Times: []int64{at.UnixNano()}, ArmatureH: 3, FieldH: 2, XArmature: 0.8, XField: 0.9,
		Latest: &ingest.SampleSnapshot{Sample: ingest.Sample{UnitID: "larchwater-2", Time: at, PMW: 80, QMvar: 10, VKV: 13.8}, ReceivedUnixNS: at.UnixNano()}}
	zeroV := good
	zeroV.Latest = &ingest.SampleSnapshot{Sample: ingest.Sample{UnitID: "harrowmere-1", Time: at, PMW: 250, QMvar: 50, VKV: 0}, ReceivedUnixNS: at.UnixNano()}
	negative := good
	negative.Latest, negative.ArmatureH = nil, -5
	sn := &ingest.Snapshot{Format: "genvelope-state", Version: ingest.SnapshotVersion, Written: time.Now(),
		Units: map[string]ingest.UnitSnapshot{"larchwater-2": good, "harrowmere-1": zeroV, "brindle-gt3": negative}}
	if err := state.Write(path, sn); err != nil {
		t.Fatal(err)
	}
	var logs logBuffer
	r := start(t, server.Config{StatePath: path, Logger: slog.New(slog.NewTextHandler(&logs, nil))})
	ctx := ctxT(t)
	lw, err := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: "larchwater-2"})
	if err != nil {
		t.Fatal(err)
	}
	if lw.Latest == nil || lw.FieldThermalUsedRatio == 0 {
		t.Errorf("the good unit was not restored: %v", lw)
	}
	for _, id := range []string{"harrowmere-1", "brindle-gt3"} {
		u, _ := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: id})
		if u.Latest != nil || u.ArmatureThermalUsedRatio != 0 || u.DataState != "no_data" {
			t.Errorf("%s: bad entry restored: %v", id, u)
		}
		if !strings.Contains(logs.String(), "STATE ENTRY UNUSABLE") || !strings.Contains(logs.String(), id) {
			t.Errorf("%s: not logged:\n%s", id, logs.String())
		}
	}
	// A file changed after it was written fails its checksum and is
	// moved aside whole; a second one moved aside does not replace it.
	for range 2 {
		if err := state.Write(path, sn); err != nil {
			t.Fatal(err)
		}
		b, _ := os.ReadFile(path)
		b[len(b)/2] ^= 1 // one bit inside an entry
		if err := os.WriteFile(path, b, 0o644); err != nil {
			t.Fatal(err)
		}
		if err := state.Load(path, r.srv.Store(), slog.New(slog.NewTextHandler(&logs, nil)), time.Unix(1e9, 0)); err != nil {
			t.Fatal(err)
		}
	}
	aside, _ := filepath.Glob(path + ".bad-*")
	if len(aside) != 2 {
		t.Errorf("moved aside: %v, want two files", aside)
	}
	if _, err := os.Stat(path); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("the changed file is still in place: %v", err)
	}
}

// A unit that never reported is no_data in the metrics (never normal).
func TestNoDataInMetrics(t *testing.T) {
	r := start(t, server.Config{})
	fams := r.scrape(t)
	if v, ok := metricValue(fams, "genvelope_unit_data_state", map[string]string{"unit": "brindle-gt3", "state": "no_data"}); !ok || v != 1 {
		t.Errorf("no_data %v %v, want 1", v, ok)
	}
	if v, ok := metricValue(fams, "genvelope_unit_data_state", map[string]string{"unit": "brindle-gt3", "state": "fresh"}); !ok || v != 0 {
		t.Errorf("fresh %v %v, want 0", v, ok)
	}
}

// A unit that stops reporting during a field overload, over the running
// service on the real clock: its field thermal alarm rises with no new
// sample (the winding is assumed to go on heating, C50.13 (x² − 1)·t),
// then the unit turns stale and its thermal state unknown, the alarm
// kept. (A unit that stops below its rating cooling: TestWallClockSupervision
// in service/ingest.)
func TestWallClockOverloadThenStale(t *testing.T) {
	path := fleetWith(t, "alarms:\n  limits:\n    field_thermal: {warning: 0.15, critical: 0.9, on_delay_s: 0}\n    stale_telemetry: {warning: 4, critical: 120}\n")
	r := start(t, server.Config{FleetPath: path})
	ctx := ctxT(t)
	const unit = "larchwater-2" // rated_a 1320 A, no coolant table
	ev := r.watch(t, &pb.AlarmFilter{UnitIds: []string{unit}})
	now := time.Now()
	var batch []*pb.Sample
	for i := -2; i <= 0; i++ { // 146 %: 0.034 of the capability, below the warning
		s := sample(unit, now.Add(time.Duration(i)*time.Second), 80, 10, 13.8)
		s.FieldA = f64(1.46 * 1320)
		batch = append(batch, s)
	}
	r.push(t, ctx, batch...)
	get := func() *pb.GetUnitResponse {
		u, err := r.fleet.GetUnit(ctx, &pb.GetUnitRequest{UnitId: unit})
		if err != nil {
			t.Fatal(err)
		}
		return u
	}
	if u := get(); u.FieldThermalUsedRatio >= 0.15 || u.DataState != "fresh" {
		t.Fatalf("after the samples: %.3f used, %s", u.FieldThermalUsedRatio, u.DataState)
	}
	w := ev.next(t, "field_thermal warning without a sample", func(e *pb.AlarmEvent) bool {
		return is(unit, "field_thermal", pb.AlarmChange_ALARM_CHANGE_LEVEL)(e) && e.Level == pb.AlarmLevel_ALARM_LEVEL_WARNING
	})
	if w.Value < 0.15 {
		t.Errorf("warning at %.3f used", w.Value)
	}
	ev.next(t, "stale telemetry", func(e *pb.AlarmEvent) bool {
		return is(unit, "stale_telemetry", pb.AlarmChange_ALARM_CHANGE_LEVEL)(e) && e.Level >= pb.AlarmLevel_ALARM_LEVEL_WARNING
	})
	waitFor(t, "the unit stale", func() bool { return get().DataState == "stale" })
	u := get()
	// Heating stops at the stale threshold: 1 s between the samples (the
	// first is suspect, confirmed by the second) and 4 s held after them.
	if want := 5 * (1.46*1.46 - 1) / 33.75; !u.ThermalUnknown || math.Abs(u.FieldThermalUsedRatio-want) > 1e-6 {
		t.Errorf("stale: thermal unknown %v, %.4f used; want unknown and %.4f", u.ThermalUnknown, u.FieldThermalUsedRatio, want)
	}
	al, err := pb.NewAlarmServiceClient(r.conn).ListAlarms(ctx, &pb.ListAlarmsRequest{Filter: &pb.AlarmFilter{UnitIds: []string{unit}}})
	if err != nil {
		t.Fatal(err)
	}
	held := false
	for _, a := range al.Alarms {
		held = held || a.Limit == "field_thermal" && a.Level == pb.AlarmLevel_ALARM_LEVEL_WARNING
	}
	if !held {
		t.Errorf("the field thermal alarm did not stay while stale: %v", al.Alarms)
	}
}
