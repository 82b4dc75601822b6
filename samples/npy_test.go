package samples_test

import (
	"bytes"
	"encoding/binary"
	"encoding/json"
	"io"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"runtime"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/debpython"
	"github.com/apportion/apportion/samples"
)

// numpyFiles writes .npy files with NumPy (Debian python3-numpy) into dir
// and returns, per file, the shape and the values NumPy reads back from it,
// as float64.
const numpyFiles = `
import json, sys, numpy as np
from numpy.lib import format as fmt
d = sys.argv[1]
rng = np.random.default_rng(7)
base = rng.normal(0, 50, size=(3, 8))
out = {}
def save(name, a, **kw):
    with open(d + "/" + name, "wb") as f:
        fmt.write_array(f, a, **kw)
    back = np.load(d + "/" + name)
    out[name] = {"shape": list(back.shape), "values": back.astype(np.float64).ravel(order="C").tolist()}
for t in ["<f4", "<f8", "|i1", "<i2", "<i4", "<i8", "|u1", "<u2", "<u4", "<u8", ">f4", ">i8", ">f8"]:
    a = base
    if t[1] in "iu":
        a = np.clip(np.round(base), np.iinfo(np.dtype(t)).min, np.iinfo(np.dtype(t)).max)
    save("c" + t[1:] + ("_be" if t[0] == ">" else "") + ".npy", a.astype(t))
save("bool.npy", base > 0)
save("fortran2.npy", np.asfortranarray(base.astype("<f4")))
save("fortran3.npy", np.asfortranarray(rng.normal(size=(3, 2, 4)).astype("<f8")))
save("v2.npy", base.astype("<f4"), version=(2, 0))
save("flat.npy", base[0].astype("<f4"))
# A valid version 1.0 header with its keys in another order than NumPy
# writes them: NumPy reads it.
hdr = "{'shape': (1, 8), 'fortran_order': False, 'descr': '<f4', }"
hdr += " " * (64 - (10 + len(hdr) + 1) % 64) + "\n"
with open(d + "/reordered.npy", "wb") as f:
    f.write(b"\x93NUMPY\x01\x00" + len(hdr).to_bytes(2, "little") + hdr.encode() + base[0].astype("<f4").tobytes())
back = np.load(d + "/reordered.npy")
out["reordered.npy"] = {"shape": list(back.shape), "values": back.astype(np.float64).ravel().tolist()}
json.dump(out, sys.stdout)
`

func TestReadNPYAgainstNumPy(t *testing.T) {
	python := debpython.Require(t, "numpy")
	dir := t.TempDir()
	raw, err := exec.Command(python, "-c", numpyFiles, dir).Output()
	require.NoError(t, err)
	var want map[string]struct {
		Shape  []int
		Values []float64
	}
	require.NoError(t, json.Unmarshal(raw, &want))
	require.Len(t, want, 19)
	spec := samples.Spec{Name: "x", Shape: []int{-1, 8}, HasShape: true}
	for name, w := range want {
		if len(w.Shape) == 3 {
			continue
		}
		b, err := samples.ReadFile(filepath.Join(dir, name), spec, samples.Options{})
		require.NoError(t, err, name)
		// NumPy's values, bit for bit (python3-numpy 1.24.2).
		assert.Equal(t, w.Values, b.Data, name)
		assert.Equal(t, len(w.Values)/8, b.Samples, name)
	}
	// A Fortran-order array of rank 3 read for samples of shape (2, 4).
	w := want["fortran3.npy"]
	b, err := samples.ReadFile(filepath.Join(dir, "fortran3.npy"), samples.Spec{Name: "x", Shape: []int{-1, 2, 4}, HasShape: true}, samples.Options{})
	require.NoError(t, err)
	assert.Equal(t, w.Values, b.Data)
	assert.Equal(t, []int{3, 2, 4}, b.Shape)
}

// npyV1 is a version 1.0 .npy preamble and header for dict.
func npyV1(dict string) []byte {
	out := []byte("\x93NUMPY\x01\x00")
	out = binary.LittleEndian.AppendUint16(out, uint16(len(dict)))
	return append(out, dict...)
}

func TestReadNPYMalformed(t *testing.T) {
	welds, err := os.ReadFile("../demo/data/welds_reference.npy")
	require.NoError(t, err)
	v2 := []byte("\x93NUMPY\x02\x00")
	cases := []struct {
		name string
		file []byte
		want string
	}{
		// A malformed header that once panicked inside the .npy library.
		{"preamble", []byte("\x93NUMPY\x01000"), "format version 1.48: expected 1.0, 2.0 or 3.0"},
		// A real file cut short, in the header and in the data.
		{"cut-header", welds[:40], "ends inside its header"},
		{"cut-data", welds[:200], "data ends early: the header's shape (32, 1, 32, 32) of <f4 needs 131072 bytes of data, the file has 118"},
		// A 12-byte file declaring a header of 4 GiB.
		{"huge-header", binary.LittleEndian.AppendUint32(v2, math.MaxUint32), "longer than the 10000 bytes NumPy reads"},
		// A shape whose element count wraps an int to 0.
		{"wrapping-shape", npyV1("{'descr': '<f4', 'fortran_order': False, 'shape': (2305843009213693952, 8), }\n"),
			"shape (2305843009213693952, 8) holds more values than a file can"},
		// A shape much larger than the data present.
		{"short-data", npyV1("{'descr': '<f8', 'fortran_order': False, 'shape': (1099511627776, 8), }\n"),
			"needs 70368744177664 bytes of data, the file has 0"},
		{"not-npy", []byte("PK\x03\x04 zip"), "not a .npy file"},
		{"empty", nil, "not a .npy file: expected the magic string \\x93NUMPY, got an empty file"},
		{"version", append([]byte("\x93NUMPY\x04\x00"), 0, 0), "format version 4.0: expected 1.0, 2.0 or 3.0"},
		{"missing-key", npyV1("{'descr': '<f4', 'shape': (1, 8), }\n"), `"fortran_order" is missing`},
		{"extra-key", npyV1("{'descr': '<f4', 'fortran_order': False, 'shape': (1, 8), 'x': True, }\n"), "got 4 keys"},
		{"twice", npyV1("{'descr': '<f4', 'descr': '<f4', 'shape': (1, 8), }\n"), "given twice"},
		{"dtype", npyV1("{'descr': '<c8', 'fortran_order': False, 'shape': (1, 8), }\n"), `element type "<c8"`},
		{"structured", npyV1("{'descr': [('a', '<f4')], 'fortran_order': False, 'shape': (1, 8), }\n"), "expected a string, True, False or a tuple"},
		{"shape-not-tuple", npyV1("{'descr': '<f4', 'fortran_order': False, 'shape': (8), }\n"), "(8) is a number, not a tuple"},
		{"negative", npyV1("{'descr': '<f4', 'fortran_order': False, 'shape': (-1, 8), }\n"), "expected a non-negative integer"},
		{"order", npyV1("{'descr': '<f4', 'fortran_order': 0, 'shape': (1, 8), }\n"), "expected a string, True, False or a tuple"},
		{"trailing", npyV1("{'descr': '<f4', 'fortran_order': False, 'shape': (1, 8), } x\n"), "expected the end of the header"},
		{"big-byteless", npyV1("{'descr': '|f4', 'fortran_order': False, 'shape': (1, 8), }\n"), "needs a byte order"},
	}
	spec := samples.Spec{Name: "x"} // no declared shape: every file reaches its data
	dir := t.TempDir()
	for _, c := range cases {
		var before, after runtime.MemStats
		runtime.ReadMemStats(&before)
		_, err := samples.Read(bytes.NewReader(c.file), c.name+".npy", spec, samples.Options{})
		runtime.ReadMemStats(&after)
		require.Error(t, err, c.name)
		assert.Contains(t, err.Error(), c.want, c.name)
		assert.Contains(t, err.Error(), "input "+c.name+".npy", c.name)
		// Memory follows the bytes present, not the sizes declared.
		assert.Less(t, after.TotalAlloc-before.TotalAlloc, uint64(4<<20), c.name)
		require.NoError(t, os.WriteFile(filepath.Join(dir, c.name+".npy"), c.file, 0o644))
	}

	// NumPy refuses every one of them too (python3-numpy 1.24.2).
	python := debpython.Require(t, "numpy")
	script := `
import sys, numpy as np
for p in sys.argv[1:]:
    try:
        np.load(p, allow_pickle=False)
        print("read", p)
    except Exception:
        pass
`
	args := []string{"-c", script}
	for _, c := range cases {
		switch c.name {
		case "structured", "dtype":
			continue // valid for NumPy; types apportion does not read
		case "negative":
			continue // NumPy reads a shape of -1 with no data as (0, 8)
		}
		args = append(args, filepath.Join(dir, c.name+".npy"))
	}
	out, err := exec.Command(python, args...).CombinedOutput()
	require.NoError(t, err, string(out))
	assert.Empty(t, strings.TrimSpace(string(out)))
}

func TestStreamNPY(t *testing.T) {
	// The demo's welds reference set (32 samples) read 5 at a time: the same
	// values as read whole, and each batch says where it starts.
	raw, err := os.ReadFile("../demo/data/welds_reference.npy")
	require.NoError(t, err)
	spec := samples.Spec{Name: "x", Shape: []int{-1, 1, 32, 32}, HasShape: true}
	whole, err := samples.Read(bytes.NewReader(raw), "w.npy", spec, samples.Options{})
	require.NoError(t, err)
	s, err := samples.NewStream(bytes.NewReader(raw), "w.npy", spec, samples.Options{})
	require.NoError(t, err)
	var got []float64
	for {
		b, err := s.Next(5)
		if err != nil {
			require.ErrorIs(t, err, io.EOF)
			break
		}
		assert.Equal(t, len(got)/1024, b.First)
		assert.LessOrEqual(t, b.Samples, 5)
		got = append(got, b.Data...)
	}
	assert.Equal(t, whole.Data, got)

	// MaxSamples stops at the sample past it.
	s, err = samples.NewStream(bytes.NewReader(raw), "w.npy", spec, samples.Options{MaxSamples: 10})
	require.NoError(t, err)
	_, err = s.Next(10)
	require.NoError(t, err)
	_, err = s.Next(10)
	assert.ErrorIs(t, err, samples.ErrTooMany)
}
