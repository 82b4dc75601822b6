//go:build !amd64 || purego

package f32

// convForm is one implementation of the convolution tile.
type convForm struct {
	name string
	fn   func(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32)
}

// convForms is the dispatch alone: this build has no assembly.
func convForms() []convForm { return []convForm{{"Conv6x16", Conv6x16}} }

// wideConvForm is one implementation of the 6×32 convolution tile.
type wideConvForm struct {
	name string
	fn   func(kc int, a, b0, b1 *float32, off *int32, c *float32, ldc int, bias *float32)
}

// wideConvForms is the dispatch alone: this build has no assembly.
func wideConvForms() []wideConvForm { return []wideConvForm{{"Conv6x32", Conv6x32}} }
