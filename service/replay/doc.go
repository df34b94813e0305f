// Package replay sends recorded telemetry from a CSV file to a running
// genvelope over TelemetryService.Stream, and accounts for every row.
//
// # The CSV layout
//
// The file is comma-separated (RFC 4180 quoting) text in UTF-8. The first
// line is a header naming the columns; it is required. Columns may come in
// any order; they are found by their header name (surrounding spaces are
// ignored, the names are lower case):
//
//	column        required  meaning
//	time          yes       the sample time, RFC 3339 with an optional fraction of a
//	                        second and a UTC offset: 2026-03-01T12:00:00Z,
//	                        2026-03-01T13:00:00.250+01:00
//	unit          yes       the unit id, as in the fleet file
//	p_mw          yes       active power, MW (positive when generating)
//	q_mvar        yes       reactive power, Mvar (positive when overexcited)
//	v_kv          yes       line-line terminal voltage, kV
//	field_a       no        measured field current, A
//	frequency_hz  no        terminal frequency, Hz
//	coolant       no        the unit's coolant quantity, in the unit of its coolant table
//	quality       no        good, questionable or invalid; empty is good
//
// A column not in this list is an error that names it, and so is a
// required column that is missing or a column given twice: the file is
// not sent. An empty cell of an optional column means the value was not
// measured. Numbers are decimal ("12.5", "-3e2"); NaN and infinities are
// refused. Empty lines are skipped.
//
// Example:
//
//	time,unit,p_mw,q_mvar,v_kv,field_a,coolant
//	2026-03-01T12:00:00Z,harrowmere-1,300,120,20.4,2950,310
//	2026-03-01T12:00:01Z,harrowmere-1,301.2,118.5,20.4,,310
//
// # What becomes of each row
//
// A row that cannot be read (a wrong number of fields, a missing required
// cell, a number that does not parse or is not finite, a bad time, an
// unknown quality) is reported with its file line and the reason, and is
// not sent; the rows around it are. Every other row is sent, in file order,
// in batches over one stream with a small window of batches awaiting their
// acknowledgement. When the connection drops, the replay reconnects (a
// bounded number of times, with backoff) and resends every batch not yet
// acknowledged; the server answers a sample it has already accepted as a
// duplicate, so resending is safe. Each row is counted once, by the answer
// to the last sending of its batch: accepted, duplicate (already at the
// server, from an earlier run or a send whose answer was lost) or rejected
// with the server's reason (unknown_unit, out_of_order, future, ...),
// which is mapped back to the row's file line.
//
// The server remembers each unit's last 256 accepted times: replaying a
// file again after a partial run gives duplicates for rows within that
// memory and out_of_order for older ones.
package replay
