package fidelity

import (
	"math"
	"slices"

	"gonum.org/v1/gonum/stat/distuv"
)

// Interval is a mean across samples with its 95% confidence interval,
// mean ± t₀.₉₇₅(n−1)·s/√n (Student 1908): the interval a reader compares
// methods by. With one sample Lo = Hi = Mean.
type Interval struct {
	Mean float64 `json:"mean"`
	Lo   float64 `json:"lo"`
	Hi   float64 `json:"hi"`
	// N is the number of samples with a value.
	N int `json:"n"`
}

// interval summarises the finite values of v; nil when there are none.
func interval(v []float64) *Interval {
	var xs []float64
	for _, x := range v {
		if !math.IsNaN(x) && !math.IsInf(x, 0) {
			xs = append(xs, x)
		}
	}
	if len(xs) == 0 {
		return nil
	}
	n := float64(len(xs))
	mean := 0.0
	for _, x := range xs {
		mean += x
	}
	mean /= n
	iv := &Interval{Mean: mean, Lo: mean, Hi: mean, N: len(xs)}
	if len(xs) < 2 {
		return iv
	}
	ss := 0.0
	for _, x := range xs {
		ss += (x - mean) * (x - mean)
	}
	half := distuv.StudentsT{Mu: 0, Sigma: 1, Nu: n - 1}.Quantile(0.975) * math.Sqrt(ss/(n-1)/n)
	iv.Lo, iv.Hi = mean-half, mean+half
	return iv
}

// quantile returns the q-quantile of v (sorted in place), linear between
// order statistics (Hyndman & Fan 1996, definition 7).
func quantile(v []float64, q float64) float64 {
	slices.Sort(v)
	h := q * float64(len(v)-1)
	lo := math.Floor(h)
	i := int(lo)
	if i+1 >= len(v) {
		return v[len(v)-1]
	}
	return v[i] + (h-lo)*(v[i+1]-v[i])
}
