package main

import (
	"errors"
	"math"
	"strconv"
	"strings"
)

// number is a flag holding a finite float64; it remembers whether it was set.
type number struct {
	v   float64
	set bool
}

// defaultNumber returns a number flag that holds v until it is set.
func defaultNumber(v float64) *number { return &number{v: v} }

func (n *number) String() string {
	if n == nil || (!n.set && n.v == 0) {
		return ""
	}
	return strconv.FormatFloat(n.v, 'g', -1, 64)
}

func (n *number) Set(s string) error {
	v, err := strconv.ParseFloat(strings.TrimSpace(s), 64)
	if err != nil {
		return errors.New("not a number")
	}
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return errors.New("must be a finite number")
	}
	n.v, n.set = v, true
	return nil
}

// choice is a flag holding one of a fixed set of words.
type choice struct {
	v       string
	allowed []string
}

func (c *choice) String() string {
	if c == nil {
		return ""
	}
	return c.v
}

func (c *choice) Set(s string) error {
	for _, a := range c.allowed {
		if s == a {
			c.v = s
			return nil
		}
	}
	return errors.New("must be one of " + strings.Join(c.allowed, ", "))
}
