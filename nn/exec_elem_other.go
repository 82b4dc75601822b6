//go:build !amd64 || purego

package nn

// execReluF32 stores y[i] = max(0, x[i]); len(y) == len(x).
func execReluF32(y, x []float32) { execReluGo(y, x) }

// execReluDiffF32 stores d[i] = g[i] where x[i] > 0 and 0 elsewhere;
// the three slices have one length.
func execReluDiffF32(d, x, g []float32) { execReluDiffGo(d, x, g) }
