// Package examples embeds the example fleet file, so that tests and
// tools can use it without knowing where the repository lies.
package examples

import (
	_ "embed"
	"fmt"

	"github.com/genvelope/genvelope/service/fleet"
)

//go:embed fleet.yaml
var fleetYAML string

// FleetYAML returns the example fleet file, deploy/examples/fleet.yaml.
func FleetYAML() []byte { return []byte(fleetYAML) }

// Fleet parses the example fleet file. It is an error for it to have
// problems; the example is kept clean by the tests.
func Fleet() (*fleet.Fleet, error) {
	fl, ds := fleet.Parse("deploy/examples/fleet.yaml", FleetYAML())
	if ds.HasErrors() {
		return nil, fmt.Errorf("example fleet: %v", ds)
	}
	return fl, nil
}
