package samples_test

import (
	"bytes"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/internal/testfiles"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// reluSpec is the input of node/test_relu: x, float, [3,4,5]
// (python3-onnx 1.12.0), with the values of its input_0.pb.
func reluSpec(t *testing.T) (samples.Spec, []float64, string) {
	t.Helper()
	dir := filepath.Join(onnxtestdata.Dir(t), "node", "test_relu")
	raw, err := os.ReadFile(filepath.Join(dir, "model.onnx"))
	require.NoError(t, err)
	m, err := onnxlite.Decode(bytes.NewReader(raw), onnxlite.DecodeOptions{})
	require.NoError(t, err)
	require.Len(t, m.Graph.Inputs, 1)
	spec := samples.SpecOf(m.Graph.Inputs[0])
	require.Equal(t, []int{3, 4, 5}, spec.Shape)
	in, _ := onnxtestdata.SetFiles(filepath.Join(dir, "test_data_set_0"))
	require.NotEmpty(t, in)
	_, data := testfiles.ReadPB(t, in[0]) // ONNX backend test data 1.12.0
	return spec, data, dir
}

// readInput reads a file as the command line reads its inputs: NaN and
// infinities refused.
func readInput(path string, spec samples.Spec) (*samples.Batch, error) {
	return samples.ReadFile(path, spec, samples.Options{})
}

func TestReadSampleLayouts(t *testing.T) {
	spec, data, _ := reluSpec(t)
	tmp := t.TempDir()
	// float32 values written with their shortest round-trip decimal read
	// back bit for bit (IEEE 754 binary32 → decimal → binary32).
	same := func(b *samples.Batch, n int) {
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
		testfiles.WriteJSON(t, p, c.shape, data[:samples.Product(c.shape)])
		b, err := readInput(p, spec)
		require.NoError(t, err, c.name)
		same(b, c.n)
	}
	p := filepath.Join(tmp, "flat.npy")
	testfiles.WriteNPY(t, p, []int{3, 20}, data)
	b, err := readInput(p, spec)
	require.NoError(t, err)
	same(b, 3)

	header := make([]string, 20)
	for i := range header {
		header[i] = "f" + string(rune('a'+i))
	}
	p = filepath.Join(tmp, "named.csv")
	testfiles.WriteCSV(t, p, []int{3, 20}, data, header)
	b, err = readInput(p, spec)
	require.NoError(t, err)
	same(b, 3)
	assert.Equal(t, header, b.Features)

	// A header of the wrong width names both counts.
	testfiles.WriteCSV(t, p, []int{3, 20}, data, header[:19])
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

func TestReadCSVByFeatureNames(t *testing.T) {
	// The relu input's 20 values per sample, named f0..f19, written with
	// the columns reversed and two columns the model does not read: read by
	// the model's names, every value is the backend data's again (ONNX
	// backend test data 1.12.0, node/test_relu input_0.pb).
	spec, data, _ := reluSpec(t)
	names := make([]string, 20)
	for i := range names {
		names[i] = "f" + strconv.Itoa(i)
	}
	var b strings.Builder
	b.WriteString("site")
	for j := 19; j >= 0; j-- {
		b.WriteString("," + names[j])
	}
	b.WriteString(",note\n")
	for i := 0; i < 3; i++ {
		b.WriteString("s" + strconv.Itoa(i))
		for j := 19; j >= 0; j-- {
			b.WriteString("," + testfiles.F32(data[i*20+j]))
		}
		b.WriteString(",ok\n")
	}
	got, err := samples.Read(strings.NewReader(b.String()), "rows.csv", spec, samples.Options{Features: names})
	require.NoError(t, err)
	assert.Equal(t, []int{3, 4, 5}, got.Shape)
	assert.Equal(t, names, got.Features)
	assert.Equal(t, []string{"site", "note"}, got.Ignored, "the columns the model does not read, in file order")
	for i, v := range got.Data {
		assert.Equal(t, float32(data[i]), float32(v), "value %d", i)
	}

	// A feature the header lacks is named; without names on the model's
	// side the same file is read by position, and its text columns make
	// rows that cannot be read.
	_, err = samples.Read(strings.NewReader(b.String()), "rows.csv", spec, samples.Options{Features: append(names[:19:19], "f99")})
	assert.ErrorContains(t, err, `the model's feature "f99" is not a column of the file`)
	_, err = samples.Read(strings.NewReader(b.String()), "rows.csv", spec, samples.Options{Features: append(names[:18:18], "f98", "f99")})
	assert.ErrorContains(t, err, `the model's features "f98", "f99" are not columns of the file`)
	_, err = samples.Read(strings.NewReader(b.String()), "rows.csv", spec, samples.Options{})
	assert.ErrorContains(t, err, "header has 22 names, expected 20")
}

func TestReadTable(t *testing.T) {
	// Rows of f(x) = (x₀, x₁) with a group column, in the layout of the
	// pumps demo's held-out file: values by the model's names, one row too
	// short, one with a NaN, one with text; the others are read.
	text := "line,b,a,label\n" +
		"p,2,1,x\n" +
		"q,4\n" +
		",6,NaN,y\n" +
		"r,warm,5,y\n" +
		"s,10,9,\n"
	tbl, err := samples.ReadTable(strings.NewReader(text), "t.csv", samples.Spec{}, samples.TableOptions{Features: []string{"a", "b"}, Size: 2, Group: "line"})
	require.NoError(t, err)
	assert.Equal(t, []string{"a", "b"}, tbl.Columns)
	require.Len(t, tbl.Rows, 5)
	assert.Equal(t, samples.Row{Where: "line 2", Values: []float64{1, 2}, Group: "p"}, tbl.Rows[0])
	assert.EqualError(t, tbl.Rows[1].Err, "expected 4 fields, as in the header, got 2")
	assert.ErrorIs(t, tbl.Rows[2].Err, samples.ErrNonFinite)
	assert.Equal(t, "(empty)", tbl.Rows[2].Group)
	assert.EqualError(t, tbl.Rows[3].Err, `column b: "warm" is not a number`)
	assert.Equal(t, []float64{9, 10}, tbl.Rows[4].Values)

	// Without the model's names: the first numeric columns, the group
	// column aside.
	tbl, err = samples.ReadTable(strings.NewReader(text), "t.csv", samples.Spec{}, samples.TableOptions{Size: 2, Group: "line"})
	require.NoError(t, err)
	assert.Equal(t, []string{"b", "a"}, tbl.Columns)
	assert.Equal(t, []float64{2, 1}, tbl.Rows[0].Values)

	_, err = samples.ReadTable(strings.NewReader(text), "t.csv", samples.Spec{}, samples.TableOptions{Group: "colour"})
	var ce *samples.ColumnError
	require.ErrorAs(t, err, &ce)
	assert.Equal(t, "colour", ce.Column)
	_, err = samples.ReadTable(strings.NewReader("1,2\n3,4\n"), "t.csv", samples.Spec{}, samples.TableOptions{})
	assert.ErrorContains(t, err, "expected a header row naming the columns")
}

func TestReadTableKeyColumn(t *testing.T) {
	// A key column of numbers and text, one row short of fields but with
	// its key, one without a key; the key column is not a feature.
	text := "id,a,b,line\n" +
		"17,1,2,p\n" +
		"0,3,4,q\n" +
		"abc,5,6,p\n" +
		"007,7\n" +
		",9,10,q\n"
	tbl, err := samples.ReadTable(strings.NewReader(text), "k.csv", samples.Spec{}, samples.TableOptions{Size: 2, Group: "line", Key: "id"})
	require.NoError(t, err)
	assert.Equal(t, []string{"a", "b"}, tbl.Columns, "the numeric key column is not read as a feature")
	assert.Nil(t, tbl.Ignored, "the key and group columns are read")
	require.Len(t, tbl.Rows, 5)
	assert.Equal(t, samples.Row{Where: "line 2", Values: []float64{1, 2}, Group: "p", Key: 17}, tbl.Rows[0])
	assert.Equal(t, uint64(0), tbl.Rows[1].Key)
	// SHA-256("abc") = ba7816bf 8f01cfea ... (FIPS 180-2, appendix B.1):
	// 2^63 + its first 64 bits shifted right by one.
	assert.Equal(t, uint64(1<<63|0xba7816bf8f01cfea>>1), tbl.Rows[2].Key)
	assert.Equal(t, tbl.Rows[2].Key, samples.RowKey("abc"))
	// "007" is text, not the number 7: keys map texts one to one.
	assert.EqualError(t, tbl.Rows[3].Err, "expected 4 fields, as in the header, got 2")
	assert.Equal(t, samples.RowKey("007"), tbl.Rows[3].Key)
	assert.NotEqual(t, uint64(7), tbl.Rows[3].Key)
	assert.EqualError(t, tbl.Rows[4].Err, "key column id: no key, expected a value that tells the row apart")
	assert.Nil(t, tbl.Rows[4].Values)
	assert.Equal(t, samples.PlaceKey("k.csv", "line 6"), tbl.Rows[4].Key)
	assert.Equal(t, samples.RowKey("k.csv\nline 6"), tbl.Rows[4].Key)
	assert.Equal(t, uint64(samples.MaxNumberKey), samples.RowKey("9223372036854775807"))
	assert.GreaterOrEqual(t, samples.RowKey("9223372036854775808"), uint64(1<<63), "beyond MaxNumberKey a number is text")

	_, err = samples.ReadTable(strings.NewReader(text+"0,1,1,q\n"), "k.csv", samples.Spec{}, samples.TableOptions{Size: 2, Key: "id"})
	assert.EqualError(t, err, `input k.csv: key column id: line 7 has the key "0" of line 3; a key column needs a different value on every row`)
	_, err = samples.ReadTable(strings.NewReader(text), "k.csv", samples.Spec{}, samples.TableOptions{Size: 2, Key: "serial"})
	var ce *samples.ColumnError
	require.ErrorAs(t, err, &ce)
	assert.Equal(t, "serial", ce.Column)
	_, err = samples.ReadTable(strings.NewReader("[[1, 2]]"), "k.json", samples.Spec{}, samples.TableOptions{Key: "id"})
	assert.EqualError(t, err, `input k.json: key column "id": the file is not CSV, the one format with named columns`)
}

func TestReadErrorsNameLinesAndColumns(t *testing.T) {
	// Lines and columns are counted from 1, as editors and spreadsheets
	// count them (common practice), or a column is named by its header.
	spec := samples.Spec{Name: "x", Shape: []int{-1, 3}, HasShape: true}
	b, err := samples.Read(strings.NewReader("1,2,3\n4,x,6\n7,8\n1,nan,3\n"), "a.csv", spec, samples.Options{KeepBad: true})
	require.NoError(t, err)
	assert.EqualError(t, b.Bad[1], `line 2, column 2: "x" is not a number`)
	assert.EqualError(t, b.Bad[2], "line 3: expected 3 values, got 2")
	assert.EqualError(t, b.Bad[3], "line 4, column 2: nan value is not a finite number")
	assert.ErrorIs(t, b.Bad[3], samples.ErrNonFinite)

	b, err = samples.Read(strings.NewReader("p,q,r\n1,2,3\n4,Inf,6\n"), "a.csv", spec, samples.Options{KeepBad: true})
	require.NoError(t, err)
	assert.EqualError(t, b.Bad[1], "line 3, column q: Inf value is not a finite number")
	assert.Nil(t, b.Ignored, "read by position: every column is a value")

	// Without KeepBad the first bad row is the error, named by the file.
	_, err = samples.Read(strings.NewReader("1,2,3\n4,x,6\n"), "a.csv", spec, samples.Options{})
	assert.EqualError(t, err, `input a.csv (for "x"): line 2, column 2: "x" is not a number`)

	// NaN and Infinity are not JSON (RFC 8259 §6: "Numeric values that
	// cannot be represented ... (such as Infinity and NaN) are not
	// permitted"); the message says so, with the position (from 1) of its
	// first letter, as the HTTP API does.
	for text, want := range map[string]string{
		"[1, NaN, 3]":               "NaN at byte 5",
		"[[1,2,3],[4,-Infinity,6]]": "Infinity at byte 14",
	} {
		_, err := samples.Read(strings.NewReader(text), "a.json", spec, samples.Options{})
		require.Error(t, err, text)
		assert.ErrorIs(t, err, samples.ErrNonFinite, text)
		assert.ErrorContains(t, err, want+": expected finite numbers, got a value that is not a finite number (JSON has no NaN or Infinity", text)
	}
}
