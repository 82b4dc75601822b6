package main

import (
	"bytes"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"regexp"
	"runtime"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/memprobe"
)

// pumpRows writes n invented pump readings (eight sensors, around the
// demo's healthy pumps) as a JSON array of samples, and returns its path.
func pumpRows(t testing.TB, n int) string {
	rng := rand.New(rand.NewPCG(7, uint64(n)))
	mean := []float64{60, 3, 6, 1.5, 140, 38, 3500, 20}
	var b bytes.Buffer
	b.WriteByte('[')
	for i := range n {
		if i > 0 {
			b.WriteString(",\n")
		}
		b.WriteByte('[')
		for j, m := range mean {
			if j > 0 {
				b.WriteByte(',')
			}
			b.WriteString(strconv.FormatFloat(m*(1+0.2*rng.NormFloat64()), 'g', 6, 64))
		}
		b.WriteByte(']')
	}
	b.WriteString("]\n")
	path := filepath.Join(t.TempDir(), fmt.Sprintf("pumps-%d.json", n))
	require.NoError(t, os.WriteFile(path, b.Bytes(), 0o644))
	return path
}

// elapsed is the wall time at the end of a table's cost line.
var elapsed = regexp.MustCompile(`(?m)(forward pass(?:es)?), [0-9.]+[µnm]?s$`)

// wholeAndStreamed runs the command line on args as it is (an input of
// fewer than two batches is read whole) and with batches of one sample,
// and returns both outputs and the number of batches of the second run.
func wholeAndStreamed(t *testing.T, args ...string) (whole, streamed string, batches int) {
	t.Helper()
	code, whole, errs := cli(t, args...)
	require.Equal(t, exitOK, code, errs)
	defer func(v int) { chunkValues, chunkDone = v, nil }(chunkValues)
	chunkValues = 8
	chunkDone = func() { batches++ }
	code, streamed, errs = cli(t, args...)
	require.Equal(t, exitOK, code, errs)
	return whole, streamed, batches
}

func TestExplainStreamsEveryFormat(t *testing.T) {
	// 30 samples read whole (the input is shorter than two batches) and
	// read 1 sample at a time: the table, the CSV and the JSON document are
	// the same, but for the wall times in the table; so are the outputs
	// predict writes.
	input := pumpRows(t, 30)
	model := "../../demo/data/pumps.onnx"
	for _, format := range []string{"table", "csv", "json"} {
		whole, streamed, batches := wholeAndStreamed(t, "explain", "-model", model, "-input", input, "-steps", "8", "-allow-incomplete", "-format", format)
		assert.Equal(t, 30, batches, format)
		assert.Equal(t, elapsed.ReplaceAllString(whole, "$1"), elapsed.ReplaceAllString(streamed, "$1"), format)
	}
	// The table's options and its warnings (the gradient of a saturated
	// output) stream the same.
	whole, streamed, _ := wholeAndStreamed(t, "explain", "-model", model, "-input", input, "-method", "grad", "-top", "3", "-sort", "abs")
	assert.Equal(t, elapsed.ReplaceAllString(whole, "$1"), elapsed.ReplaceAllString(streamed, "$1"))
	for _, format := range []string{"json", "table"} {
		whole, streamed, batches := wholeAndStreamed(t, "predict", "-model", model, "-input", input, "-format", format)
		assert.Equal(t, 30, batches, format)
		assert.Equal(t, whole, streamed, format)
	}
	// -out is written as the batches come, and names the samples the same.
	out := filepath.Join(t.TempDir(), "a.csv")
	wholeAndStreamed(t, "explain", "-model", model, "-input", input, "-steps", "8", "-allow-incomplete", "-format", "csv", "-out", out)
	raw, err := os.ReadFile(out)
	require.NoError(t, err)
	assert.Equal(t, 1+30*8, strings.Count(string(raw), "\n"))
	assert.Contains(t, string(raw), "\n29,")

	// Without -allow-incomplete, the failed checks of every batch are
	// counted, and the exit status is the one of the input read whole.
	_, _, wholeErrs := cli(t, "explain", "-model", model, "-input", input, "-steps", "8", "-format", "csv")
	defer func(v int) { chunkValues = v }(chunkValues)
	chunkValues = 8
	code, _, errs := cli(t, "explain", "-model", model, "-input", input, "-steps", "8", "-format", "csv")
	assert.Equal(t, exitFail, code)
	assert.Equal(t, wholeErrs, errs)
	assert.Contains(t, errs, "9 of 30 results incomplete")
}

// liveHeap explains the n pump rows of input with the gradient, the
// document written to a file, and returns the largest heap live after a
// collection at the end of a batch, and the number of batches.
func liveHeap(t testing.TB, n int) (top uint64, batches int) {
	input := pumpRows(t, n)
	chunkDone = func() {
		batches++
		runtime.GC()
		var ms runtime.MemStats
		runtime.ReadMemStats(&ms)
		top = max(top, ms.HeapAlloc)
	}
	defer func() { chunkDone = nil }()
	var out, errb bytes.Buffer
	code := run([]string{"explain", "-model", "../../demo/data/pumps.onnx", "-input", input, "-method", "grad",
		"-format", "json", "-out", filepath.Join(t.TempDir(), "doc.json")}, strings.NewReader(""), &out, &errb)
	require.Equal(t, exitOK, code, errb.String())
	return top, batches
}

func TestExplainMemoryDoesNotGrowWithRows(t *testing.T) {
	// Explained in batches of 1,024 samples, 5,000 and 20,000 rows keep
	// the same heap live between batches: what a batch holds, not what the
	// file holds (20,000 rows of values and results held together are
	// about 12 MB).
	defer func(v int) { chunkValues = v }(chunkValues)
	chunkValues = 8 << 10
	small, n := liveHeap(t, 5000)
	assert.Equal(t, 5, n, "batches of 5,000 rows")
	large, n := liveHeap(t, 20000)
	assert.Equal(t, 20, n, "batches of 20,000 rows")
	t.Logf("live heap between batches: %d bytes for 5,000 rows, %d for 20,000", small, large)
	assert.Less(t, large, small+small/4+(1<<20))
}

// BenchmarkLargeInput explains (with the gradient) and predicts a JSON
// file of 330,000 pump readings (22 MB), writing to a file, and
// reports the peak heap in MB.
func BenchmarkLargeInput(b *testing.B) {
	input := pumpRows(b, 330000)
	model := "../../demo/data/pumps.onnx"
	for _, cmd := range [][]string{
		{"explain", "-model", model, "-input", input, "-method", "grad", "-format", "json", "-out", filepath.Join(b.TempDir(), "doc.json")},
		{"predict", "-model", model, "-input", input},
	} {
		b.Run(cmd[0], func(b *testing.B) {
			var peak uint64
			for b.Loop() {
				p, _ := memprobe.Measure(func() {
					var errb bytes.Buffer
					if code := run(cmd, strings.NewReader(""), new(discard), &errb); code != exitOK {
						b.Fatal(errb.String())
					}
				})
				peak = max(peak, p)
			}
			b.ReportMetric(float64(peak)/1e6, "peak-heap-MB")
		})
	}
}

// discard is a writer that keeps nothing.
type discard struct{}

func (discard) Write(p []byte) (int, error) { return len(p), nil }

func TestSummarizeStreams(t *testing.T) {
	// The demo's held-out rows with a bad one, summarised by pump line
	// whole and one row per batch: the same summary document, bit for bit
	// (the exact sums do not depend on the order rows are added in), and
	// the same rows reported skipped.
	raw, err := os.ReadFile("../../demo/data/pumps_test.csv")
	require.NoError(t, err)
	lines := strings.SplitAfter(string(raw), "\n")[:41]
	lines[17] = "1,2,3\n"
	input := filepath.Join(t.TempDir(), "rows.csv")
	require.NoError(t, os.WriteFile(input, []byte(strings.Join(lines, "")), 0o644))
	args := []string{"summarize", "-model", "../../demo/data/pumps.onnx", "-input", input, "-reference", "../../demo/data/pumps_reference.csv",
		"-baseline", "mean", "-steps", "16", "-by", "pump_line", "-bootstrap", "20", "-format", "json"}
	code, whole, errsWhole := cli(t, args...)
	require.Equal(t, exitFail, code) // one row skipped
	defer func(v int) { chunkValues, chunkDone = v, nil }(chunkValues)
	chunkValues = 8
	batches := 0
	chunkDone = func() { batches++ }
	code, streamed, errsStreamed := cli(t, args...)
	require.Equal(t, exitFail, code)
	assert.Equal(t, 40, batches)
	assert.Equal(t, whole, streamed)
	assert.Equal(t, errsWhole, errsStreamed)
	assert.Contains(t, errsStreamed, "line 18: expected 10 fields, as in the header, got 3")
}

func TestMalformedNPYThroughEveryCommand(t *testing.T) {
	// The 10-byte .npy whose header once panicked inside the .npy library,
	// and a real file cut short, given to explain, predict and -reference:
	// a failure naming the file (status 1), never a panic.
	dir := t.TempDir()
	crash := filepath.Join(dir, "crash.npy")
	require.NoError(t, os.WriteFile(crash, []byte("\x93NUMPY\x01000"), 0o644))
	welds, err := os.ReadFile("../../demo/data/welds_reference.npy")
	require.NoError(t, err)
	cut := filepath.Join(dir, "cut.npy")
	require.NoError(t, os.WriteFile(cut, welds[:40], 0o644))
	pumps, weldsModel := "../../demo/data/pumps.onnx", "../../demo/data/welds.onnx"
	for _, file := range []string{crash, cut} {
		for _, args := range [][]string{
			{"explain", "-model", pumps, "-input", file},
			{"predict", "-model", pumps, "-input", file},
			{"explain", "-model", weldsModel, "-input", "../../demo/data/welds_sample.json", "-baseline", "mean", "-reference", file},
		} {
			code, _, errs := cli(t, args...)
			assert.Equal(t, exitFail, code, "%v: %s", args, errs)
			assert.Contains(t, errs, file, args)
			assert.NotContains(t, errs, "panic", args)
		}
	}
}
