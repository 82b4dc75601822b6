package main

import (
	"bytes"
	"encoding/json"
	"math"
	"math/rand/v2"

	"codeberg.org/sbinet/npyio/npy"
)

// The welds scenario is invented: 32×32 grey patches of weld seams from a
// line-scan camera, classed clean or defective. Every number below is made
// up for the demo.

// weldClasses are the model's outputs, in output order.
var weldClasses = []string{"clean", "defective"}

// Sizes of the welds data set.
const (
	weldSize      = 32
	weldPixels    = weldSize * weldSize
	weldTrain     = 1600
	weldTest      = 200
	weldReference = 32
)

// Defect kinds; a clean patch has defectNone.
const (
	defectNone = iota
	defectCrack
	defectPorosity
)

// weldPatch is one invented patch with its ground truth.
type weldPatch struct {
	Pix    [weldPixels]float32 // grey levels k/255, row-major [y][x]
	Mask   [weldPixels]uint8   // 1 where the defect darkens the seam
	Label  int                 // index into weldClasses
	Defect int                 // defectNone, defectCrack or defectPorosity
}

// drawWeld draws one patch. The seam is a bright band about row 16, tilted
// by up to ±0.15 px per column, with a half-width of 3.5–5.5 px, transverse
// solidification ripples and pixel noise, on a darker textured plate. A
// defective patch (half of them) carries a crack — a dark line one or two
// pixels wide, along or across the seam — or porosity: one to three dark
// round pores inside the seam. The mask marks the pixels a defect darkens by
// more than 0.05.
func drawWeld(rng *rand.Rand, defective bool) weldPatch {
	var p weldPatch
	yc0 := 15.5 + 3*(2*rng.Float64()-1)
	slope := 0.15 * (2*rng.Float64() - 1)
	hw := 3.5 + 2*rng.Float64()
	plate := 0.25 + 0.1*rng.Float64()
	bright := 0.45 + 0.15*rng.Float64()
	ripple := 4 + 2*rng.Float64()
	phase := 2 * math.Pi * rng.Float64()
	centre := func(x float64) float64 { return yc0 + slope*(x-15.5) }

	var base [weldPixels]float64
	for y := range weldSize {
		for x := range weldSize {
			fx, fy := float64(x), float64(y)
			dy := (fy - centre(fx)) / hw
			band := math.Exp(-dy * dy * dy * dy) // flat-topped seam profile
			r := 0.05 * math.Sin(2*math.Pi*(fx+0.8*math.Abs(fy-centre(fx)))/ripple+phase)
			base[y*weldSize+x] = plate + band*(bright+r) + 0.03*rng.NormFloat64()
		}
	}

	var dark [weldPixels]float64
	if defective {
		p.Label = 1
		if rng.IntN(2) == 0 {
			p.Defect = defectCrack
			depth := 0.3 + 0.15*rng.Float64()
			width := 0.6 + 0.5*rng.Float64()
			if rng.IntN(2) == 0 { // along the seam
				x0 := 4 + 12*rng.Float64()
				x1 := x0 + 8 + 8*rng.Float64()
				off := (hw * 0.5) * (2*rng.Float64() - 1)
				wob := 2 * math.Pi * rng.Float64()
				for y := range weldSize {
					for x := range weldSize {
						fx, fy := float64(x), float64(y)
						if fx < x0 || fx > x1 {
							continue
						}
						cy := centre(fx) + off + 0.6*math.Sin(fx/2.5+wob)
						d := math.Abs(fy-cy) / width
						dark[y*weldSize+x] = math.Max(dark[y*weldSize+x], depth*math.Exp(-d*d))
					}
				}
			} else { // across the seam
				xc := 6 + 20*rng.Float64()
				lean := 0.3 * (2*rng.Float64() - 1)
				for y := range weldSize {
					for x := range weldSize {
						fx, fy := float64(x), float64(y)
						if math.Abs(fy-centre(xc)) > hw*0.9 {
							continue
						}
						cx := xc + lean*(fy-centre(xc))
						d := math.Abs(fx-cx) / width
						dark[y*weldSize+x] = math.Max(dark[y*weldSize+x], depth*math.Exp(-d*d))
					}
				}
			}
		} else {
			p.Defect = defectPorosity
			pores := 1 + rng.IntN(3)
			for range pores {
				px := 5 + 22*rng.Float64()
				py := centre(px) + 0.5*hw*(2*rng.Float64()-1)
				rad := 1.2 + 1.3*rng.Float64()
				depth := 0.3 + 0.15*rng.Float64()
				for y := range weldSize {
					for x := range weldSize {
						dx, dy := float64(x)-px, float64(y)-py
						d := math.Sqrt(dx*dx+dy*dy) / rad
						dark[y*weldSize+x] = math.Max(dark[y*weldSize+x], depth/(1+math.Pow(d, 6)))
					}
				}
			}
		}
	}
	for i := range base {
		v := base[i] - dark[i]
		v = math.Min(1, math.Max(0, v))
		p.Pix[i] = float32(math.Round(v*255)) / 255
		if dark[i] > 0.05 {
			p.Mask[i] = 1
		}
	}
	return p
}

// weldSet is the invented welds data set, a pure function of the seed.
type weldSet struct {
	Train, Test, Reference []weldPatch
}

// generateWelds draws weldTrain training patches, weldTest held-out
// patches and weldReference clean reference patches, each set half clean
// and half defective in a seeded random order (the reference set is all
// clean).
func generateWelds(seed uint64) weldSet {
	rng := rand.New(rand.NewPCG(seed, 0x77656c6473)) // stream "welds"
	draw := func(n int, allClean bool) []weldPatch {
		ps := make([]weldPatch, n)
		for i := range ps {
			ps[i] = drawWeld(rng, !allClean && rng.IntN(2) == 1)
		}
		return ps
	}
	var s weldSet
	s.Train = draw(weldTrain, false)
	s.Test = draw(weldTest, false)
	s.Reference = draw(weldReference, true)
	return s
}

// weldPatchesNPY encodes patches as a float32 .npy array [n, 1, 32, 32].
func weldPatchesNPY(ps []weldPatch) ([]byte, error) {
	v := make([][1][weldSize][weldSize]float32, len(ps))
	for i, p := range ps {
		for y := range weldSize {
			copy(v[i][0][y][:], p.Pix[y*weldSize:(y+1)*weldSize])
		}
	}
	var b bytes.Buffer
	err := npy.Write(&b, v)
	return b.Bytes(), err
}

// weldMasksNPY encodes the defect masks as a uint8 .npy array [n, 32, 32].
func weldMasksNPY(ps []weldPatch) ([]byte, error) {
	v := make([][weldSize][weldSize]uint8, len(ps))
	for i, p := range ps {
		for y := range weldSize {
			copy(v[i][y][:], p.Mask[y*weldSize:(y+1)*weldSize])
		}
	}
	var b bytes.Buffer
	err := npy.Write(&b, v)
	return b.Bytes(), err
}

// weldLabelsNPY encodes labels (0 clean, 1 defective) and defect kinds
// (0 none, 1 crack, 2 porosity) as an int64 .npy array [n, 2].
func weldLabelsNPY(ps []weldPatch) ([]byte, error) {
	v := make([][2]int64, len(ps))
	for i, p := range ps {
		v[i] = [2]int64{int64(p.Label), int64(p.Defect)}
	}
	var b bytes.Buffer
	err := npy.Write(&b, v)
	return b.Bytes(), err
}

// weldSampleJSON renders one patch as nested JSON [1][32][32].
func weldSampleJSON(p weldPatch) ([]byte, error) {
	v := make([][][]float32, 1)
	v[0] = make([][]float32, weldSize)
	for y := range weldSize {
		v[0][y] = p.Pix[y*weldSize : (y+1)*weldSize]
	}
	b, err := json.Marshal(v)
	if err != nil {
		return nil, err
	}
	return append(b, '\n'), nil
}
