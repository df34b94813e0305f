package journal

import (
	"bufio"
	"bytes"
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"syscall"
	"testing"
	"time"
)

var t0 = time.Date(2026, 6, 1, 12, 0, 0, 0, time.UTC)

func open(t *testing.T, path string, o Options) *Journal {
	t.Helper()
	j, err := Open(path, o)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { j.Close() })
	return j
}

func entry(i int, unit, limit, change, level string) Entry {
	return Entry{Time: t0.Add(time.Duration(i) * time.Second), Unit: unit, Limit: limit, Change: change, Level: level, Prev: "normal",
		Value: Num(0.01 * float64(i)), Message: fmt.Sprintf("%s: entry %d", unit, i)}
}

// Pages walk the whole journal newest first, each entry once; filters
// select; the sequence goes on across a reopen.
func TestQueryPagesAndFilters(t *testing.T) {
	path := filepath.Join(t.TempDir(), "journal.jsonl")
	j := open(t, path, Options{})
	for i := 1; i <= 25; i++ {
		unit := []string{"ridge-1", "ridge-2"}[i%2]
		change := ChangeLevel
		if i%5 == 0 {
			change = ChangeAcknowledged
		}
		if err := j.Append(entry(i, unit, "field", change, "warning")); err != nil {
			t.Fatal(err)
		}
	}
	var seqs []uint64
	tok := ""
	for page := 0; ; page++ {
		es, next, err := j.Query(Filter{}, 10, tok)
		if err != nil {
			t.Fatal(err)
		}
		for _, e := range es {
			seqs = append(seqs, e.Seq)
		}
		if next == "" {
			break
		}
		tok = next
	}
	if len(seqs) != 25 || seqs[0] != 25 || seqs[24] != 1 {
		t.Fatalf("pages gave %v", seqs)
	}
	for i := 1; i < len(seqs); i++ {
		if seqs[i] != seqs[i-1]-1 {
			t.Fatalf("not newest first, each once: %v", seqs)
		}
	}
	for _, tc := range []struct {
		name string
		f    Filter
		want int
	}{
		{"unit", Filter{Units: []string{"ridge-1"}}, 12},
		{"change", Filter{Changes: []string{ChangeAcknowledged}}, 5},
		{"unit and change", Filter{Units: []string{"ridge-2"}, Changes: []string{ChangeAcknowledged}}, 3},
		{"since", Filter{Since: t0.Add(20 * time.Second)}, 6},
		{"until", Filter{Until: t0.Add(3 * time.Second)}, 2},
		{"min level", Filter{MinLevel: "critical"}, 0},
		{"limit", Filter{Limits: []string{"armature"}}, 0},
	} {
		es, _, err := j.Query(tc.f, 100, "")
		if err != nil || len(es) != tc.want {
			t.Errorf("%s: %d entries, err %v; want %d", tc.name, len(es), err, tc.want)
		}
	}
	j.Close()
	j2 := open(t, path, Options{})
	if err := j2.Append(entry(26, "ridge-1", "field", ChangeLevel, "normal")); err != nil {
		t.Fatal(err)
	}
	es, _, _ := j2.Query(Filter{}, 1, "")
	if len(es) != 1 || es[0].Seq != 26 {
		t.Errorf("after reopen: %+v, want seq 26", es)
	}
}

func TestBadFilterAndToken(t *testing.T) {
	j := open(t, filepath.Join(t.TempDir(), "j"), Options{})
	for _, tc := range []struct {
		name  string
		f     Filter
		size  int
		token string
		want  error
	}{
		{"change", Filter{Changes: []string{"exploded"}}, 10, "", ErrBadFilter},
		{"level", Filter{MinLevel: "loud"}, 10, "", ErrBadFilter},
		{"window", Filter{Since: t0, Until: t0}, 10, "", ErrBadFilter},
		{"size", Filter{}, 5000, "", ErrBadFilter},
		{"token not base64", Filter{}, 10, "%%%", ErrBadToken},
		{"token forged", Filter{}, 10, "aGVsbG8", ErrBadToken},
	} {
		if _, _, err := j.Query(tc.f, tc.size, tc.token); !errors.Is(err, tc.want) {
			t.Errorf("%s: %v, want %v", tc.name, err, tc.want)
		}
	}
}

// The file is bounded: rotated past MaxBytes, the oldest beyond Keep
// removed; the query still reads across files, newest first.
func TestRotation(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "j")
	j := open(t, path, Options{MaxBytes: 2000, Keep: 2})
	for i := 1; i <= 100; i++ {
		if err := j.Append(entry(i, "ridge-1", "field", ChangeLevel, "warning")); err != nil {
			t.Fatal(err)
		}
	}
	names, _ := filepath.Glob(path + "*")
	if len(names) != 3 {
		t.Errorf("files %v, want the journal and 2 rotated", names)
	}
	for _, n := range names {
		if st, _ := os.Stat(n); st.Size() > 2000 {
			t.Errorf("%s is %d bytes, over the bound", n, st.Size())
		}
	}
	es, _, err := j.Query(Filter{}, 1000, "")
	if err != nil || len(es) == 0 || es[0].Seq != 100 {
		t.Fatalf("%d entries, err %v", len(es), err)
	}
	for i := 1; i < len(es); i++ {
		if es[i].Seq != es[i-1].Seq-1 {
			t.Fatalf("gap across files at %d: %d then %d", i, es[i-1].Seq, es[i].Seq)
		}
	}
}

func TestCSV(t *testing.T) {
	var buf bytes.Buffer
	e := entry(1, "ridge-1", "stability", ChangeLevel, "critical")
	e.Message = `ridge-1: 0.5 Mvar beyond the practical stability limit, "now"`
	e.Seq = 7
	if err := WriteCSV(&buf, []Entry{e}); err != nil {
		t.Fatal(err)
	}
	recs, err := csv.NewReader(&buf).ReadAll()
	if err != nil || len(recs) != 2 {
		t.Fatalf("%v %v", recs, err)
	}
	row := map[string]string{}
	for i, h := range recs[0] {
		row[h] = recs[1][i]
	}
	if row["seq"] != "7" || row["unit"] != "ridge-1" || row["level"] != "critical" || row["message"] != e.Message || row["value"] != "0.01" || row["threshold"] != "" {
		t.Errorf("row %v", row)
	}
}

// What was appended before a kill -9 is there after it: a child process
// appends, says how far it got, and is killed mid-stream.
func TestSurvivesKill(t *testing.T) {
	if path := os.Getenv("GENVELOPE_JOURNAL_CHILD"); path != "" {
		j, err := Open(path, Options{})
		if err != nil {
			fmt.Println("error", err)
			os.Exit(1)
		}
		for i := 1; ; i++ {
			if err := j.Append(entry(i, "ridge-1", "field", ChangeLevel, "warning")); err != nil {
				fmt.Println("error", err)
				os.Exit(1)
			}
			fmt.Println("appended", i)
		}
	}
	if testing.Short() {
		t.Skip("starts a child process")
	}
	path := filepath.Join(t.TempDir(), "j")
	cmd := exec.Command(os.Args[0], "-test.run=^TestSurvivesKill$")
	cmd.Env = append(os.Environ(), "GENVELOPE_JOURNAL_CHILD="+path)
	out, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	sc := bufio.NewScanner(out)
	last := 0
	for sc.Scan() && last < 500 {
		if _, err := fmt.Sscanf(sc.Text(), "appended %d", &last); err != nil {
			t.Fatalf("child: %s", sc.Text())
		}
	}
	if err := cmd.Process.Signal(syscall.SIGKILL); err != nil {
		t.Fatal(err)
	}
	_ = cmd.Wait()
	j := open(t, path, Options{})
	es, _, err := j.Query(Filter{}, MaxPage, "")
	if err != nil {
		t.Fatal(err)
	}
	if len(es) < last {
		t.Fatalf("%d entries after kill -9; the child had appended %d", len(es), last)
	}
	// The journal goes on, even after a line torn by the kill.
	if err := j.Append(entry(0, "ridge-1", "field", ChangeLevel, "normal")); err != nil {
		t.Fatal(err)
	}
	es2, _, _ := j.Query(Filter{}, 1, "")
	if es2[0].Seq != es[0].Seq+1 || !strings.Contains(es2[0].Message, "entry 0") {
		t.Errorf("after the kill: %+v", es2[0])
	}
}

// A replica restarted from its checkpoint applies the log again from the
// checkpoint's sequence; the journal skips the entries from the log it
// has and writes the rest, so that it ends as if there had been no
// restart: each (log sequence, n-th entry of it) once, in order.
func TestReplayFromLog(t *testing.T) {
	// Messages 1 to 6 of the log, and the entries applying each makes
	// (message 3 makes none, message 4 three).
	perMsg := map[uint64]int{1: 1, 2: 2, 3: 0, 4: 3, 5: 1, 6: 2}
	apply := func(j *Journal, from, to uint64) {
		for seq := from; seq <= to; seq++ {
			for n := range perMsg[seq] {
				e := entry(int(seq)*10+n, "ridge-1", "field", ChangeLevel, "warning")
				e.LogSeq = seq
				if err := j.Append(e); err != nil {
					t.Fatal(err)
				}
			}
		}
	}
	type key struct{ seq, n uint64 }
	read := func(j *Journal) []key {
		es, _, err := j.Query(Filter{}, MaxPage, "")
		if err != nil {
			t.Fatal(err)
		}
		var out []key
		for i := len(es) - 1; i >= 0; i-- {
			e := es[i]
			if e.LogSeq == 0 {
				continue
			}
			n := uint64(0)
			if len(out) > 0 && out[len(out)-1].seq == e.LogSeq {
				n = out[len(out)-1].n + 1
			}
			if want := fmt.Sprintf("ridge-1: entry %d", int(e.LogSeq)*10+int(n)); e.Message != want {
				t.Errorf("entry %d of message %d says %q, want %q", n, e.LogSeq, e.Message, want)
			}
			out = append(out, key{e.LogSeq, n})
		}
		return out
	}
	var want []key
	for seq := uint64(1); seq <= 6; seq++ {
		for n := range perMsg[seq] {
			want = append(want, key{seq, uint64(n)})
		}
	}
	for _, tc := range []struct {
		name string
		// The journal got the entries up to message crashAt, and of it
		// the first crashN (the process died while applying it); the
		// checkpoint includes messages up to cp.
		crashAt uint64
		crashN  int
		cp      uint64
	}{
		{"checkpoint at the journal's end", 4, 3, 4},
		{"checkpoint behind the journal", 5, 1, 2},
		{"died inside a message", 4, 1, 2},
		{"no checkpoint: the whole log again", 6, 2, 0},
		{"empty journal", 0, 0, 0},
	} {
		t.Run(tc.name, func(t *testing.T) {
			path := filepath.Join(t.TempDir(), "j")
			j := open(t, path, Options{})
			apply(j, 1, tc.crashAt-min(tc.crashAt, 1))
			if tc.crashAt > 0 {
				for n := range tc.crashN {
					e := entry(int(tc.crashAt)*10+n, "ridge-1", "field", ChangeLevel, "warning")
					e.LogSeq = tc.crashAt
					if err := j.Append(e); err != nil {
						t.Fatal(err)
					}
				}
			}
			// An entry of this replica alone in between: not from the log.
			if err := j.Append(Entry{Change: ChangeDenied, Message: "refused"}); err != nil {
				t.Fatal(err)
			}
			j.Close()

			j2 := open(t, path, Options{})
			if seq, n := j2.LogPosition(); seq != tc.crashAt || n != uint64(tc.crashN) {
				t.Errorf("log position after reopening: %d, %d entries; want %d, %d", seq, n, tc.crashAt, tc.crashN)
			}
			apply(j2, tc.cp+1, 6)
			got := read(j2)
			if !slices.Equal(got, want) {
				t.Errorf("entries (log sequence, n-th of it):\n got  %v\n want %v", got, want)
			}
		})
	}
}

// The log position read at Open is the last entry from the log, with
// its message's entries counted across a rotation, and after a journal
// moved to a new stream (ForgetLogPosition) the new stream's, however
// high the old one's sequences were.
func TestLogPositionAtOpen(t *testing.T) {
	logEntry := func(seq uint64, n int) Entry {
		e := entry(n, "ridge-1", "field", ChangeLevel, "warning")
		e.LogSeq = seq
		return e
	}
	t.Run("across a rotation", func(t *testing.T) {
		// Message 4 made three entries: two went to the file rotated to
		// FILE.1, the third to FILE after the rotation.
		path := filepath.Join(t.TempDir(), "j")
		write := func(name string, es ...Entry) {
			var b bytes.Buffer
			for _, e := range es {
				if err := json.NewEncoder(&b).Encode(&e); err != nil {
					t.Fatal(err)
				}
			}
			if err := os.WriteFile(name, b.Bytes(), 0o644); err != nil {
				t.Fatal(err)
			}
		}
		seqd := func(seq uint64, e Entry) Entry { e.Seq = seq; return e }
		write(path+".1", seqd(1, logEntry(3, 0)), seqd(2, logEntry(4, 0)), seqd(3, logEntry(4, 1)))
		write(path, seqd(4, logEntry(4, 2)), seqd(5, Entry{Change: ChangeDenied, Message: "refused"}))
		if s, k := open(t, path, Options{}).LogPosition(); s != 4 || k != 3 {
			t.Errorf("log position %d, %d entries; want 4, 3 (the message straddles the rotation)", s, k)
		}
	})
	t.Run("a new stream", func(t *testing.T) {
		path := filepath.Join(t.TempDir(), "j")
		j := open(t, path, Options{})
		for _, e := range []Entry{logEntry(100, 0), logEntry(100, 1)} {
			if err := j.Append(e); err != nil {
				t.Fatal(err)
			}
		}
		j.ForgetLogPosition()
		for _, e := range []Entry{logEntry(1, 0), logEntry(2, 0), logEntry(2, 1)} {
			if err := j.Append(e); err != nil {
				t.Fatal(err)
			}
		}
		j.Close()
		if s, k := open(t, path, Options{}).LogPosition(); s != 2 || k != 2 {
			t.Errorf("log position %d, %d entries; want 2, 2", s, k)
		}
	})
}
