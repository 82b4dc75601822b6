package samples_test

import (
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

func TestCSVNumbers(t *testing.T) {
	// Numbers in decimal notation are read; the other spellings
	// strconv.ParseFloat accepts (digit separators, hexadecimal floats,
	// Go 1.13) are not numbers in a data file (common practice: NumPy's
	// loadtxt and spreadsheets read neither), and values out of the
	// binary64 range (IEEE 754: largest finite 1.797…e308, smallest
	// subnormal 4.94…e-324) are reported as such, not read as ±Inf or 0.
	spec := samples.Spec{Name: "x", Shape: []int{-1, 2}, HasShape: true}
	file := "a,b\n" +
		"12,-0.5\n" + // 2
		".5,3.\n" + // 3
		"+1e3,1E-3\n" + // 4
		"1e-320,0e-999\n" + // 5: a subnormal, and zero written with a large exponent
		"1_000,1\n" + // 6
		"0x1p-2,1\n" + // 7
		"1e400,1\n" + // 8
		"1e-400,1\n" + // 9
		"-2e-400,1\n" + // 10
		"NaN,inf\n" // 11
	b, err := samples.Read(strings.NewReader(file), "n.csv", spec, samples.Options{KeepBad: true})
	require.NoError(t, err)
	require.Equal(t, 10, b.Samples)
	assert.Equal(t, []float64{12, -0.5}, b.Sample(0))
	assert.Equal(t, []float64{0.5, 3}, b.Sample(1))
	assert.Equal(t, []float64{1000, 0.001}, b.Sample(2))
	assert.Equal(t, []float64{1e-320, 0}, b.Sample(3))
	assert.EqualError(t, b.Bad[4], `line 6, column a: "1_000" is not a number`)
	assert.EqualError(t, b.Bad[5], `line 7, column a: "0x1p-2" is not a number`)
	assert.EqualError(t, b.Bad[6], "line 8, column a: 1e400 is out of the float64 range (larger than 1.8e308 in magnitude)")
	assert.EqualError(t, b.Bad[7], "line 9, column a: 1e-400 is out of the float64 range (smaller than 4.9e-324 in magnitude, it would read as 0)")
	assert.Contains(t, b.Bad[8].Error(), "-2e-400 is out of the float64 range")
	var re *samples.RangeError
	assert.ErrorAs(t, b.Bad[6], &re)
	// NaN and infinities are words the reader knows, refused as not
	// finite where they are.
	assert.EqualError(t, b.Bad[9], "line 11, column a: NaN value is not a finite number")
	assert.ErrorIs(t, b.Bad[9], samples.ErrNonFinite)

	// A first row whose fields start as numbers do is data, not a header:
	// its values that cannot be read are its own error.
	b, err = samples.Read(strings.NewReader("1_000,1\n0x1p-2,-.5\n2,3\n"), "n.csv", spec, samples.Options{KeepBad: true})
	require.NoError(t, err)
	assert.Equal(t, 3, b.Samples)
	assert.Nil(t, b.Features)
	assert.EqualError(t, b.Bad[0], `line 1, column 1: "1_000" is not a number`)
	assert.EqualError(t, b.Bad[1], `line 2, column 1: "0x1p-2" is not a number`)
	b, err = samples.Read(strings.NewReader("a1,-x\n2,3\n"), "n.csv", spec, samples.Options{})
	require.NoError(t, err)
	assert.Equal(t, []string{"a1", "-x"}, b.Features, "names that do not start as numbers: a header")

	// A first row of numbers out of range is data, not a header.
	b, err = samples.Read(strings.NewReader("1e400,1\n2,3\n"), "n.csv", spec, samples.Options{KeepBad: true})
	require.NoError(t, err)
	assert.Equal(t, 2, b.Samples)
	assert.Nil(t, b.Features)

	// The table reader of summaries reads numbers the same way.
	tbl, err := samples.ReadTable(strings.NewReader("g,a,b\nx,1_000,2\ny,1e-400,2\nz,4,5\n"), "t.csv", samples.Spec{},
		samples.TableOptions{Size: 2, Features: []string{"a", "b"}, Group: "g"})
	require.NoError(t, err)
	assert.EqualError(t, tbl.Rows[0].Err, `column a: "1_000" is not a number`)
	assert.Contains(t, tbl.Rows[1].Err.Error(), "1e-400 is out of the float64 range")
	assert.Equal(t, []float64{4, 5}, tbl.Rows[2].Values)
}

func TestFloat32Range(t *testing.T) {
	// A float32 input cannot take values beyond ±3.4028235e38 or below
	// 1.4e-45 in magnitude but 0 (IEEE 754 binary32: largest finite, and
	// half the smallest subnormal, under which a value rounds to 0): such a
	// sample is reported, where a float64 input reads it.
	file := "[[1e39, 1], [1, 2], [-1e-46, 3], [3.4e38, 1.5e-45]]"
	f32 := samples.Spec{Name: "x", Elem: onnxlite.Float, Shape: []int{-1, 2}, HasShape: true}
	b, err := samples.Read(strings.NewReader(file), "n.json", f32, samples.Options{KeepBad: true})
	require.NoError(t, err)
	assert.EqualError(t, b.Bad[0], "sample 0, index 0: 1e+39 is out of the float32 range of the input (larger than 3.4e38 in magnitude)")
	assert.EqualError(t, b.Bad[2], "sample 2, index 0: -1e-46 is out of the float32 range of the input (smaller than 1.4e-45 in magnitude, it would read as 0)")
	assert.Len(t, b.Bad, 2)
	_, err = samples.Read(strings.NewReader(file), "n.json", f32, samples.Options{})
	assert.ErrorContains(t, err, "1e+39 is out of the float32 range")

	f64 := f32
	f64.Elem = onnxlite.Double
	b, err = samples.Read(strings.NewReader(file), "n.json", f64, samples.Options{})
	require.NoError(t, err)
	assert.Equal(t, 1e39, b.Data[0])
}
