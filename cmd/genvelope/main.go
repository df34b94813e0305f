// Command genvelope checks a fleet file and places generator operating
// points against their capability and stability limits.
//
//	genvelope validate --fleet FILE
//	genvelope evaluate --fleet FILE --unit ID --p-mw P --q-mvar Q --v-kv V
//	genvelope envelope --fleet FILE --unit ID --format json|csv|svg
//	genvelope help [COMMAND]
//
// Exit status: 0 ok, 2 usage errors and bad input, 1 other failures.
package main

import (
	"errors"
	"flag"
	"fmt"
	"io"
	"io/fs"
	"os"
	"strings"

	"github.com/genvelope/genvelope/service/fleet"
)

// Exit codes.
const (
	exitOK      = 0
	exitFailure = 1
	exitUsage   = 2
)

func main() {
	os.Exit(run(os.Args[1:], os.Stdout, os.Stderr))
}

// env is where a command writes.
type env struct {
	stdout, stderr io.Writer
}

// command is one subcommand.
type command struct {
	name    string
	summary string
	usage   string // the argument synopsis
	about   string // what the command does, for its help
	advises bool   // the command gives numbers about operating a machine
	flags   func(fs *flag.FlagSet) func(e env) int
}

func commands() []command {
	return []command{validateCommand(), evaluateCommand(), envelopeCommand(), coordinateCommand(), serveCommand(), demoCommand(), replayCommand()}
}

func findCommand(name string) (command, bool) {
	for _, c := range commands() {
		if c.name == name {
			return c, true
		}
	}
	return command{}, false
}

// run runs genvelope with args (without the program name) and returns the
// exit code.
func run(args []string, stdout, stderr io.Writer) int {
	e := env{stdout: stdout, stderr: stderr}
	if len(args) == 0 {
		topUsage(stderr)
		return exitUsage
	}
	name, rest := args[0], args[1:]
	switch name {
	case "help", "-h", "-help", "--help":
		if name == "help" && len(rest) > 0 {
			c, ok := findCommand(rest[0])
			if !ok {
				fmt.Fprintf(stderr, "genvelope help: unknown command %q; commands: %s\n", rest[0], commandNames())
				return exitUsage
			}
			fs, _ := newFlagSet(c)
			commandUsage(stdout, c, fs)
			return exitOK
		}
		topUsage(stdout)
		return exitOK
	}
	c, ok := findCommand(name)
	if !ok {
		fmt.Fprintf(stderr, "genvelope: unknown command %q; commands: %s (see 'genvelope help')\n", name, commandNames())
		return exitUsage
	}
	fs, body := newFlagSet(c)
	if err := fs.Parse(rest); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			commandUsage(stdout, c, fs)
			return exitOK
		}
		return usageError(e, c, "%v", err)
	}
	if fs.NArg() > 0 {
		return usageError(e, c, "unexpected argument %q; every value goes with a flag", fs.Arg(0))
	}
	return body(e)
}

// newFlagSet returns the flags of command c and the function that runs
// the command once they are parsed.
func newFlagSet(c command) (*flag.FlagSet, func(env) int) {
	fs := flag.NewFlagSet("genvelope "+c.name, flag.ContinueOnError)
	fs.SetOutput(io.Discard)
	fs.Usage = func() {}
	return fs, c.flags(fs)
}

func commandNames() string {
	var names []string
	for _, c := range commands() {
		names = append(names, c.name)
	}
	return strings.Join(names, ", ")
}

// usageError reports a usage error of command c and returns exitUsage.
func usageError(e env, c command, format string, args ...any) int {
	fmt.Fprintf(e.stderr, "genvelope %s: %s\n", c.name, fmt.Sprintf(format, args...))
	fmt.Fprintf(e.stderr, "run 'genvelope help %s' for its flags\n", c.name)
	return exitUsage
}

// failf reports a failure of command c with the given exit code.
func failf(e env, c command, code int, format string, args ...any) int {
	fmt.Fprintf(e.stderr, "genvelope %s: %s\n", c.name, fmt.Sprintf(format, args...))
	return code
}

func topUsage(w io.Writer) {
	fmt.Fprint(w, "genvelope watches synchronous generators against their capability and stability limits.\n\n")
	fmt.Fprint(w, "Usage:\n  genvelope COMMAND [flags]\n\nCommands:\n")
	for _, c := range commands() {
		fmt.Fprintf(w, "  %-10s %s\n", c.name, c.summary)
	}
	fmt.Fprint(w, "  help       show the help of a command: genvelope help COMMAND\n")
	fmt.Fprint(w, "\nFlags may be written -name or --name, with the value after a space or '='.\n")
	fmt.Fprint(w, "\nExit status: 0 ok, 2 usage errors and bad input, 1 other failures.\n")
	fmt.Fprintf(w, "\n%s\n", fleet.Caution)
}

func commandUsage(w io.Writer, c command, fs *flag.FlagSet) {
	fmt.Fprintf(w, "Usage: genvelope %s %s\n\n%s\n\nFlags:\n", c.name, c.usage, c.about)
	fs.SetOutput(w)
	fs.PrintDefaults()
	fs.SetOutput(io.Discard)
	if c.advises {
		fmt.Fprintf(w, "\n%s\n", fleet.Caution)
	}
}

// loadFleet reads the fleet file and reports its diagnostics on stderr.
// The fleet is nil when it cannot be used; code is then the exit code.
func loadFleet(e env, c command, path string) (*fleet.Fleet, int) {
	if path == "" {
		return nil, usageError(e, c, "missing --fleet FILE, the fleet file")
	}
	f, ds, err := fleet.Load(path)
	if err != nil {
		return nil, loadError(e, c, path, err)
	}
	fmt.Fprint(e.stderr, ds.String())
	if ds.HasErrors() {
		fmt.Fprintf(e.stderr, "%s: %d error(s); fix the fleet file first\n", path, ds.Count(fleet.Error))
		return nil, exitUsage
	}
	return f, exitOK
}

// loadError reports a fleet file that cannot be read: a missing file is
// bad input, anything else a failure.
func loadError(e env, c command, path string, err error) int {
	if errors.Is(err, fs.ErrNotExist) {
		return failf(e, c, exitUsage, "%s: no such file", path)
	}
	return failf(e, c, exitFailure, "%v", err)
}

// lookupUnit finds the unit id in f.
func lookupUnit(e env, c command, f *fleet.Fleet, id string) (*fleet.Unit, int) {
	if id == "" {
		return nil, usageError(e, c, "missing --unit ID; units in %s: %s", f.File, strings.Join(f.IDs(), ", "))
	}
	u := f.Unit(id)
	if u == nil {
		return nil, failf(e, c, exitUsage, "unknown unit %q in %s; known units: %s", id, f.File, strings.Join(f.IDs(), ", "))
	}
	return u, exitOK
}
