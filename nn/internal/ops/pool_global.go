package ops

// Global pools reduce each plane (all spatial positions of one sample and
// channel) to one value. The kernels below compute what the windowed
// kernels (pool_window.go) compute on the global geometry (one window of
// n = the plane size), bit for bit: the max is the first maximum or the first NaN in
// row-major order, the mean adds left to right from zero and divides by n,
// gradients are 0 + dy (max) and 0 + dy/n (mean) and dx is written once.

// poolGlobalForward is the forward global pool over planes planes of n
// elements.
func poolGlobalForward[T float](n, planes int, takeMax bool, x, y []T) {
	if takeMax {
		for pl := range y[:planes] {
			xp := x[pl*n : (pl+1)*n]
			y[pl] = xp[poolTileArgmax(xp, 0, n, 1, n)]
		}
		return
	}
	div := T(n)
	pl := 0
	// Four planes at a time: four independent chains of additions, each in
	// the order of the one-plane loop, keep the adder busy.
	for ; pl+4 <= planes; pl += 4 {
		x0 := x[pl*n : (pl+1)*n]
		x1 := x[(pl+1)*n : (pl+2)*n]
		x2 := x[(pl+2)*n : (pl+3)*n]
		x3 := x[(pl+3)*n : (pl+4)*n]
		var s0, s1, s2, s3 T
		for i, v := range x0 {
			s0 += v
			s1 += x1[i]
			s2 += x2[i]
			s3 += x3[i]
		}
		y[pl], y[pl+1], y[pl+2], y[pl+3] = s0/div, s1/div, s2/div, s3/div
	}
	for ; pl < planes; pl++ {
		var s T
		for _, v := range x[pl*n : (pl+1)*n] {
			s += v
		}
		y[pl] = s / div
	}
}

// poolGlobalBackward is the global pool gradient; it overwrites all
// of dx.
func poolGlobalBackward[T float](n, planes int, takeMax bool, x, dy, dx []T) {
	div := T(n)
	for pl, d := range dy[:planes] {
		xp := x[pl*n : (pl+1)*n]
		dxp := dx[pl*n : (pl+1)*n]
		if takeMax {
			clear(dxp)
			dxp[poolTileArgmax(xp, 0, n, 1, n)] = 0 + d
			continue
		}
		var v T
		v += d / div
		for i := range dxp {
			dxp[i] = v
		}
	}
}
