// Package bounds holds bounded-resource tests: the service, run as its
// own process on loopback, under a 63 MB request, thousands of alarm
// watchers that never read and a thousand slow HTTP bodies, with its
// peak memory (VmHWM) reported and bounded and ingest answered beside
// them.
package bounds
