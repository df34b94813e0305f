//go:build !unix

package fleet

// cpuSeconds is 0 where getrusage is not available: the benchmark then
// reports wall time only.
func cpuSeconds() float64 { return 0 }
