package httpapi

import (
	"fmt"
	"math"
	"strconv"
	"strings"
)

var byteUnits = []struct {
	suffix string
	factor int64
}{
	{"GiB", 1 << 30}, {"MiB", 1 << 20}, {"KiB", 1 << 10},
	{"GB", 1e9}, {"MB", 1e6}, {"kB", 1e3}, {"KB", 1e3}, {"B", 1},
}

// ParseBytes reads a number of bytes with an optional IEC (KiB, MiB, GiB)
// or SI (kB, MB, GB) suffix (IEC 80000-13): 8MiB, 1.5KiB, 1000000.
func ParseBytes(s string) (int64, error) {
	t := strings.TrimSpace(s)
	factor := int64(1)
	for _, u := range byteUnits {
		if rest, ok := strings.CutSuffix(t, u.suffix); ok {
			t, factor = strings.TrimSpace(rest), u.factor
			break
		}
	}
	v, err := strconv.ParseFloat(t, 64)
	if err != nil || math.IsNaN(v) || v < 0 || v*float64(factor) > math.MaxInt64/2 {
		return 0, fmt.Errorf("expected a number of bytes such as 8MiB, 512KiB or 1000000, got %q", s)
	}
	return int64(v * float64(factor)), nil
}

// FormatBytes writes n with the largest IEC suffix that divides it: 8MiB,
// 1000.
func FormatBytes(n int64) string {
	for _, u := range byteUnits[:3] {
		if n >= u.factor && n%u.factor == 0 {
			return strconv.FormatInt(n/u.factor, 10) + u.suffix
		}
	}
	return strconv.FormatInt(n, 10)
}
