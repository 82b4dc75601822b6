package main

import (
	"encoding/json"
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/internal/testfiles"
)

// The writers re-encode backend input tensors (float32 values) in the
// other input formats without changing a value (internal/testfiles).
var (
	f32       = testfiles.F32
	writeCSV  = testfiles.WriteCSV
	writeJSON = testfiles.WriteJSON
	writeNPY  = testfiles.WriteNPY
)

// formats writes the backend input in each format and returns the paths.
func formats(t *testing.T, pb, stem string) map[string]string {
	t.Helper()
	shape, data := readPBTensor(t, pb)
	tmp := t.TempDir()
	paths := map[string]string{".pb": pb}
	for _, ext := range []string{".json", ".csv", ".npy"} {
		p := filepath.Join(tmp, stem+ext)
		switch ext {
		case ".json":
			writeJSON(t, p, shape, data)
		case ".csv":
			writeCSV(t, p, shape, data, nil)
		case ".npy":
			writeNPY(t, p, shape, data)
		}
		paths[ext] = p
	}
	return paths
}

type predictDoc struct {
	Outputs []struct {
		Name  string     `json:"name"`
		Shape []int      `json:"shape"`
		Data  []*float64 `json:"data"`
	} `json:"outputs"`
}

func predictJSON(t *testing.T, args ...string) predictDoc {
	t.Helper()
	code, out, errs := cli(t, append([]string{"predict", "-format", "json"}, args...)...)
	require.Equal(t, exitOK, code, errs)
	var doc predictDoc
	require.NoError(t, json.Unmarshal([]byte(out), &doc), out)
	return doc
}

func values(p []*float64) []float64 {
	out := make([]float64, len(p))
	for i, v := range p {
		out[i] = *v
	}
	return out
}

func TestPredictRelu(t *testing.T) {
	dir := caseDir(t, "node/test_relu")
	in, outs := setFiles(t, dir)
	wantShape, want := readPBTensor(t, outs[0]) // ONNX backend test data 1.12.0
	for ext, p := range formats(t, in[0], "x") {
		doc := predictJSON(t, "-model", filepath.Join(dir, "model.onnx"), "-input", p)
		require.Len(t, doc.Outputs, 1, ext)
		assert.Equal(t, "y", doc.Outputs[0].Name, ext) // graph output name (python3-onnx 1.12.0)
		assert.Equal(t, wantShape, doc.Outputs[0].Shape, ext)
		assertClose(t, want, values(doc.Outputs[0].Data), "relu via "+ext)
	}
}

func TestPredictGemm(t *testing.T) {
	// Three runtime inputs a [2,7], b [7,4], c [1,4] bound in graph order.
	dir := caseDir(t, "node/test_gemm_default_vector_bias")
	in, outs := setFiles(t, dir)
	require.Len(t, in, 3)
	wantShape, want := readPBTensor(t, outs[0]) // ONNX backend test data 1.12.0
	a := formats(t, in[0], "a")
	b := formats(t, in[1], "b")
	c := formats(t, in[2], "c")
	for _, ext := range []string{".pb", ".json", ".csv", ".npy"} {
		doc := predictJSON(t, "-model", filepath.Join(dir, "model.onnx"), "-input", a[ext], "-input", b[ext], "-input", c[ext])
		require.Len(t, doc.Outputs, 1, ext)
		assert.Equal(t, wantShape, doc.Outputs[0].Shape, ext)
		assertClose(t, want, values(doc.Outputs[0].Data), "gemm via "+ext)
	}
	// Mixed formats bind the same way.
	doc := predictJSON(t, "-model", filepath.Join(dir, "model.onnx"), "-input", a[".csv"], "-input", b[".npy"], "-input", c[".pb"])
	assertClose(t, want, values(doc.Outputs[0].Data), "gemm via mixed formats")

	// The table prints one block per sample of the first axis (2 samples).
	code, out, errs := cli(t, "predict", "-format", "table", "-model", filepath.Join(dir, "model.onnx"), "-input", a[".pb"], "-input", b[".pb"], "-input", c[".pb"])
	require.Equal(t, exitOK, code, errs)
	assert.Contains(t, out, "sample 0\n")
	assert.Contains(t, out, "sample 1\n")
	assert.Contains(t, out, strconv.FormatFloat(want[0], 'g', 6, 32))
	assert.Contains(t, out, strconv.FormatFloat(want[7], 'g', 6, 32))

	// One -input per runtime input: a usage error naming the count.
	code, _, errs = cli(t, "predict", "-model", filepath.Join(dir, "model.onnx"), "-input", a[".pb"])
	assert.Equal(t, exitUsage, code)
	assert.Contains(t, errs, "3 inputs (a, b, c), got 1")
}

func TestPredictBadInputs(t *testing.T) {
	// Shapes from the model (python3-onnx 1.12.0): x is [3,4,5], so a sample
	// is [4,5], 20 values.
	dir := caseDir(t, "node/test_relu")
	model := filepath.Join(dir, "model.onnx")
	in, _ := setFiles(t, dir)
	shape, data := readPBTensor(t, in[0])
	require.Equal(t, []int{3, 4, 5}, shape)
	tmp := t.TempDir()

	check := func(name, content, want string) {
		t.Helper()
		p := filepath.Join(tmp, name)
		require.NoError(t, os.WriteFile(p, []byte(content), 0o644))
		code, out, errs := cli(t, "predict", "-model", model, "-input", p)
		assert.Equal(t, exitFail, code, name)
		assert.Empty(t, out, name)
		assert.Contains(t, errs, want, name)
	}

	// A CSV row one value short: both counts are named.
	rows := make([]string, 3)
	for i := range rows {
		vals := make([]string, 20)
		for j := range vals {
			vals[j] = f32(data[i*20+j])
		}
		if i == 1 {
			vals = vals[:19]
		}
		rows[i] = strings.Join(vals, ",")
	}
	check("short.csv", strings.Join(rows, "\n")+"\n", "line 2: expected 20 values, got 19")

	// NaN and Inf are refused with their position (IEEE 754: not finite).
	rows[1] = strings.Repeat("1,", 3) + "NaN" + strings.Repeat(",1", 16)
	check("nan.csv", strings.Join(rows, "\n")+"\n", "line 2, column 4: NaN value is not a finite number")
	rows[1] = strings.Repeat("1,", 19) + "-Inf"
	check("inf.csv", strings.Join(rows, "\n")+"\n", "line 2, column 20: -Inf value is not a finite number")

	// A ragged nested array is reported with its path.
	check("ragged.json", "[[[1,2,3,4,5],[1,2,3,4,5],[1,2,3,4],[1,2,3,4,5]]]", "ragged array at [0][2]: expected 5 elements, got 4")
	check("mixed.json", "[["+strings.Repeat("1,", 19)+"1],[3,[4]]]", "ragged array at [1][1]: expected a number, got an array")
	// A sample of the wrong shape names both.
	check("wrong.json", "[[1,2,3],[4,5,6]]", "sample 0: expected 20 values (shape [4 5]), got 3 (shape [3])")
	check("text.json", `[["a"]]`, "at [0][0]: expected a number, got a string")
	check("x.tsv", "1,2", `unknown file type ".tsv"`)
	// A text file is read with a vocabulary, which a model of float inputs lacks.
	check("x.txt", "1 2", "a text file needs a vocabulary")

	// A .pb of the wrong shape: the Gemm's b input [7,4] given for x [3,4,5].
	gemm := caseDir(t, "node/test_gemm_default_vector_bias")
	gin, _ := setFiles(t, gemm)
	code, _, errs := cli(t, "predict", "-model", model, "-input", gin[1])
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errs, "expected a tensor of rank 3 (shape [3 4 5]), got rank 2 (shape [7 4])")

	// A truncated .pb tensor.
	raw, err := os.ReadFile(in[0])
	require.NoError(t, err)
	p := filepath.Join(tmp, "cut.pb")
	require.NoError(t, os.WriteFile(p, raw[:len(raw)/2], 0o644))
	code, _, errs = cli(t, "predict", "-model", model, "-input", p)
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errs, "cut.pb")
}

func TestPredictExplainRefuseModels(t *testing.T) {
	// node/test_dft holds one unnamed DFT node (python3-onnx 1.12.0), an
	// operator apportion does not run (onnxlite.SupportedOps).
	dir := caseDir(t, "node/test_dft")
	in, _ := setFiles(t, dir)
	for _, cmd := range []string{"predict", "explain"} {
		code, out, errs := cli(t, cmd, "-model", filepath.Join(dir, "model.onnx"), "-input", in[0])
		assert.Equal(t, exitFail, code, cmd)
		assert.Empty(t, out, cmd)
		assert.Contains(t, errs, `DFT (node "#0")`, cmd)
	}

	// A truncated model: exit 1 with the reason, for every command.
	relu := caseDir(t, "node/test_relu")
	rin, _ := setFiles(t, relu)
	raw, err := os.ReadFile(filepath.Join(relu, "model.onnx"))
	require.NoError(t, err)
	p := filepath.Join(t.TempDir(), "cut.onnx")
	require.NoError(t, os.WriteFile(p, raw[:len(raw)-3], 0o644))
	for _, cmd := range []string{"predict", "explain"} {
		code, out, errs := cli(t, cmd, "-model", p, "-input", rin[0])
		assert.Equal(t, exitFail, code, cmd)
		assert.Empty(t, out, cmd)
		assert.Contains(t, errs, "cut.onnx", cmd)
	}
}

func TestPredictFlatJSON(t *testing.T) {
	// Three flat samples of 20 values bind as x [3,4,5]; the outputs match
	// output_0.pb of the ONNX backend test data 1.12.0.
	dir := caseDir(t, "node/test_relu")
	in, outs := setFiles(t, dir)
	_, data := readPBTensor(t, in[0])
	_, want := readPBTensor(t, outs[0])
	p := filepath.Join(t.TempDir(), "rows.json")
	writeJSON(t, p, []int{3, 20}, data)
	doc := predictJSON(t, "-model", filepath.Join(dir, "model.onnx"), "-input", p)
	assert.Equal(t, []int{3, 4, 5}, doc.Outputs[0].Shape)
	assertClose(t, want, values(doc.Outputs[0].Data), "relu via flat JSON rows")
}

func TestPredictKeepsGoodRows(t *testing.T) {
	// A CSV with one unreadable row among four: predict writes the outputs
	// of the three good rows, lists the bad one with its line and column,
	// and exits 1. The kept rows' outputs equal predict on the good rows
	// alone (common practice: a sample's output does not depend on the
	// samples batched beside it).
	model := filepath.Join("..", "..", "demo", "data", "pumps.onnx")
	raw, err := os.ReadFile(filepath.Join("..", "..", "demo", "data", "pumps_test.csv"))
	require.NoError(t, err)
	lines := strings.Split(string(raw), "\n")
	dir := t.TempDir()
	badRow := "x" + lines[3][strings.Index(lines[3], ","):]
	mixed := filepath.Join(dir, "mixed.csv")
	good := filepath.Join(dir, "good.csv")
	require.NoError(t, os.WriteFile(mixed, []byte(strings.Join([]string{lines[0], lines[1], lines[2], badRow, lines[4]}, "\n")+"\n"), 0o644))
	require.NoError(t, os.WriteFile(good, []byte(strings.Join([]string{lines[0], lines[1], lines[2], lines[4]}, "\n")+"\n"), 0o644))

	code, out, errs := cli(t, "predict", "-model", model, "-input", mixed)
	require.Equal(t, exitFail, code, errs)
	assert.Contains(t, errs, `sample 2 left out: line 4, column bearing_temp: "x" is not a number`)
	var doc struct {
		Outputs []struct {
			Shape []int      `json:"shape"`
			Data  []*float64 `json:"data"`
		} `json:"outputs"`
		Rows   []int `json:"rows"`
		Errors []struct {
			Index int    `json:"index"`
			Error string `json:"error"`
		} `json:"errors"`
	}
	require.NoError(t, json.Unmarshal([]byte(out), &doc), out)
	assert.Equal(t, []int{0, 1, 3}, doc.Rows)
	require.Len(t, doc.Errors, 1)
	assert.Equal(t, 2, doc.Errors[0].Index)
	want := predictJSON(t, "-model", model, "-input", good)
	require.Len(t, doc.Outputs, 1)
	assert.Equal(t, want.Outputs[0].Shape, doc.Outputs[0].Shape)
	assert.Equal(t, values(want.Outputs[0].Data), values(doc.Outputs[0].Data))

	// The table labels each block with the sample's place in the file.
	code, out, _ = cli(t, "predict", "-format", "table", "-model", model, "-input", mixed)
	assert.Equal(t, exitFail, code)
	assert.Contains(t, out, "sample 3\n")
	assert.NotContains(t, out, "sample 2\n")

	// explain with the mean of the samples as the baseline: the mean is
	// that of the samples read (common practice: an unreadable row is no
	// sample), so the good rows' explanations are those of the good file,
	// bit for bit, and the bad one carries its own error.
	explainDoc := func(in string) []struct {
		Attributions []float64 `json:"attributions"`
		Error        *string   `json:"error"`
	} {
		_, out, _ := cli(t, "explain", "-model", model, "-input", in, "-baseline", "mean", "-method", "ig", "-steps", "16", "-format", "json")
		var doc struct {
			Explanations []struct {
				Attributions []float64 `json:"attributions"`
				Error        *string   `json:"error"`
			} `json:"explanations"`
		}
		require.NoError(t, json.Unmarshal([]byte(out), &doc), out)
		return doc.Explanations
	}
	got, want2 := explainDoc(mixed), explainDoc(good)
	require.Len(t, got, 4)
	require.NotNil(t, got[2].Error)
	assert.Contains(t, *got[2].Error, `"x" is not a number`)
	for i, j := range []int{0, 1, 3} {
		assert.Equal(t, want2[i].Attributions, got[j].Attributions, "sample %d", j)
	}
}

func TestPredictKeepsRowsTheModelRefuses(t *testing.T) {
	// A row the model itself refuses (a token id outside the embedding
	// table: ONNX Gather requires indices within [−s, s − 1] of the axis
	// gathered, operator specification) among good rows: the good rows
	// keep their outputs, equal to predict on them alone, and the bad one
	// is named in the user's words, without the engine's context.
	model := filepath.Join("..", "..", "demo", "data", "tickets.onnx")
	dir := t.TempDir()
	row := func(first string) string {
		return first + strings.Repeat(",1", 15)
	}
	mixed := filepath.Join(dir, "mixed.csv")
	good := filepath.Join(dir, "good.csv")
	require.NoError(t, os.WriteFile(mixed, []byte(strings.Join([]string{row("5"), row("9999"), row("7")}, "\n")+"\n"), 0o644))
	require.NoError(t, os.WriteFile(good, []byte(strings.Join([]string{row("5"), row("7")}, "\n")+"\n"), 0o644))
	code, out, errs := cli(t, "predict", "-model", model, "-input", mixed)
	require.Equal(t, exitFail, code, errs)
	assert.Contains(t, errs, "sample 1 left out: the model cannot run this input: Gather index 9999 at position 0 of its indices is out of range: expected a whole number from -262 to 261")
	assert.NotContains(t, errs, "nn:")
	assert.NotContains(t, errs, "bad request")
	var doc struct {
		Outputs []struct {
			Data []*float64 `json:"data"`
		} `json:"outputs"`
		Rows []int `json:"rows"`
	}
	require.NoError(t, json.Unmarshal([]byte(out), &doc), out)
	assert.Equal(t, []int{0, 2}, doc.Rows)
	want := predictJSON(t, "-model", model, "-input", good)
	assert.Equal(t, values(want.Outputs[0].Data), values(doc.Outputs[0].Data))

	// explain names the same row in the same words and explains the others;
	// summarize skips it, in the same words.
	code, out, _ = cli(t, "explain", "-model", model, "-input", mixed)
	assert.Equal(t, exitFail, code)
	assert.Contains(t, out, "sample 1: error: the model cannot run this input: Gather index 9999")
	assert.Contains(t, out, "sample 2: target")
	header := make([]string, 16)
	for i := range header {
		header[i] = fmt.Sprintf("t%d", i)
	}
	withHeader := filepath.Join(dir, "header.csv")
	require.NoError(t, os.WriteFile(withHeader, []byte(strings.Join(header, ",")+"\n"+strings.Join([]string{row("5"), row("9999"), row("7")}, "\n")+"\n"), 0o644))
	code, _, errs = cli(t, "summarize", "-model", model, "-input", withHeader)
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errs, "line 3: the model cannot run this input: Gather index 9999")
	assert.Contains(t, errs, "1 of 3 rows skipped")
}
