package durable

import (
	"fmt"
	"strconv"
	"strings"
)

// DefaultPartitions is how many partitions the fleet is split into unless
// configured otherwise. Changing it moves units between partitions: every
// replica of one stream must use the same number.
const DefaultPartitions = 8

// Partition returns the partition of unit id among n: the 32-bit FNV-1a
// hash of the id's bytes (offset basis 2166136261, prime 16777619) modulo
// n. FNV-1a is fixed, fast and has no seed, so the mapping is the same
// in every process and every version; a SCADA gateway can compute it.
func Partition(id string, n int) int {
	h := uint32(2166136261)
	for i := 0; i < len(id); i++ {
		h ^= uint32(id[i])
		h *= 16777619
	}
	return int(h % uint32(n))
}

// ParsePartitions reads a set of partitions such as "0-7", "0-3" or
// "1,4-5" among n; "" or "all" is every partition.
func ParsePartitions(s string, n int) ([]bool, error) {
	serves := make([]bool, n)
	s = strings.TrimSpace(s)
	if s == "" || s == "all" {
		for i := range serves {
			serves[i] = true
		}
		return serves, nil
	}
	for _, part := range strings.Split(s, ",") {
		part = strings.TrimSpace(part)
		lo, hi, isRange := strings.Cut(part, "-")
		a, err := strconv.Atoi(lo)
		if err != nil {
			return nil, fmt.Errorf("partitions %q: %q is not a partition number or range like 0-3", s, part)
		}
		b := a
		if isRange {
			if b, err = strconv.Atoi(hi); err != nil {
				return nil, fmt.Errorf("partitions %q: %q is not a partition number or range like 0-3", s, part)
			}
		}
		if a < 0 || b >= n || a > b {
			return nil, fmt.Errorf("partitions %q: %q is outside 0-%d (there are %d partitions)", s, part, n-1, n)
		}
		for i := a; i <= b; i++ {
			serves[i] = true
		}
	}
	return serves, nil
}

// formatPartitions writes serves back as ranges, for logs and the
// checkpoint.
func formatPartitions(serves []bool) string {
	var parts []string
	for i := 0; i < len(serves); {
		if !serves[i] {
			i++
			continue
		}
		j := i
		for j+1 < len(serves) && serves[j+1] {
			j++
		}
		if i == j {
			parts = append(parts, strconv.Itoa(i))
		} else {
			parts = append(parts, fmt.Sprintf("%d-%d", i, j))
		}
		i = j + 1
	}
	return strings.Join(parts, ",")
}
