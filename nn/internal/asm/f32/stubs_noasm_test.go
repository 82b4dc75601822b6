//go:build !amd64 || purego

package f32

// convForm is one implementation of the convolution tile.
type convForm struct {
	name string
	fn   func(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32)
}

// convForms is the dispatch alone: this build has no assembly.
func convForms() []convForm { return []convForm{{"Conv6x16", Conv6x16}} }
