package main

import (
	"bufio"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"time"

	"github.com/genvelope/genvelope/service/coord"
	"github.com/genvelope/genvelope/service/fleet"
)

type coordinateFlags struct {
	fleet, unit, out string
	format           choice
}

func coordinateCommand() command {
	return command{
		name:    "coordinate",
		summary: "check the limiters and protection against the machine (coordination study)",
		usage:   "--fleet FILE [--unit ID] --format text|json|html [--out FILE]",
		about: "Checks every unit's underexcitation, overexcitation and stator current limiters, its V/Hz limiter,\n" +
			"loss-of-field, field overcurrent and V/Hz protection against its capability and stability, at 0.95,\n" +
			"1.00 and 1.05 pu terminal voltage and 41 active powers from 0 to p_max. Each check is pass, fail or\n" +
			"not_applicable (naming the fleet-file keys that would enable it), with its worst margin and where.\n" +
			"html writes one self-contained printable report with the charts. Exit 0 when nothing fails, 1 when a\n" +
			"check fails, 2 on bad input.",
		advises: true,
		flags: func(fs *flag.FlagSet) func(env) int {
			f := &coordinateFlags{format: choice{v: "text", allowed: []string{"text", "json", "html"}}}
			fs.StringVar(&f.fleet, "fleet", "", "the fleet `FILE` (YAML)")
			fs.StringVar(&f.unit, "unit", "", "only the unit `ID` (default: every unit)")
			fs.Var(&f.format, "format", "output `format`: text, json or html")
			fs.StringVar(&f.out, "out", "", "write to `FILE` instead of standard output")
			return func(e env) int { return coordinate(e, f) }
		},
	}
}

func coordinate(e env, f *coordinateFlags) int {
	c := coordinateCommand()
	fl, code := loadFleet(e, c, f.fleet)
	if fl == nil {
		return code
	}
	var ids []string
	if f.unit != "" {
		u, code := lookupUnit(e, c, fl, f.unit)
		if u == nil {
			return code
		}
		ids = []string{u.ID}
	}
	rep := coord.Study(fl, ids...)
	data, err := os.ReadFile(f.fleet)
	if err != nil {
		return failf(e, c, exitFailure, "%v", err)
	}

	err = writeOutput(f.out, e.stdout, func(w io.Writer) error {
		switch f.format.v {
		case "json":
			return rep.WriteJSON(w)
		case "html":
			return rep.WriteHTML(w, coord.Source{FleetFile: f.fleet, Data: data, At: time.Now()})
		}
		return rep.WriteText(w)
	})
	if err != nil {
		return failf(e, c, exitFailure, "writing the %s: %v", f.format.v, err)
	}
	if f.out != "" {
		fmt.Fprintf(e.stdout, "wrote %s: %s coordination study of %d unit(s)\n%s\n", f.out, f.format.v, len(rep.Units), fleet.Caution)
	} else if f.format.v == "json" {
		// The JSON holds the contract's shape only; the caution goes beside it.
		fmt.Fprintln(e.stderr, fleet.Caution)
	}
	if rep.Failed() {
		return exitFailure
	}
	return exitOK
}

// writeOutput runs write on a buffered writer to the file out, or to
// stdout when out is "", and reports any error of the writing, the
// flushing or the closing.
func writeOutput(out string, stdout io.Writer, write func(io.Writer) error) error {
	w := stdout
	var file *os.File
	if out != "" {
		var err error
		if file, err = os.Create(out); err != nil {
			return err
		}
		w = file
	}
	bw := bufio.NewWriter(w)
	err := write(bw)
	if err == nil {
		err = bw.Flush()
	}
	if file != nil {
		err = errors.Join(err, file.Close())
	}
	return err
}
