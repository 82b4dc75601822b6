//go:build amd64 && !purego

package nn

// sconvKern6x16 is kern6x16 with row p of the B strip read in place at
// b[off[p]] (16 floats) instead of from a packed panel (conv_amd64.s). It
// stores c[r·ldc+j] = T[r][j] + bias[r] for r < 6, j < 16 with one
// rounding, bit-identical to kern6x16 with beta = 1 on a tile filled with
// the bias, or T[r][j] when bias is nil; c is never read. kc must be at
// least 1, every row must lie inside b's slice, and bias (when not nil)
// must hold 6 values.
//
//go:noescape
func sconvKern6x16(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32)

// sconvCopyRows copies rows rows of w floats from src (row stride lds) to
// dst (row stride ldd) (conv_amd64.s): the interior copy of a padded
// image, without a memmove call per row. Both regions must lie inside
// their slices.
//
//go:noescape
func sconvCopyRows(dst *float32, ldd int, src *float32, lds int, rows, w int)
