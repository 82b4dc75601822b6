package main

import (
	"math"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// reluSpec is the input of node/test_relu: x, float, [3,4,5]
// (python3-onnx 1.12.0), with the values of its input_0.pb.
func reluSpec(t *testing.T) (inputSpec, []float64, string) {
	t.Helper()
	dir := caseDir(t, "node/test_relu")
	m, err := decodeModel(filepath.Join(dir, "model.onnx"))
	require.NoError(t, err)
	feeds := feedInputs(m.Graph)
	require.Len(t, feeds, 1)
	spec := specOf(feeds[0])
	require.Equal(t, []int{3, 4, 5}, spec.Shape)
	in, _ := setFiles(t, dir)
	_, data := readPBTensor(t, in[0]) // ONNX backend test data 1.12.0
	return spec, data, dir
}

func TestReadSampleLayouts(t *testing.T) {
	spec, data, _ := reluSpec(t)
	tmp := t.TempDir()
	// float32 values written with their shortest round-trip decimal read
	// back bit for bit (IEEE 754 binary32 → decimal → binary32).
	same := func(b *batch, n int) {
		t.Helper()
		require.Equal(t, append([]int{n}, 4, 5), b.Shape)
		assert.Equal(t, n, b.Samples)
		for i, v := range b.Data {
			assert.Equal(t, float32(data[i]), float32(v), "value %d", i)
		}
	}
	cases := []struct {
		name  string
		shape []int
		n     int
	}{
		{"nested.json", []int{3, 4, 5}, 3}, // [n, per-sample shape]
		{"one.json", []int{4, 5}, 1},       // one sample, nested
		{"flat1.json", []int{20}, 1},       // one sample, flat
		{"flat.json", []int{3, 20}, 3},     // n flat samples
	}
	for _, c := range cases {
		p := filepath.Join(tmp, c.name)
		writeJSON(t, p, c.shape, data[:product(c.shape)])
		b, err := readInput(p, spec)
		require.NoError(t, err, c.name)
		same(b, c.n)
	}
	p := filepath.Join(tmp, "flat.npy")
	writeNPY(t, p, []int{3, 20}, data)
	b, err := readInput(p, spec)
	require.NoError(t, err)
	same(b, 3)

	header := make([]string, 20)
	for i := range header {
		header[i] = "f" + string(rune('a'+i))
	}
	p = filepath.Join(tmp, "named.csv")
	writeCSV(t, p, []int{3, 20}, data, header)
	b, err = readInput(p, spec)
	require.NoError(t, err)
	same(b, 3)
	assert.Equal(t, header, b.Features)

	// A header of the wrong width names both counts.
	writeCSV(t, p, []int{3, 20}, data, header[:19])
	_, err = readInput(p, spec)
	require.Error(t, err)
	assert.Contains(t, err.Error(), "header has 19 names, expected 20")

	// JSON that is not one document, or holds null, is refused.
	require.NoError(t, os.WriteFile(p+".json", []byte("[1] [2]"), 0o644))
	_, err = readInput(p+".json", spec)
	assert.ErrorContains(t, err, "more data after it")
	require.NoError(t, os.WriteFile(p+".json", []byte("[["+strings.Repeat("1,", 19)+"null]]"), 0o644))
	_, err = readInput(p+".json", spec)
	assert.ErrorContains(t, err, "at [0][19]: expected a number, got null")
	// 1e400 overflows binary64 (IEEE 754 max ≈ 1.797e308).
	require.NoError(t, os.WriteFile(p+".json", []byte("["+strings.Repeat("1,", 19)+"1e400]"), 0o644))
	_, err = readInput(p+".json", spec)
	assert.ErrorContains(t, err, "1e400 is out of the float64 range")
}

func TestPredictFlatJSON(t *testing.T) {
	// Three flat samples of 20 values bind as x [3,4,5]; the outputs match
	// output_0.pb of the ONNX backend test data 1.12.0.
	_, data, dir := reluSpec(t)
	_, outs := setFiles(t, dir)
	_, want := readPBTensor(t, outs[0])
	p := filepath.Join(t.TempDir(), "rows.json")
	writeJSON(t, p, []int{3, 20}, data)
	doc := predictJSON(t, "-model", filepath.Join(dir, "model.onnx"), "-input", p)
	assert.Equal(t, []int{3, 4, 5}, doc.Outputs[0].Shape)
	assertClose(t, want, values(doc.Outputs[0].Data), "relu via flat JSON rows")
}

func TestReadNPYFortranOrder(t *testing.T) {
	// A column-major .npy written by hand after the NumPy format description
	// (NEP 1, "A Simple File Format for NumPy Arrays", version 1.0): magic,
	// version, little-endian uint16 header length, a dict literal padded
	// with spaces to a multiple of 64 bytes (a multiple of 16 in older
	// writers) ending in '\n', then the data in Fortran order.
	spec, data, _ := reluSpec(t)
	dict := "{'descr': '<f8', 'fortran_order': True, 'shape': (3, 20), }"
	total := 10 + len(dict) + 1
	pad := (64 - total%64) % 64
	dict += strings.Repeat(" ", pad) + "\n"
	buf := []byte("\x93NUMPY\x01\x00")
	buf = append(buf, byte(len(dict)), byte(len(dict)>>8))
	buf = append(buf, dict...)
	for j := 0; j < 20; j++ {
		for i := 0; i < 3; i++ {
			bits := math.Float64bits(data[i*20+j])
			for k := 0; k < 8; k++ {
				buf = append(buf, byte(bits>>(8*k)))
			}
		}
	}
	p := filepath.Join(t.TempDir(), "f.npy")
	require.NoError(t, os.WriteFile(p, buf, 0o644))
	b, err := readInput(p, spec)
	require.NoError(t, err)
	assert.Equal(t, []int{3, 4, 5}, b.Shape)
	assert.Equal(t, data, b.Data)
}
