package fleet

import (
	"fmt"

	"go.yaml.in/yaml/v3"

	"github.com/genvelope/genvelope/limits"
)

// TEMPORARY, until the engine's excitation decoder lands on main: an
// excitation: block holding only the limiters (decodeLimiters) and a
// minimal uel. The engine's decoder replaces this file and keeps calling
// decodeLimiters.

// tmpUEL is the uel: block in the file's units (MW, Mvar).
type tmpUEL struct {
	circle           bool
	cpMW, cqMvar, rM float64
	k                float64
	pMW, qMvar       []float64
	k1, k2           float64
}

func (c *unitCtx) decodeExcitationTmp(v *yaml.Node, path string, line int) {
	// The regulator's own keys are accepted and left to the engine's
	// decoder, so that files written for it read here too.
	keys := append([]string{"k_a", "t_a_s", "t_r_s", "efd_min_pu", "efd_max_pu", "uel"}, limiterKeys()...)
	m, ok := c.open(v, path, line, keys...)
	if !ok {
		return
	}
	if uv, ul, ok := m.get("uel"); ok {
		c.decodeUELTmp(uv, join(path, "uel"), ul)
	}
	c.decodeLimiters(m, path)
}

func (c *unitCtx) decodeUELTmp(v *yaml.Node, path string, line int) {
	m, ok := c.open(v, path, line, "shape", "center_p_mw", "center_q_mvar", "radius_mvar", "voltage_exponent", "points", "voltage_exponent_p", "voltage_exponent_q")
	if !ok {
		return
	}
	shape, ok := c.text(m, "shape", true, "circle or points")
	if !ok {
		return
	}
	u := &tmpUEL{}
	exp := between(-10, 10, false, false)
	switch shape {
	case "circle":
		u.circle = true
		var okP, okQ, okR bool
		u.cpMW, okP = c.number(m, "center_p_mw", true, "the centre's P in MW", nil)
		u.cqMvar, okQ = c.number(m, "center_q_mvar", true, "the centre's Q in Mvar", nil)
		u.rM, okR = c.number(m, "radius_mvar", true, "the radius in Mvar", positive)
		u.k, _ = c.number(m, "voltage_exponent", false, "the exponent k of v^k", exp)
		if !okP || !okQ || !okR {
			return
		}
	case "points":
		u.k1, _ = c.number(m, "voltage_exponent_p", false, "the exponent of v on P", exp)
		u.k2, _ = c.number(m, "voltage_exponent_q", false, "the exponent of v on Q", exp)
		items, pl, ok := c.list(m, "points", true, "at least two points {p_mw, q_mvar}")
		if !ok {
			return
		}
		for i, item := range items {
			pp := fmt.Sprintf("%s.points[%d]", path, i+1)
			pm, ok := c.open(item, pp, item.Line, "p_mw", "q_mvar")
			if !ok {
				return
			}
			p, okP := c.number(pm, "p_mw", true, "P in MW", nil)
			q, okQ := c.number(pm, "q_mvar", true, "Q in Mvar", nil)
			if !okP || !okQ {
				return
			}
			if n := len(u.pMW); n > 0 && p <= u.pMW[n-1] {
				c.errorf(item.Line, pp, "p_mw must be strictly increasing")
				return
			}
			u.pMW, u.qMvar = append(u.pMW, p), append(u.qMvar, q)
		}
		if len(u.pMW) < 2 {
			c.errorf(pl, path+".points", "give at least two points")
			return
		}
	default:
		c.errorf(c.u.Line(path+".shape"), path+".shape", "must be circle or points; got %q", clip(shape))
		return
	}
	c.u.uelTmp = u
}

// curve converts the UEL to pu on base b.
func (t *tmpUEL) curve(b limits.Base) *limits.UEL {
	if t == nil {
		return nil
	}
	if t.circle {
		return &limits.UEL{Shape: limits.UELCircle, CenterP: b.PowerPU(t.cpMW), CenterQ: b.PowerPU(t.cqMvar), Radius: b.PowerPU(t.rM), K: t.k}
	}
	u := &limits.UEL{Shape: limits.UELPoints, K1: t.k1, K2: t.k2}
	for i := range t.pMW {
		u.P = append(u.P, b.PowerPU(t.pMW[i]))
		u.Q = append(u.Q, b.PowerPU(t.qMvar[i]))
	}
	return u
}
