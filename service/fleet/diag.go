package fleet

import (
	"fmt"
	"sort"
	"strings"
)

// Severity tells whether a diagnostic stops the fleet file from being used.
type Severity uint8

const (
	// Error makes the fleet file unusable.
	Error Severity = iota
	// Warning points at something doubtful; the file is still usable.
	Warning
)

// String returns "error" or "warning".
func (s Severity) String() string {
	if s == Warning {
		return "warning"
	}
	return "error"
}

// A Diagnostic is one problem found in a fleet file.
type Diagnostic struct {
	File     string   // the name given to Parse, or the path given to Load
	Line     int      // 1-based line; 0 when no line applies
	UnitID   string   // the unit's id, "" for file-level problems
	Field    string   // dotted key path inside the unit (or file), e.g. "rating.mva"
	Message  string   // what is wrong and what is allowed
	Severity Severity // Error or Warning
}

// String formats the diagnostic as
//
//	FILE:LINE: unit "ID": FIELD: message
//
// leaving out the unit for file-level problems, the line when none
// applies, and putting "warning: " before the message of a warning.
func (d Diagnostic) String() string {
	var b strings.Builder
	b.WriteString(d.File)
	if d.Line > 0 {
		fmt.Fprintf(&b, ":%d", d.Line)
	}
	b.WriteString(": ")
	if d.UnitID != "" {
		fmt.Fprintf(&b, "unit %q: ", d.UnitID)
	}
	if d.Field != "" {
		b.WriteString(d.Field)
		b.WriteString(": ")
	}
	if d.Severity == Warning {
		b.WriteString("warning: ")
	}
	b.WriteString(d.Message)
	return b.String()
}

// Diagnostics are the problems of one fleet file, in line order.
type Diagnostics []Diagnostic

// HasErrors reports whether any diagnostic is an error.
func (ds Diagnostics) HasErrors() bool { return ds.Count(Error) > 0 }

// Count returns the number of diagnostics of severity s.
func (ds Diagnostics) Count(s Severity) int {
	n := 0
	for _, d := range ds {
		if d.Severity == s {
			n++
		}
	}
	return n
}

// String returns the diagnostics one per line.
func (ds Diagnostics) String() string {
	var b strings.Builder
	for _, d := range ds {
		b.WriteString(d.String())
		b.WriteByte('\n')
	}
	return b.String()
}

// sortByLine orders ds by line, keeping the order of finding within a line.
func (ds Diagnostics) sortByLine() {
	sort.SliceStable(ds, func(i, j int) bool { return ds[i].Line < ds[j].Line })
}
