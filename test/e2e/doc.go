// Package e2e holds genvelope's end-to-end tests: the real binary, run
// as a subprocess on loopback ports, fed over gRPC and scraped by a real
// Prometheus, with its /metrics checked by the real promtool.
//
// The outside programs come from Debian's prometheus package
// (apt-get install prometheus, which also ships promtool). Without them
// the tests skip, saying so, except when CI=true, where they fail. Under
// -short they skip.
package e2e
