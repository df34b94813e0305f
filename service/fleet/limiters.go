package fleet

// decodeLimiters decodes the regulator's limiters other than the UEL,
// the keys oel, scl and vhz_limiter of the excitation: mapping m at path
// (coordination.md, "Inputs"). This version reports them as not supported
// yet; the coordination study's version reads them.
func (c *unitCtx) decodeLimiters(m *mapping, path string) {
	for _, key := range []string{"oel", "scl", "vhz_limiter"} {
		if _, line, present := m.get(key); present {
			c.errorf(line, join(path, key), "not supported yet by this version of genvelope; remove it (the coordination study reads it)")
		}
	}
}
