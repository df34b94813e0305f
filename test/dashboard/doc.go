// Package dashboard tests the Grafana dashboard of deploy/grafana: its
// JSON model is checked for shape, and every query of every panel and
// every template variable is run against a real Prometheus scraping the
// real genvelope binary fed over gRPC, and must return data.
//
// The outside program comes from Debian's prometheus package (apt-get
// install prometheus). Without it the live test skips, saying so, except
// when CI=true, where it fails. Under -short it skips.
package dashboard
