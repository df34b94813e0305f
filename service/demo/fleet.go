package demo

import (
	_ "embed"
	"fmt"

	"github.com/genvelope/genvelope/service/fleet"
)

//go:embed demo-fleet.yaml
var fleetYAML string

// FleetFileName is the name the demo fleet file is written under.
const FleetFileName = "demo-fleet.yaml"

// FleetYAML returns the demo fleet file.
func FleetYAML() []byte { return []byte(fleetYAML) }

// Fleet parses the demo fleet file. It is an error for it to have
// problems; the tests keep it clean of errors and warnings.
func Fleet() (*fleet.Fleet, error) {
	fl, ds := fleet.Parse(FleetFileName, FleetYAML())
	if ds.HasErrors() {
		return nil, fmt.Errorf("demo fleet: %v", ds)
	}
	return fl, nil
}
