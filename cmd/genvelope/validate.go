package main

import (
	"flag"
	"fmt"

	"github.com/genvelope/genvelope/service/fleet"
)

func validateCommand() command {
	return command{
		name:    "validate",
		summary: "check a fleet file and report every problem in it",
		usage:   "--fleet FILE",
		about: "Checks the fleet file: its keys, values and units, and that each unit's rated point lies\n" +
			"inside its own capability envelope. Every problem is printed as FILE:LINE: unit \"ID\": FIELD: message.\n" +
			"Exits 2 when there is any error, 0 when there are none (warnings are printed but do not fail).",
		flags: func(fs *flag.FlagSet) func(env) int {
			path := fs.String("fleet", "", "the fleet `FILE` (YAML)")
			return func(e env) int { return validate(e, *path) }
		},
	}
}

func validate(e env, path string) int {
	c := validateCommand()
	if path == "" {
		return usageError(e, c, "missing --fleet FILE, the fleet file")
	}
	f, ds, err := fleet.Load(path)
	if err != nil {
		return loadError(e, c, path, err)
	}
	fmt.Fprint(e.stdout, ds.String())
	if n := ds.Count(fleet.Error); n > 0 {
		fmt.Fprintf(e.stdout, "%s: %d error(s), %d warning(s)\n", path, n, ds.Count(fleet.Warning))
		return exitUsage
	}
	if w := ds.Count(fleet.Warning); w > 0 {
		fmt.Fprintf(e.stdout, "%s: %d units, OK with %d warning(s)\n", path, len(f.Units), w)
		return exitOK
	}
	fmt.Fprintf(e.stdout, "%s: %d units, OK\n", path, len(f.Units))
	return exitOK
}
