package replay

import (
	"errors"
	"strings"
	"testing"
	"time"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

func TestHeaderErrors(t *testing.T) {
	tests := []struct {
		name string
		file string
		line int
		want []string // parts of the message
	}{
		{"empty", "", 0, []string{"empty", "header"}},
		{"unknown columns", "time,unit,p_mw,q_mvar,v_kv,speed_rpm,Field-A\n", 1, []string{`unknown column(s) "speed_rpm", "Field-A"`, "time, unit, p_mw"}},
		{"same name in another case twice", "Time,unit,P_MW,q_mvar,v_kv,p_mw\n", 1, []string{`column(s) "p_mw" given more than once`}},
		{"semicolons", "time;unit;p_mw;q_mvar;v_kv\n", 1, []string{"semicolons", "comma-separated"}},
		{"missing required", "time,unit,p_mw,q_mvar\n", 1, []string{"missing required column(s) v_kv"}},
		{"missing several", "unit,field_a\n", 1, []string{"missing required column(s) time, p_mw, q_mvar, v_kv"}},
		{"twice", "time,unit,p_mw,q_mvar,v_kv,p_mw\n", 1, []string{`column(s) "p_mw" given more than once`}},
		{"blank lines before a bad header", "\n\ntime,unit\n", 3, []string{"missing required column(s) p_mw, q_mvar, v_kv"}},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			_, err := NewReader("f.csv", strings.NewReader(tc.file))
			var fe *FileError
			if !errors.As(err, &fe) {
				t.Fatalf("error %v, want a *FileError", err)
			}
			if fe.Line != tc.line {
				t.Errorf("line %d, want %d (%v)", fe.Line, tc.line, err)
			}
			for _, w := range tc.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("%q does not say %q", err, w)
				}
			}
		})
	}
}

// Columns in any order, a byte-order mark and spaces around names,
// optional cells empty or not, every kind of bad row with its line, and
// a quoted cell spanning two lines that shifts the lines after it.
// Header names are matched without regard to case.
func TestHeaderAnyCase(t *testing.T) {
	rd, err := NewReader("f.csv", strings.NewReader("TIME,Unit,P_MW,Q_Mvar,V_kV,Quality\n2026-03-01T12:00:00Z,harrowmere-1,300,120,20.4,GOOD\n"))
	if err != nil {
		t.Fatal(err)
	}
	row, ok, err := rd.Read()
	if err != nil || !ok || row.Sample.PMw != 300 || row.Sample.VKv != 20.4 || row.Sample.Quality != pb.Quality_QUALITY_GOOD {
		t.Errorf("row %v %v %v", row, ok, err)
	}
}

// FuzzReader: any bytes give a *FileError or rows; every row read is
// counted once, good or bad, and a good row's sample has a valid time.
func FuzzReader(f *testing.F) {
	f.Add([]byte("time,unit,p_mw,q_mvar,v_kv\n2026-03-01T12:00:00Z,harrowmere-1,300,120,20.4\n"))
	f.Add([]byte("time,unit,p_mw,q_mvar,v_kv\n1000-03-01T12:00:00Z,harrowmere-1,300,120,20.4\n")) // the year-1000 typo
	f.Add([]byte("time;unit;p_mw;q_mvar;v_kv\n2026-03-01T12:00:00Z;harrowmere-1;300,5;120;20,4\n"))
	f.Add([]byte("\ufeffTIME,unit,P_MW,q_mvar,v_kv,field_a,quality\n\"2026-03-01T12:00:00Z\",\"a\nb\",1e308,-1e308,NaN,,bad\n,,,\n"))
	f.Fuzz(func(t *testing.T, data []byte) {
		rd, err := NewReader("f.csv", strings.NewReader(string(data)))
		if err != nil {
			var fe *FileError
			if !errors.As(err, &fe) {
				t.Fatalf("header error %v is not a *FileError", err)
			}
			return
		}
		good := 0
		for range 10000 {
			row, ok, err := rd.Read()
			if err != nil {
				t.Fatalf("read: %v", err)
			}
			if !ok {
				break
			}
			good++
			if err := row.Sample.Time.CheckValid(); err != nil || row.Line < 2 {
				t.Fatalf("good row at line %d with time %v: %v", row.Line, row.Sample.Time, err)
			}
		}
		if good+len(rd.Bad()) != rd.Rows() {
			t.Fatalf("%d good + %d bad != %d rows", good, len(rd.Bad()), rd.Rows())
		}
	})
}

func TestReadRows(t *testing.T) {
	file := "\ufeff quality , v_kv,unit,time,q_mvar,p_mw,coolant,field_a,frequency_hz\n" + // 1
		"good,20.4,harrowmere-1,2026-03-01T12:00:00Z,120,300,310,2950,50.01\n" + // 2
		",20.4,harrowmere-1,2026-03-01T13:00:01.25+01:00,-35.5,1e2,,,\n" + // 3
		"questionable,20.4,\"harrow\nmere\",2026-03-01T12:00:02Z,1,1,,,\n" + // 4-5: unit with a newline
		"good,20.4,harrowmere-1,2026-03-01T12:00:03Z,abc,300,,,\n" + // 6
		"good,20.4,harrowmere-1,2026-03-01T12:00:03Z,NaN,300,,,\n" + // 7
		"good,20.4,harrowmere-1,2026-03-01T12:00:03Z,1,-Inf,,,\n" + // 8
		"good,20.4,harrowmere-1,2026-03-01 12:00:03,1,300,,,\n" + // 9
		"good,20.4,harrowmere-1,2026-03-01T12:00:03Z,1,300\n" + // 10
		"good,,,2026-03-01T12:00:03Z,1,300,,,\n" + // 11
		"fine,20.4,harrowmere-1,2026-03-01T12:00:03Z,1,300,,,\n" + // 12
		"good,20.4,harrowmere-1,2026-03-01T12:00:03Z,1,300,,x,\n" + // 13
		"\n" + // 14: skipped
		"invalid,20.4,larchwater-2,2026-03-01T12:00:04Z,0,0,,,\n" // 15
	rd, err := NewReader("f.csv", strings.NewReader(file))
	if err != nil {
		t.Fatal(err)
	}
	var rows []Row
	for {
		row, ok, err := rd.Read()
		if err != nil {
			t.Fatal(err)
		}
		if !ok {
			break
		}
		rows = append(rows, row)
	}
	wantLines := []int{2, 3, 4, 15}
	if len(rows) != len(wantLines) {
		t.Fatalf("%d good rows, want %d", len(rows), len(wantLines))
	}
	for i, l := range wantLines {
		if rows[i].Line != l {
			t.Errorf("good row %d on line %d, want %d", i, rows[i].Line, l)
		}
	}
	s := rows[0].Sample
	if s.UnitId != "harrowmere-1" || s.PMw != 300 || s.QMvar != 120 || s.VKv != 20.4 || s.GetFieldA() != 2950 ||
		s.GetFrequencyHz() != 50.01 || s.GetCoolant() != 310 || s.Quality != pb.Quality_QUALITY_GOOD ||
		!s.Time.AsTime().Equal(time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)) {
		t.Errorf("row 2: %v", s)
	}
	s = rows[1].Sample
	if s.FieldA != nil || s.FrequencyHz != nil || s.Coolant != nil || s.Quality != pb.Quality_QUALITY_UNSPECIFIED ||
		s.PMw != 100 || s.QMvar != -35.5 || !s.Time.AsTime().Equal(time.Date(2026, 3, 1, 12, 0, 1, 250e6, time.UTC)) {
		t.Errorf("row 3: empty optional cells must be absent, the offset and fraction kept: %v", s)
	}
	if q := rows[2].Sample.Quality; q != pb.Quality_QUALITY_QUESTIONABLE {
		t.Errorf("row 4: quality %v", q)
	}
	if q := rows[3].Sample.Quality; q != pb.Quality_QUALITY_INVALID {
		t.Errorf("row 15: quality %v (sent, for the server to reject)", q)
	}

	wantBad := []RowError{
		{6, `q_mvar: "abc" is not a number`},
		{7, `q_mvar: "NaN" is not a finite number`},
		{8, `p_mw: "-Inf" is not a finite number`},
		{9, `time: "2026-03-01 12:00:03" is not an RFC 3339 time`},
		{10, "has 6 field(s), the header has 9"},
		{11, "unit is empty; v_kv is empty"},
		{12, `quality: "fine" must be good, questionable, invalid or empty`},
		{13, `field_a: "x" is not a number`},
	}
	bad := rd.Bad()
	if len(bad) != len(wantBad) {
		t.Fatalf("bad rows %v, want %d", bad, len(wantBad))
	}
	for i, w := range wantBad {
		if bad[i].Line != w.Line || !strings.HasPrefix(bad[i].Reason, w.Reason) {
			t.Errorf("bad row %d: %d %q, want %d %q", i, bad[i].Line, bad[i].Reason, w.Line, w.Reason)
		}
	}
	if rd.Rows() != len(rows)+len(bad) {
		t.Errorf("Rows %d, want %d", rd.Rows(), len(rows)+len(bad))
	}
}

// A broken quote is a bad row, and the rows after it are still read.
func TestReadBadQuote(t *testing.T) {
	file := "time,unit,p_mw,q_mvar,v_kv\n" +
		"2026-03-01T12:00:00Z,a\"b,1,1,1\n" + // 2
		"2026-03-01T12:00:01Z,u,1,1,1\n" // 3
	rd, err := NewReader("f.csv", strings.NewReader(file))
	if err != nil {
		t.Fatal(err)
	}
	row, ok, err := rd.Read()
	if err != nil || !ok || row.Line != 3 {
		t.Fatalf("Read: line %d %v %v, want the row of line 3", row.Line, ok, err)
	}
	if b := rd.Bad(); len(b) != 1 || b[0].Line != 2 || !strings.Contains(b[0].Reason, "not valid CSV") {
		t.Errorf("bad rows %v, want line 2 not valid CSV", b)
	}
}
