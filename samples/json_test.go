package samples_test

import (
	"bytes"
	"encoding/json"
	"math/rand/v2"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/memprobe"
	"github.com/apportion/apportion/samples"
)

// pumpsSpec is the input of the pumps demo: eight sensor readings.
var pumpsSpec = samples.Spec{Name: "sensors", Shape: []int{-1, 8}, HasShape: true}

// jsonSamples writes n samples of eight values, as a program dumping
// float64 data would (shortest round-trip decimals, about 19 bytes per
// value), and returns the file and the values.
func jsonSamples(n int) ([]byte, []float64) {
	rng := rand.New(rand.NewPCG(1, 2))
	var b bytes.Buffer
	vals := make([]float64, 0, 8*n)
	b.WriteByte('[')
	for i := range n {
		if i > 0 {
			b.WriteString(",\n")
		}
		b.WriteByte('[')
		for j := range 8 {
			v := rng.NormFloat64() * 100
			vals = append(vals, v)
			if j > 0 {
				b.WriteByte(',')
			}
			b.WriteString(strconv.FormatFloat(v, 'g', -1, 64))
		}
		b.WriteByte(']')
	}
	b.WriteString("]\n")
	return b.Bytes(), vals
}

func TestReadJSONMemory(t *testing.T) {
	// 40,000 samples (about 6 MB of text, 2.6 MB of float64 values): the
	// reader allocates at most 3 times the values it returns, whatever the
	// length of the text; a reader that builds a tree of the document
	// first allocates about 24 times (a json.Number string and an
	// interface per value, a slice per array).
	raw, want := jsonSamples(40000)
	var b *samples.Batch
	_, allocated := memprobe.Measure(func() {
		var err error
		b, err = samples.Read(bytes.NewReader(raw), "big.json", pumpsSpec, samples.Options{})
		require.NoError(t, err)
	})
	require.Equal(t, want, b.Data) // strconv's shortest decimals read back bit for bit
	values := uint64(8 * len(want))
	assert.LessOrEqual(t, allocated, 3*values+256<<10, "allocated %d bytes for %d bytes of values", allocated, values)
}

// BenchmarkReadJSON reads a JSON file of 50 MB (330,000 samples of the
// pumps demo's eight values) and reports the peak heap and the bytes
// allocated per read, in MB, beside the 21 MB of values read.
func BenchmarkReadJSON(b *testing.B) {
	raw, want := jsonSamples(330000)
	b.SetBytes(int64(len(raw)))
	var peak, allocated uint64
	for b.Loop() {
		p, a := memprobe.Measure(func() {
			if _, err := samples.Read(bytes.NewReader(raw), "big.json", pumpsSpec, samples.Options{}); err != nil {
				b.Fatal(err)
			}
		})
		peak, allocated = max(peak, p), a
	}
	b.ReportMetric(float64(len(raw))/1e6, "file-MB")
	b.ReportMetric(float64(8*len(want))/1e6, "values-MB")
	b.ReportMetric(float64(peak)/1e6, "peak-heap-MB")
	b.ReportMetric(float64(allocated)/1e6, "alloc-MB/op")
}

func TestJSONNumbersFollowRFC8259(t *testing.T) {
	// A sample's values are read when, and only when, encoding/json
	// (the standard library's RFC 8259 parser) takes the text as numbers.
	spec := samples.Spec{Name: "x", Shape: []int{-1, 2}, HasShape: true}
	for _, num := range []string{
		"1", "-0", "0.5", "1e5", "1E+5", "-2.5e-3", "123456789012345678901234567890",
		"+1", "01", ".5", "5.", "1e", "--1", "0x10", "1_000", "Infinity", "-Infinity", "NaN", "1.2.3", "- 1", "1e+",
	} {
		doc := "[[" + num + ", 1]]"
		_, err := samples.Read(strings.NewReader(doc), "n.json", spec, samples.Options{})
		if json.Valid([]byte(doc)) {
			assert.NoError(t, err, num)
		} else {
			assert.Error(t, err, num)
		}
	}
	// Out of the float64 range (IEEE 754 binary64: largest finite
	// 1.797…e308, smallest subnormal 4.94…e-324): the sample is bad, the
	// others are read.
	b, err := samples.Read(strings.NewReader("[[1e400, 1], [2, 3], [1e-400, 1], [1e-320, 0]]"), "n.json", spec, samples.Options{KeepBad: true})
	require.NoError(t, err)
	assert.EqualError(t, b.Bad[0], "at [0][0]: 1e400 is out of the float64 range (larger than 1.8e308 in magnitude)")
	assert.EqualError(t, b.Bad[2], "at [2][0]: 1e-400 is out of the float64 range (smaller than 4.9e-324 in magnitude, it would read as 0)")
	assert.Equal(t, []float64{2, 3}, b.Sample(1))
	assert.Equal(t, []float64{1e-320, 0}, b.Sample(3))
	assert.Len(t, b.Bad, 2)
}

func TestReadJSONSampleErrors(t *testing.T) {
	// Each malformed sample costs itself; the document's syntax errors
	// cost the file.
	doc := `[[1,2,3,4,5,6,7,8], [1,2,3], null, "x", {"a": [1, "b"]}, [[1,2,3,4],[5,6,7,8]], [1,2,3,4,5,6,7,8]]`
	b, err := samples.Read(strings.NewReader(doc), "s.json", pumpsSpec, samples.Options{KeepBad: true})
	require.NoError(t, err)
	require.Equal(t, 7, b.Samples)
	assert.Len(t, b.Bad, 5)
	// A sample's shape is its own error, which its index in the batch
	// places; a value's position is said.
	assert.EqualError(t, b.Bad[1], "expected 8 values (shape [8]), got 3 (shape [3])")
	assert.EqualError(t, b.Bad[2], "at [2]: expected a number, got null")
	assert.EqualError(t, b.Bad[3], "at [3]: expected a number, got a string")
	assert.EqualError(t, b.Bad[4], "at [4]: expected a number, got an object")
	assert.EqualError(t, b.Bad[5], "expected a sample of shape [8] or 8 flat values, got shape [2 4]")
	assert.Equal(t, []float64{1, 2, 3, 4, 5, 6, 7, 8}, b.Sample(6))
	// Read without KeepBad, the first bad sample is the error, named.
	_, err = samples.Read(strings.NewReader(doc), "s.json", pumpsSpec, samples.Options{})
	assert.EqualError(t, err, `input s.json (for "sensors"): sample 1: expected 8 values (shape [8]), got 3 (shape [3])`)

	for doc, want := range map[string]string{
		`[[1,2,3,4,5,6,7,8], [1,2`:          "expected a value, , or ] at byte 25, got the end of the file",
		`[[1,2,3,4,5,6,7,8]] [1]`:           "expected one array, got more data after it",
		`[[1,2,3,4,5,6,7,NaN]]`:             "NaN at byte 17: expected finite numbers",
		`[[1,2,3,4,5,6,7,-Infinity]]`:       "Infinity at byte 18: expected finite numbers",
		`[[1,2,3,4,5,6,7,8], {"a" 1}]`:      `expected : at byte 26, got '1'`,
		`[[1,2,3,4,5,6,7,8] [1]]`:           "expected , or ] at byte 21, got '['",
		``:                                  "expected an array of samples, got an empty file",
		`[]`:                                "expected at least one sample, got none",
		strings.Repeat("[", 100):            "arrays nested more than 64 deep",
		`[["\u00zz",2,3,4,5,6,7,8]]`:        `bad \u escape`,
		`[[1,2,3,4,5,6,7,8], [1,2,3,4,5,6]`: "got the end of the file",
	} {
		_, err := samples.Read(strings.NewReader(doc), "s.json", pumpsSpec, samples.Options{KeepBad: true})
		require.Error(t, err, doc)
		assert.Contains(t, err.Error(), want, doc)
	}
}

func TestStreamJSON(t *testing.T) {
	// A stream of 10 samples read 3 at a time gives the values read whole,
	// and names its bad samples by their index in the file.
	raw, want := jsonSamples(10)
	rows := bytes.Split(bytes.TrimSpace(raw)[1:len(bytes.TrimSpace(raw))-1], []byte(",\n"))
	require.Len(t, rows, 10)
	rows[4] = []byte("[1, 2, null]")
	raw = append(append([]byte("["), bytes.Join(rows, []byte(",\n"))...), ']')
	s, err := samples.NewStream(bytes.NewReader(raw), "s.json", pumpsSpec, samples.Options{KeepBad: true})
	require.NoError(t, err)
	got, bad, err := drain(t, s, 3)
	require.NoError(t, err)
	require.Len(t, got, len(want))
	assert.Equal(t, map[int]string{4: "at [4][2]: expected a number, got null"}, bad)
	assert.Equal(t, want[:32], got[:32])
	assert.Equal(t, want[40:], got[40:])
}
