package journal

import (
	"encoding/csv"
	"io"
	"strconv"
	"time"
)

// CSVHeader is the header row of WriteCSV.
var CSVHeader = []string{"seq", "time", "recorded", "unit", "site", "limit", "change", "level", "previous_level",
	"value", "threshold", "actual", "limit_value", "units", "operator", "message", "log_seq"}

// logSeq is the log_seq column: empty for an entry not from a log.
func logSeq(seq uint64) string {
	if seq == 0 {
		return ""
	}
	return strconv.FormatUint(seq, 10)
}

// WriteCSV writes entries as comma-separated text (RFC 4180) with a
// header row; times in RFC 3339 UTC, absent numbers empty.
func WriteCSV(w io.Writer, entries []Entry) error {
	cw := csv.NewWriter(w)
	if err := cw.Write(CSVHeader); err != nil {
		return err
	}
	num := func(x *float64) string {
		if x == nil {
			return ""
		}
		return strconv.FormatFloat(*x, 'g', -1, 64)
	}
	for _, e := range entries {
		rec := []string{strconv.FormatUint(e.Seq, 10), e.Time.UTC().Format(time.RFC3339Nano), e.Recorded.UTC().Format(time.RFC3339Nano),
			e.Unit, e.Site, e.Limit, e.Change, e.Level, e.Prev, num(e.Value), num(e.Threshold), num(e.Actual), num(e.LimitAt),
			e.Units, e.Operator, e.Message, logSeq(e.LogSeq)}
		if err := cw.Write(rec); err != nil {
			return err
		}
	}
	cw.Flush()
	return cw.Error()
}
