//go:build !amd64 || purego

package f32

// convForm is one implementation of the convolution tile.
type convForm struct {
	name string
	fn   func(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32)
}

// convForms is the dispatch alone: this build has no assembly.
func convForms() []convForm { return []convForm{{"Conv6x16", Conv6x16}} }

// wideConvForm is one implementation of a 32-wide convolution tile that
// stores the first rows rows of the 6×32 tile.
type wideConvForm struct {
	name string
	rows int
	fn   func(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32)
}

// wideConvForms are the dispatches alone: this build has no assembly.
func wideConvForms() []wideConvForm {
	return []wideConvForm{{"Conv6x32", 6, Conv6x32}, {"Conv4x32", 4, Conv4x32}}
}

// eightConvForms are the 8×32 tile's implementations: the dispatch alone.
func eightConvForms() map[string]func(kc int, a0, a1, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32) {
	return map[string]func(kc int, a0, a1, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32){"Conv8x32": Conv8x32}
}

// rowConvForms are the 1×128 tile's implementations: the dispatch alone.
func rowConvForms() map[string]func(kc int, a, b *float32, off *int32, c *float32, bias *float32) {
	return map[string]func(kc int, a, b *float32, off *int32, c *float32, bias *float32){"Conv1x128": Conv1x128}
}
