// Package testfiles writes and reads the sample files the tests feed the
// readers and the command line: backend tensors re-encoded as CSV, JSON and
// .npy, for tests only. Each float32 value is written as the shortest
// decimal that reads back to the same float32, so no value changes.
package testfiles

import (
	"bytes"
	"os"
	"reflect"
	"strconv"
	"strings"
	"testing"

	"codeberg.org/sbinet/npyio/npy"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/onnxlite"
)

// F32 is v as the shortest decimal of its float32 rounding.
func F32(v float64) string { return strconv.FormatFloat(v, 'g', -1, 32) }

// WriteCSV writes one row per sample (first axis), with an optional header.
func WriteCSV(t testing.TB, path string, shape []int, data []float64, header []string) {
	t.Helper()
	var b strings.Builder
	if header != nil {
		b.WriteString(strings.Join(header, ",") + "\n")
	}
	per := len(data) / shape[0]
	for i := 0; i < shape[0]; i++ {
		row := make([]string, per)
		for j := range row {
			row[j] = F32(data[i*per+j])
		}
		b.WriteString(strings.Join(row, ",") + "\n")
	}
	require.NoError(t, os.WriteFile(path, []byte(b.String()), 0o644))
}

// WriteJSON writes data as nested arrays of the given shape.
func WriteJSON(t testing.TB, path string, shape []int, data []float64) {
	t.Helper()
	var b strings.Builder
	var rec func(d []float64, s []int)
	rec = func(d []float64, s []int) {
		if len(s) == 0 {
			b.WriteString(F32(d[0]))
			return
		}
		b.WriteByte('[')
		step := len(d) / s[0]
		for i := 0; i < s[0]; i++ {
			if i > 0 {
				b.WriteByte(',')
			}
			rec(d[i*step:(i+1)*step], s[1:])
		}
		b.WriteByte(']')
	}
	rec(data, shape)
	require.NoError(t, os.WriteFile(path, []byte(b.String()), 0o644))
}

// WriteNPY writes data as a float32 .npy array of the given shape.
func WriteNPY(t testing.TB, path string, shape []int, data []float64) {
	t.Helper()
	var build func(d []float64, s []int) reflect.Value
	build = func(d []float64, s []int) reflect.Value {
		if len(s) == 1 {
			v := make([]float32, s[0])
			for i := range v {
				v[i] = float32(d[i])
			}
			return reflect.ValueOf(v)
		}
		step := len(d) / s[0]
		first := build(d[:step], s[1:])
		out := reflect.MakeSlice(reflect.SliceOf(first.Type()), s[0], s[0])
		out.Index(0).Set(first)
		for i := 1; i < s[0]; i++ {
			out.Index(i).Set(build(d[i*step:(i+1)*step], s[1:]))
		}
		return out
	}
	f, err := os.Create(path)
	require.NoError(t, err)
	defer f.Close()
	require.NoError(t, npy.Write(f, build(data, shape).Interface()))
}

// ReadPB reads a TensorProto file (of the backend data) as float64.
func ReadPB(t testing.TB, path string) (shape []int, data []float64) {
	t.Helper()
	raw, err := os.ReadFile(path)
	require.NoError(t, err)
	tt, err := onnxlite.DecodeTensor(bytes.NewReader(raw), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	data, err = tt.Float64s()
	require.NoError(t, err)
	return tt.Shape(), data
}

// SoftmaxGradient is the gradient of output k of y = softmax(x) in closed
// form, the softmax derivative ∂y_k/∂x_i = y_k(δ_ik − y_i); y holds the
// outputs at x.
func SoftmaxGradient(y []float64, k int) []float64 {
	g := make([]float64, len(y))
	for i := range g {
		d := 0.0
		if i == k {
			d = 1
		}
		g[i] = y[k] * (d - y[i])
	}
	return g
}

// SoftmaxGradientTimesInput is gradient × input of y = softmax(x) for its
// top class k (the first largest y_k), in closed form: a_i = x_i·y_k(δ_ik
// − y_i).
func SoftmaxGradientTimesInput(x, y []float64) (k int, a []float64) {
	for i := range y {
		if y[i] > y[k] {
			k = i
		}
	}
	a = SoftmaxGradient(y, k)
	for i := range a {
		a[i] *= x[i]
	}
	return k, a
}

// ReadmeCode returns the first code block fenced as lang (```go) in the
// section of the README at path headed "## heading".
func ReadmeCode(t testing.TB, path, heading, lang string) string {
	t.Helper()
	readme, err := os.ReadFile(path)
	require.NoError(t, err)
	_, section, ok := strings.Cut(string(readme), "\n## "+heading+"\n")
	require.True(t, ok, "README has no section %q", heading)
	_, code, ok := strings.Cut(section, "```"+lang+"\n")
	require.True(t, ok, "the section %q has no %s code", heading, lang)
	code, _, ok = strings.Cut(code, "```")
	require.True(t, ok)
	return code
}
