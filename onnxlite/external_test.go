package onnxlite

import (
	"bytes"
	"encoding/binary"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"testing"

	"github.com/apportion/apportion/internal/debpython"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// externalTensor is a FLOAT initializer "w" of dims whose data lives in an
// external file (onnx.proto: data_location = EXTERNAL (1), external_data
// keys "location", "offset", "length").
func externalTensor(dims []int64, kv ...string) []byte {
	var b []byte
	for _, d := range dims {
		b = pbVarint(b, 1, uint64(d))
	}
	b = pbVarint(b, 2, uint64(Float))
	b = pbString(b, 8, "w")
	for i := 0; i+1 < len(kv); i += 2 {
		b = pbBytes(b, 13, pbString(pbString(nil, 1, kv[i]), 2, kv[i+1]))
	}
	return pbVarint(b, 14, 1)
}

// writeExternalModel writes model.onnx with one external initializer into
// dir and returns its path.
func writeExternalModel(t *testing.T, dir string, dims []int64, kv ...string) string {
	t.Helper()
	path := filepath.Join(dir, "model.onnx")
	require.NoError(t, os.WriteFile(path, pbModel(pbBytes(nil, 5, externalTensor(dims, kv...))), 0o644))
	return path
}

// weights writes a file of 8 junk bytes followed by the IEEE 754 binary32
// little-endian encodings of 0.5, -1, 2, 4.
func weights(t *testing.T, path string) {
	t.Helper()
	b := []byte("HEADER!!")
	for _, v := range []float32{0.5, -1, 2, 4} {
		b = binary.LittleEndian.AppendUint32(b, math.Float32bits(v))
	}
	require.NoError(t, os.MkdirAll(filepath.Dir(path), 0o755))
	require.NoError(t, os.WriteFile(path, b, 0o644))
}

func TestExternalDataLoads(t *testing.T) {
	dir := t.TempDir()
	weights(t, filepath.Join(dir, "sub", "w.bin"))
	path := writeExternalModel(t, dir, []int64{2, 2}, "location", "sub/w.bin", "offset", "8", "length", "16", "checksum", "ignored")
	m, err := DecodeFile(path, DecodeOptions{})
	require.NoError(t, err)
	w := m.Graph.Initializers[0]
	assert.Equal(t, []float32{0.5, -1, 2, 4}, w.Data)

	// Encode writes the data inline.
	m2 := roundTripModel(t, m, DecodeOptions{})
	assert.Equal(t, "", irDiff(m, m2))

	// A symlink inside the directory that stays inside is fine.
	require.NoError(t, os.Symlink(filepath.Join(dir, "sub", "w.bin"), filepath.Join(dir, "link.bin")))
	path = writeExternalModel(t, dir, []int64{4}, "location", "link.bin", "offset", "8")
	m, err = DecodeFile(path, DecodeOptions{})
	require.NoError(t, err)
	assert.Equal(t, []float32{0.5, -1, 2, 4}, m.Graph.Initializers[0].Data)
}

func TestExternalDataRefused(t *testing.T) {
	outside := t.TempDir()
	weights(t, filepath.Join(outside, "w.bin"))
	dir := t.TempDir()
	weights(t, filepath.Join(dir, "w.bin"))
	require.NoError(t, os.Symlink(filepath.Join(outside, "w.bin"), filepath.Join(dir, "escape.bin")))
	require.NoError(t, os.Symlink(outside, filepath.Join(dir, "escapedir")))
	cases := []struct {
		name string
		kv   []string
		dims []int64
		want string
	}{
		{"dotdot", []string{"location", "../x"}, []int64{4}, `has a ".." component`},
		{"inner dotdot", []string{"location", "a/../../x"}, []int64{4}, `has a ".." component`},
		{"absolute", []string{"location", "/etc/passwd"}, []int64{4}, "is absolute"},
		{"symlink out", []string{"location", "escape.bin", "offset", "8"}, []int64{4}, "outside the model directory"},
		{"symlinked dir out", []string{"location", "escapedir/w.bin", "offset", "8"}, []int64{4}, "outside the model directory"},
		{"offset past EOF", []string{"location", "w.bin", "offset", "100", "length", "16"}, []int64{4}, "offset 100 is past the end of the file (24 bytes)"},
		{"length past EOF", []string{"location", "w.bin", "offset", "16", "length", "16"}, []int64{4}, "offset 16 + length 16 is past the end of the file"},
		{"length mismatch", []string{"location", "w.bin", "offset", "8", "length", "12"}, []int64{4}, "length 12 bytes, the tensor's dims and type need 16"},
		{"rest of file too short", []string{"location", "w.bin"}, []int64{4}, "length 24 bytes, the tensor's dims and type need 16"},
		{"missing file", []string{"location", "nope.bin"}, []int64{4}, "nope.bin"},
		{"no location", []string{"offset", "0"}, []int64{4}, "no location"},
		{"bad offset", []string{"location", "w.bin", "offset", "-8"}, []int64{4}, "not a non-negative integer"},
		{"directory", []string{"location", "."}, []int64{0}, "not a regular file"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			path := writeExternalModel(t, dir, c.dims, c.kv...)
			_, err := DecodeFile(path, DecodeOptions{})
			require.ErrorIs(t, err, ErrExternalData)
			assert.Contains(t, err.Error(), c.want)
		})
	}

	// A bare reader has no directory to read from.
	raw := pbModel(pbBytes(nil, 5, externalTensor([]int64{4}, "location", "w.bin", "offset", "8")))
	_, err := Decode(bytes.NewReader(raw), DecodeOptions{})
	require.ErrorIs(t, err, ErrExternalData)
	assert.Contains(t, err.Error(), "needs a base directory")
	// Given one, the same bytes load.
	m, err := Decode(bytes.NewReader(raw), DecodeOptions{BaseDir: dir})
	require.NoError(t, err)
	assert.Equal(t, []float32{0.5, -1, 2, 4}, m.Graph.Initializers[0].Data)

	// The external payload counts against MaxInitializerBytes before it is read:
	// 2^30 floats are 4 GiB, over the 2 GiB default.
	path := writeExternalModel(t, dir, []int64{1 << 30}, "location", "w.bin")
	_, err = DecodeFile(path, DecodeOptions{Limits: Limits{MaxTensorElements: 1 << 31}})
	requireLimit(t, err, "MaxInitializerBytes", 4<<30, DefaultLimits.MaxInitializerBytes)
}

// TestExternalDataFromONNX reads a model that python3-onnx 1.12.0 saved with
// save_as_external_data, and compares with the values onnx itself reads back.
func TestExternalDataFromONNX(t *testing.T) {
	python := debpython.Require(t, "onnx")
	dir := t.TempDir()
	script := `
import json, sys, numpy as np, onnx
from onnx import helper, numpy_helper, TensorProto
w = numpy_helper.from_array(np.arange(-6, 6, dtype=np.float32).reshape(3, 4) / 4, "w")
b = numpy_helper.from_array(np.arange(1, 4, dtype=np.int64), "b")
g = helper.make_graph([helper.make_node("Identity", ["w"], ["y"])], "g", [],
    [helper.make_tensor_value_info("y", TensorProto.FLOAT, [3, 4])], [w, b])
m = helper.make_model(g)
onnx.save_model(m, sys.argv[1] + "/model.onnx", save_as_external_data=True,
    all_tensors_to_one_file=True, location="weights.data", size_threshold=0)
m2 = onnx.load(sys.argv[1] + "/model.onnx")
m3 = onnx.load(sys.argv[1] + "/model.onnx", load_external_data=False)
ext = {i.name: [[e.key, e.value] for e in i.external_data] for i in m3.graph.initializer}
print(json.dumps({i.name: [numpy_helper.to_array(i).astype(float).ravel().tolist(), ext[i.name]]
    for i in m2.graph.initializer}))`
	out, err := exec.Command(python, "-c", script, dir).CombinedOutput()
	require.NoError(t, err, "%s", out)
	var want map[string][2]json.RawMessage
	require.NoError(t, json.Unmarshal(out, &want), "%s", out)

	m, err := DecodeFile(filepath.Join(dir, "model.onnx"), DecodeOptions{})
	require.NoError(t, err)
	require.Len(t, m.Graph.Initializers, 2)
	for _, in := range m.Graph.Initializers {
		var vals []float64
		require.NoError(t, json.Unmarshal(want[in.Name][0], &vals))
		got, err := in.Float64s()
		require.NoError(t, err)
		assert.Equal(t, vals, got, in.Name)
		var kv [][2]string
		require.NoError(t, json.Unmarshal(want[in.Name][1], &kv))
		t.Logf("%s: external_data %v", in.Name, kv)
		assert.Equal(t, "location", kv[0][0], "onnx wrote the tensor externally")
	}
	assert.Equal(t, int64(12), m.Graph.Initializers[0].NumElements())
}
