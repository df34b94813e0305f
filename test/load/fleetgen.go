package main

import (
	"bytes"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"time"

	"github.com/genvelope/genvelope/limits"
	"github.com/genvelope/genvelope/service/fleet"
)

// unitsPerSite is how many synthetic units share one site.
const unitsPerSite = 4

// unitTemplates are the three units of deploy/examples/fleet.yaml in
// flow style (without their regulators and protection), with the id,
// name and site left as %[1]s, %[2]s, %[3]s: a
// hydrogen-cooled steam unit with an end-region curve and a coolant
// table, a salient-pole hydro unit without either, and an air-cooled gas
// turbine unit with an ambient-temperature table.
var unitTemplates = [...]string{
	`  - id: %[1]s
    name: %[2]s
    site: %[3]s
    rating: {mva: 390, kv: 20, power_factor: 0.85, frequency_hz: 50, poles: 2}
    machine: {rotor: round, xd: 2.05, xl: 0.17, xp: 0.19, ra: 0.0018, xd_transient: 0.27, inertia_h_s: 4.8, td0_transient_s: 8.2, saturation: {s10: 0.11, s12: 0.38}}
    field: {air_gap_a: 1050, rated_a: 3150}
    prime_mover: {p_max_mw: 335, p_min_mw: 120}
    grid: {x_external_pu: 0.18}
    stability: {margin_fraction: 0.10}
    end_region:
      voltage_exponent: 2
      points: [{p_mw: 0, q_mvar: -190}, {p_mw: 150, q_mvar: -170}, {p_mw: 260, q_mvar: -130}, {p_mw: 335, q_mvar: -90}]
    coolant:
      quantity: hydrogen_pressure_kpa
      points: [{at: 100, armature: 0.74, field: 0.72}, {at: 200, armature: 0.86, field: 0.85}, {at: 310, armature: 0.95, field: 0.94}, {at: 414, armature: 1.00, field: 1.00}]
`,
	`  - id: %[1]s
    name: %[2]s
    site: %[3]s
    rating: {mva: 120, kv: 13.8, power_factor: 0.9, frequency_hz: 50, poles: 36}
    machine: {rotor: salient, xd: 1.05, xq: 0.66, xl: 0.15, xp: 0.21, ra: 0.003, xd_transient: 0.30, inertia_h_s: 3.2, td0_transient_s: 6.1, saturation: {s10: 0.09, s12: 0.30}}
    field: {air_gap_a: 680, rated_a: 1320}
    prime_mover: {p_max_mw: 110, p_min_mw: 20}
    grid: {x_external_pu: 0.15}
`,
	`  - id: %[1]s
    name: %[2]s
    site: %[3]s
    rating: {mva: 160, kv: 15, power_factor: 0.85, frequency_hz: 50, poles: 2}
    machine: {rotor: round, xd: 2.2, xl: 0.14, ra: 0.0025, xd_transient: 0.24, inertia_h_s: 6.5, td0_transient_s: 7.4, saturation: {s10: 0.10, s12: 0.42}}
    field: {air_gap_a: 520, rated_a: 1610}
    prime_mover: {p_max_mw: 136, p_min_mw: 40}
    grid: {x_external_pu: 0.20}
    coolant:
      quantity: ambient_c
      points: [{at: -20, armature: 1.10, field: 1.08}, {at: 0, armature: 1.07, field: 1.06}, {at: 15, armature: 1.04, field: 1.03}, {at: 40, armature: 1.00, field: 1.00}, {at: 50, armature: 0.93, field: 0.92}]
`,
}

// exciterDesigns are invented voltage regulators (and stabilizers) of
// a few designs, in the shape of the fleet file's excitation and
// stabilizer keys; a unit given one is evaluated on the avr stability
// basis. From fast and high-gain to slow: a bus-fed static exciter
// with a two-stage stabilizer, a static exciter without one, a
// brushless rotating exciter (no negative field voltage), and a slow
// rotating exciter with a single-stage stabilizer.
var exciterDesigns = [...]string{
	`    excitation: {k_a: 200, t_a_s: 0.02, t_r_s: 0.02, efd_min_pu: -4.5, efd_max_pu: 5.6}
    stabilizer: {k: 10, t_w_s: 3, t1_s: 0.15, t2_s: 0.03, t3_s: 0.08, t4_s: 0.03}
`,
	`    excitation: {k_a: 100, t_a_s: 0.03, t_r_s: 0.015, efd_min_pu: -4, efd_max_pu: 5}
`,
	`    excitation: {k_a: 50, t_a_s: 0.15, t_r_s: 0.02, efd_min_pu: 0, efd_max_pu: 4.5}
`,
	`    excitation: {k_a: 30, t_a_s: 0.25, t_r_s: 0.04, efd_min_pu: -1.5, efd_max_pu: 3.8}
    stabilizer: {k: 6, t_w_s: 5, t1_s: 0.25, t2_s: 0.05, t3_s: 0.1, t4_s: 0.05}
`,
}

// hasExciter says whether synthetic unit i of a fleet with the share
// avrShare (0..1) of units on the avr basis is given a regulator: spread
// evenly, so that every run of units from the first has the share,
// rounded down.
func hasExciter(i int, avrShare float64) bool {
	return math.Floor(float64(i+1)*avrShare) > math.Floor(float64(i)*avrShare)
}

// exciterOf returns the regulator of synthetic unit i: the designs in
// turn, so that each template gets each design.
func exciterOf(i int) string { return exciterDesigns[(i/len(unitTemplates))%len(exciterDesigns)] }

// unitID returns the id of synthetic unit i (from 0): syn-00001, ...
func unitID(i int) string { return fmt.Sprintf("syn-%05d", i+1) }

// siteName returns the site of synthetic unit i: site-001, ...
func siteName(i int) string { return fmt.Sprintf("site-%03d", i/unitsPerSite+1) }

// fleetYAML returns a fleet file of n units, cycling over the
// templates, the share avrShare of them with a regulator.
func fleetYAML(n int, avrShare float64) []byte {
	var b bytes.Buffer
	b.Grow(n * 1000)
	fmt.Fprintf(&b, "# Synthetic fleet of %d units for the genvelope load harness (%.0f %% with a voltage regulator, on the avr basis).\n# Copies of the three units of deploy/examples/fleet.yaml; invented data.\nunits:\n", n, 100*avrShare)
	for i := range n {
		fmt.Fprintf(&b, unitTemplates[i%len(unitTemplates)], unitID(i), fmt.Sprintf("Synthetic unit %d", i+1), siteName(i))
		if hasExciter(i, avrShare) {
			b.WriteString(exciterOf(i))
		}
	}
	return b.Bytes()
}

// fleetInfo describes the generated fleet file.
type fleetInfo struct {
	Path    string        `json:"-"`
	Units   int           `json:"units"`
	AVR     int           `json:"units_avr_basis"`
	Sites   int           `json:"sites"`
	Bytes   int           `json:"file_bytes"`
	ParseMS float64       `json:"parse_ms"`
	Fleet   *fleet.Fleet  `json:"-"`
	parse   time.Duration // for the log
}

// writeFleet writes a fleet file of n units into dir and checks that it
// parses without errors into exactly those units.
func writeFleet(dir string, n int, avrShare float64) (*fleetInfo, error) {
	data := fleetYAML(n, avrShare)
	path := filepath.Join(dir, "fleet.yaml")
	if err := os.WriteFile(path, data, 0o644); err != nil {
		return nil, err
	}
	start := time.Now()
	fl, ds, err := fleet.Load(path)
	if err != nil {
		return nil, err
	}
	took := time.Since(start)
	if ds.HasErrors() {
		return nil, fmt.Errorf("the synthetic fleet file %s has %d errors:\n%s", path, ds.Count(fleet.Error), ds)
	}
	if len(fl.Units) != n {
		return nil, fmt.Errorf("the synthetic fleet file %s parsed into %d units, want %d", path, len(fl.Units), n)
	}
	avr := 0
	for i, u := range fl.Units {
		if u.ID != unitID(i) || u.Model == nil {
			return nil, fmt.Errorf("synthetic unit %d parsed as %q (model %v)", i, u.ID, u.Model != nil)
		}
		if isAVR := u.Stability.Basis == limits.BasisAVR; isAVR != hasExciter(i, avrShare) {
			return nil, fmt.Errorf("synthetic unit %s: on the avr basis %v, want %v", u.ID, isAVR, !isAVR)
		}
		if u.Stability.Basis == limits.BasisAVR {
			avr++
		}
	}
	return &fleetInfo{
		Path: path, Units: n, AVR: avr, Sites: (n + unitsPerSite - 1) / unitsPerSite, Bytes: len(data),
		ParseMS: ms(took), Fleet: fl, parse: took,
	}, nil
}
