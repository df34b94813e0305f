package state

import (
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/genvelope/genvelope/deploy/examples"
	"github.com/genvelope/genvelope/service/alarm"
	"github.com/genvelope/genvelope/service/ingest"
)

var t0 = time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)

func newStore(t *testing.T) *ingest.Store {
	t.Helper()
	fl, err := examples.Fleet()
	if err != nil {
		t.Fatal(err)
	}
	return ingest.NewStore(fl, ingest.Options{Now: func() time.Time { return t0.Add(time.Hour) }})
}

// A field overload, saved and restored into a fresh store, resumes where
// it was: the heating integral, the held current, the alarm, and the
// timestamps that make a resent sample a duplicate.
func TestRoundTrip(t *testing.T) {
	s := newStore(t)
	fl := s.Fleet()
	u := fl.Unit("harrowmere-1")
	ratedA := u.Model.RatedFieldCurrent() * u.Field.AirGapA
	for i := range 20 {
		smp := ingest.Sample{UnitID: u.ID, Time: t0.Add(time.Duration(i) * time.Second), PMW: 250, QMvar: 100, VKV: 20,
			FieldA: 1.46 * ratedA, HasFieldA: true, Coolant: 414, HasCoolant: true}
		if r, d := s.Accept(t0.Add(time.Hour), &smp); r != ingest.Accepted {
			t.Fatalf("%v %s", r, d)
		}
	}
	if err := s.Acknowledge(u.ID, alarm.FieldThermal, t0.Add(time.Hour), "test"); err != nil {
		t.Fatalf("acknowledge the thermal alarm: %v", err)
	}
	sealedJSON := func(path string) error { // what the previous release wrote (version 2)
		sn := s.Snapshot(t0.Add(time.Hour))
		sn.Version = ingest.SnapshotVersion
		if err := sn.Seal(); err != nil {
			return err
		}
		data, err := json.Marshal(sn)
		if err != nil {
			return err
		}
		return WriteFile(path, data)
	}
	for _, tc := range []struct {
		name  string
		write func(path string) error
		log   string
	}{
		{"saver (binary, streamed)", func(path string) error {
			return NewSaver(path, s, slog.New(slog.DiscardHandler)).Save(t0.Add(time.Hour))
		}, ""},
		{"snapshot (binary)", func(path string) error { return Write(path, s.Snapshot(t0.Add(time.Hour))) }, ""},
		{"JSON version 2", sealedJSON, "JSON format of earlier releases"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			path := filepath.Join(t.TempDir(), "state.json")
			if err := tc.write(path); err != nil {
				t.Fatal(err)
			}
			s2 := newStore(t)
			var logs strings.Builder
			if err := Load(path, s2, slog.New(slog.NewTextHandler(&logs, nil)), t0); err != nil {
				t.Fatal(err)
			}
			if !strings.Contains(logs.String(), tc.log) || !strings.Contains(logs.String(), "state restored") || strings.Contains(logs.String(), "UNUSABLE") {
				t.Errorf("log:\n%s", logs.String())
			}
			a, b := s.Unit(u.ID).View(), s2.Unit(u.ID).View()
			if a.Field != b.Field || a.XField != b.XField || !b.HasSample || !b.Latest.Time.Equal(a.Latest.Time) {
				t.Errorf("restored field %+v x %v, want %+v x %v", b.Field, b.XField, a.Field, a.XField)
			}
			if m := b.Alarms[alarm.FieldThermal]; m.Level == alarm.Normal || !m.Acknowledged {
				t.Errorf("field thermal alarm not restored: %+v", m)
			}
			for i := range 20 {
				resend := ingest.Sample{UnitID: u.ID, Time: t0.Add(time.Duration(i) * time.Second), PMW: 250, QMvar: 100, VKV: 20}
				if r, _ := s2.Accept(t0.Add(time.Hour), &resend); r != ingest.Duplicate {
					t.Errorf("resent sample %d after restore: %v, want duplicate", i, r)
				}
			}
			// The file is read again the same way (nothing was moved aside).
			if sn, err := Read(path); err != nil || len(sn.Units[u.ID].Times) != 20 {
				t.Errorf("Read: %v", err)
			}
		})
	}
}

func TestCorruptFileMovedAside(t *testing.T) {
	for name, content := range map[string]string{
		"corrupt":      `{"format": "genvelope-state", "version": 1, "units": {`,
		"incompatible": `{"format": "genvelope-state", "version": 99, "units": {}}`,
		"foreign":      `{"hello": "world"}`,
		"empty":        "",
		"binary cut":   binaryState(t)[:40],
		"binary changed": func() string {
			b := []byte(binaryState(t))
			b[len(b)/2] ^= 1
			return string(b)
		}(),
		"binary appended":      binaryState(t) + "\n",
		"binary other version": ingest.StateMagic + "\x63" + binaryState(t)[len(ingest.StateMagic)+1:],
	} {
		t.Run(name, func(t *testing.T) {
			dir := t.TempDir()
			path := filepath.Join(dir, "state.json")
			if err := os.WriteFile(path, []byte(content), 0o600); err != nil {
				t.Fatal(err)
			}
			var logs strings.Builder
			if err := Load(path, newStore(t), slog.New(slog.NewTextHandler(&logs, nil)), t0); err != nil {
				t.Fatal(err)
			}
			if _, err := os.Stat(path); !os.IsNotExist(err) {
				t.Errorf("unusable state file left in place")
			}
			aside, _ := filepath.Glob(path + ".bad-*")
			if len(aside) != 1 || !strings.Contains(logs.String(), "STATE FILE UNUSABLE") {
				t.Errorf("moved aside: %v; log: %s", aside, logs.String())
			}
		})
	}
}

// binaryState is a good binary state file of the example fleet.
func binaryState(t *testing.T) string {
	s := newStore(t)
	for i := range 5 {
		smp := ingest.Sample{UnitID: "harrowmere-1", Time: t0.Add(time.Duration(i) * time.Second), PMW: 250, QMvar: 100, VKV: 20}
		s.Accept(t0.Add(time.Hour), &smp)
	}
	var b strings.Builder
	if err := s.EncodeState(&b, t0); err != nil {
		t.Fatal(err)
	}
	return b.String()
}

func TestNoStateFile(t *testing.T) {
	if err := Load(filepath.Join(t.TempDir(), "none.json"), newStore(t), slog.New(slog.NewTextHandler(io.Discard, nil)), t0); err != nil {
		t.Fatal(err)
	}
}

// Files moved aside at the same moment keep their own names: the second
// gets -2, the third -3; none replaces another.
func TestMoveAsideNeverReplaces(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "state.json")
	var names []string
	for i := range 3 {
		if err := os.WriteFile(path, []byte(fmt.Sprint("bad ", i)), 0o600); err != nil {
			t.Fatal(err)
		}
		aside, err := MoveAside(path, t0)
		if err != nil {
			t.Fatal(err)
		}
		names = append(names, aside)
	}
	base := path + ".bad-" + t0.UTC().Format("20060102T150405.000000000Z")
	if want := []string{base, base + "-2", base + "-3"}; !slices.Equal(names, want) {
		t.Errorf("moved aside as %v, want %v", names, want)
	}
	for i, n := range names {
		if b, err := os.ReadFile(n); err != nil || string(b) != fmt.Sprint("bad ", i) {
			t.Errorf("%s holds %q, %v; want the file moved aside %d-th", n, b, err, i+1)
		}
	}
}
