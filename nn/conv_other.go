//go:build !amd64 || purego

package nn

import "unsafe"

// sconvKern6x16 computes c[r·ldc+j] = Σ_p a[6p+r]·b[off[p]+j] (+ bias[r]
// when bias is not nil) for r < 6, j < 16 in plain Go. The packed driver
// runs only where sgemmKernel exists (amd64), so this version only keeps
// other builds compiling.
func sconvKern6x16(kc int, a, b *float32, off *int32, c *float32, ldc int, bias *float32) {
	as := unsafe.Slice(a, 6*kc)
	os := unsafe.Slice(off, kc)
	cs := unsafe.Slice(c, 5*ldc+16)
	for r := 0; r < 6; r++ {
		for j := 0; j < 16; j++ {
			var t float32
			for p, o := range os {
				t += as[6*p+r] * *(*float32)(unsafe.Add(unsafe.Pointer(b), 4*(int(o)+j)))
			}
			if bias != nil {
				t += *(*float32)(unsafe.Add(unsafe.Pointer(bias), 4*r))
			}
			cs[r*ldc+j] = t
		}
	}
}

// sconvCopyRows copies rows rows of w floats from src (row stride lds) to
// dst (row stride ldd).
func sconvCopyRows(dst *float32, ldd int, src *float32, lds int, rows, w int) {
	if rows == 0 || w == 0 {
		return
	}
	d := unsafe.Slice(dst, (rows-1)*ldd+w)
	s := unsafe.Slice(src, (rows-1)*lds+w)
	for r := 0; r < rows; r++ {
		copy(d[r*ldd:r*ldd+w], s[r*lds:r*lds+w])
	}
}
