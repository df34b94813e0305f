// Package restart tests what genvelope keeps across a crash: the real
// binary, run as a subprocess on loopback ports with a state file, is
// killed with SIGKILL in the middle of a field overload and started
// again on the same file. Under -short the tests skip.
package restart
