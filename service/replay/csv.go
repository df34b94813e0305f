package replay

import (
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"time"

	"google.golang.org/protobuf/types/known/timestamppb"

	pb "github.com/genvelope/genvelope/api/genvelope/v1"
)

// The columns of a replay file, in the order of the package
// documentation; the first numRequired are required.
const (
	colTime = iota
	colUnit
	colP
	colQ
	colV
	colField
	colFreq
	colCoolant
	colQuality
	numColumns
	numRequired = colV + 1
)

var columnNames = [numColumns]string{"time", "unit", "p_mw", "q_mvar", "v_kv", "field_a", "frequency_hz", "coolant", "quality"}

// Columns returns the column names a replay file may use, the required
// ones first.
func Columns() []string { return columnNames[:] }

// FileError is a problem with the file as a whole (it cannot be read, or
// its header is wrong): nothing of it is sent.
type FileError struct {
	File string
	Line int // 0 when the problem has no line
	Msg  string
}

func (e *FileError) Error() string {
	if e.Line > 0 {
		return fmt.Sprintf("%s:%d: %s", e.File, e.Line, e.Msg)
	}
	return fmt.Sprintf("%s: %s", e.File, e.Msg)
}

// RowError is a row that could not be read and was not sent.
type RowError struct {
	Line   int
	Reason string
}

// Row is one good row: its first line in the file and its sample.
type Row struct {
	Line   int
	Sample *pb.Sample
}

// Reader reads the rows of a replay file. Bad rows are kept in Bad and
// skipped, so that Read only ever returns good rows.
type Reader struct {
	name    string
	r       *csv.Reader
	col     [numColumns]int // field index of each column; -1 when absent
	nfields int

	rows int        // data rows read, good and bad
	bad  []RowError // the bad ones, in file order
}

// NewReader reads the header of the replay file r, named name in
// messages. A header that is missing or wrong is a *FileError.
func NewReader(name string, r io.Reader) (*Reader, error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = -1 // a row with the wrong number of fields is reported, not fatal
	cr.ReuseRecord = false
	rd := &Reader{name: name, r: cr}
	head, err := cr.Read()
	switch {
	case errors.Is(err, io.EOF):
		return nil, &FileError{File: name, Msg: "the file is empty; its first line must be the header (" + strings.Join(Columns(), ",") + ")"}
	case err != nil:
		var pe *csv.ParseError
		if errors.As(err, &pe) {
			return nil, &FileError{File: name, Line: pe.StartLine, Msg: "header: " + pe.Err.Error()}
		}
		return nil, &FileError{File: name, Msg: err.Error()}
	}
	line, _ := cr.FieldPos(0)
	if err := rd.header(head); err != "" {
		return nil, &FileError{File: name, Line: line, Msg: err}
	}
	return rd, nil
}

// header maps the header's names to columns, or says what is wrong.
func (rd *Reader) header(head []string) string {
	for i := range rd.col {
		rd.col[i] = -1
	}
	var unknown, twice []string
	for i, h := range head {
		if i == 0 {
			h = strings.TrimPrefix(h, "\ufeff") // a byte-order mark some spreadsheets write
		}
		h = strings.TrimSpace(h)
		c := -1
		for k, n := range columnNames {
			if strings.EqualFold(h, n) { // "P_MW" and "Time" are meant as p_mw and time
				c = k
			}
		}
		switch {
		case c < 0:
			unknown = append(unknown, strconv.Quote(h))
		case rd.col[c] >= 0:
			twice = append(twice, strconv.Quote(h))
		default:
			rd.col[c] = i
		}
	}
	var missing []string
	for c := range numRequired {
		if rd.col[c] < 0 {
			missing = append(missing, columnNames[c])
		}
	}
	var msgs []string
	if len(head) == 1 && strings.Contains(head[0], ";") {
		return "the header is one field with semicolons in it: this file separates its fields with ';' (as some spreadsheets write for locales with a decimal comma); save it as comma-separated values with a '.' decimal point"
	}
	if len(unknown) > 0 {
		msgs = append(msgs, fmt.Sprintf("unknown column(s) %s; the columns are %s", strings.Join(unknown, ", "), strings.Join(Columns(), ", ")))
	}
	if len(twice) > 0 {
		msgs = append(msgs, fmt.Sprintf("column(s) %s given more than once", strings.Join(twice, ", ")))
	}
	if len(missing) > 0 {
		msgs = append(msgs, fmt.Sprintf("missing required column(s) %s", strings.Join(missing, ", ")))
	}
	rd.nfields = len(head)
	return strings.Join(msgs, "; ")
}

// Read returns the next good row; ok is false at the end of the file.
// An error is a failure to read the file, not a bad row.
func (rd *Reader) Read() (row Row, ok bool, err error) {
	for {
		rec, err := rd.r.Read()
		if errors.Is(err, io.EOF) {
			return Row{}, false, nil
		}
		if err != nil {
			var pe *csv.ParseError
			if !errors.As(err, &pe) {
				return Row{}, false, fmt.Errorf("%s: %w", rd.name, err)
			}
			rd.rows++
			rd.bad = append(rd.bad, RowError{Line: pe.StartLine, Reason: "not valid CSV: " + pe.Err.Error()})
			continue
		}
		rd.rows++
		line, _ := rd.r.FieldPos(0)
		s, reason := rd.sample(rec)
		if reason != "" {
			rd.bad = append(rd.bad, RowError{Line: line, Reason: reason})
			continue
		}
		return Row{Line: line, Sample: s}, true, nil
	}
}

// Rows returns the number of data rows read so far, good and bad.
func (rd *Reader) Rows() int { return rd.rows }

// Bad returns the bad rows read so far, in file order.
func (rd *Reader) Bad() []RowError { return rd.bad }

// Offset returns how many bytes of the file have been read.
func (rd *Reader) Offset() int64 { return rd.r.InputOffset() }

// sample converts one record, or returns every reason it cannot.
func (rd *Reader) sample(rec []string) (*pb.Sample, string) {
	if len(rec) != rd.nfields {
		return nil, fmt.Sprintf("has %d field(s), the header has %d", len(rec), rd.nfields)
	}
	var why []string
	cell := func(c int) (string, bool) {
		if rd.col[c] < 0 {
			return "", false
		}
		v := strings.TrimSpace(rec[rd.col[c]])
		return v, v != ""
	}
	required := func(c int) string {
		v, ok := cell(c)
		if !ok {
			why = append(why, columnNames[c]+" is empty")
		}
		return v
	}
	number := func(c int, v string) float64 {
		x, err := strconv.ParseFloat(v, 64)
		switch {
		case err != nil:
			why = append(why, fmt.Sprintf("%s: %q is not a number", columnNames[c], v))
		case math.IsNaN(x) || math.IsInf(x, 0):
			why = append(why, fmt.Sprintf("%s: %q is not a finite number", columnNames[c], v))
		}
		return x
	}
	s := &pb.Sample{}
	if v := required(colTime); v != "" {
		t, err := time.Parse(time.RFC3339, v)
		if err != nil {
			why = append(why, fmt.Sprintf("time: %q is not an RFC 3339 time such as 2026-03-01T12:00:00Z or 2026-03-01T13:00:00.250+01:00", v))
		} else {
			s.Time = timestamppb.New(t)
		}
	}
	s.UnitId = required(colUnit)
	for _, c := range [...]int{colP, colQ, colV} {
		v := required(c)
		if v == "" {
			continue
		}
		x := number(c, v)
		switch c {
		case colP:
			s.PMw = x
		case colQ:
			s.QMvar = x
		default:
			s.VKv = x
		}
	}
	for _, c := range [...]int{colField, colFreq, colCoolant} {
		v, ok := cell(c)
		if !ok {
			continue
		}
		x := number(c, v)
		switch c {
		case colField:
			s.FieldA = &x
		case colFreq:
			s.FrequencyHz = &x
		default:
			s.Coolant = &x
		}
	}
	if v, ok := cell(colQuality); ok {
		switch strings.ToLower(v) {
		case "good":
			s.Quality = pb.Quality_QUALITY_GOOD
		case "questionable":
			s.Quality = pb.Quality_QUALITY_QUESTIONABLE
		case "invalid":
			s.Quality = pb.Quality_QUALITY_INVALID
		default:
			why = append(why, fmt.Sprintf("quality: %q must be good, questionable, invalid or empty", v))
		}
	}
	if len(why) > 0 {
		return nil, strings.Join(why, "; ")
	}
	return s, ""
}
