// Package oncall holds the end-to-end test of the on-call chain: the real
// genvelope binary fed over gRPC, a real Prometheus scraping it with the
// rules of deploy/prometheus, a real Alertmanager with the configuration
// of deploy/alertmanager, and a webhook of the test's own that must
// receive the page.
//
// The outside programs come from Debian's packages (apt-get install
// prometheus prometheus-alertmanager). Without them the test skips,
// saying so, except when CI=true, where it fails. Under -short it skips.
package oncall
