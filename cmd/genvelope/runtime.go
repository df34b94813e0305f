package main

import (
	"flag"
	"log/slog"
	"os"
	"runtime/debug"
	"strconv"
)

// gcFlags are the garbage-collector settings of the commands that run the
// service. Ingest makes short-lived garbage (decoded requests) at a high
// rate over a small live heap, so a higher GOGC than Go's 100 saves much
// CPU; a soft memory limit, scaled to the fleet, keeps the resident size
// bounded all the same.
type gcFlags struct {
	percent   int
	limitMiB  int
	fromEnvGC bool
	fromEnvML bool
}

// defaultGCPercent is the GOGC the service runs with unless told
// otherwise. The load harness (test/load) measured about 40 % more
// samples per CPU second at 400 than at 100 on 1,000 units.
const defaultGCPercent = 400

func addGCFlags(fs *flag.FlagSet) *gcFlags {
	g := &gcFlags{}
	_, g.fromEnvGC = os.LookupEnv("GOGC")
	_, g.fromEnvML = os.LookupEnv("GOMEMLIMIT")
	fs.IntVar(&g.percent, "gc-percent", defaultGCPercent, "the Go garbage collector's GOGC (the GOGC environment variable, when set, wins)")
	fs.IntVar(&g.limitMiB, "memory-limit-mib", 0, "soft limit on the Go runtime's memory in MiB; 0 scales it to the fleet: 64 MiB + 12 KiB per unit (the GOMEMLIMIT environment variable, when set, wins)")
	return g
}

// apply sets the collector for a fleet of units.
func (g *gcFlags) apply(units int, log *slog.Logger) {
	gogc := "from GOGC"
	if !g.fromEnvGC {
		debug.SetGCPercent(g.percent)
		gogc = strconv.Itoa(g.percent)
	}
	limit := "from GOMEMLIMIT"
	if !g.fromEnvML {
		n := int64(g.limitMiB) << 20
		if n <= 0 {
			// A unit's live state is about 10 KiB after a full pass (7.3 KiB
			// in ingest, TestMemoryPerUnit; the rest its configuration
			// and engine tables): see "Memory per unit" in DEVELOPERS.md.
			n = 64<<20 + int64(units)*12<<10
		}
		debug.SetMemoryLimit(n)
		limit = strconv.FormatInt(n>>20, 10) + " MiB"
	}
	log.Info("garbage collector", "gogc", gogc, "memory_limit", limit)
}
