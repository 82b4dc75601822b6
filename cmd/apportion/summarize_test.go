package main

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/csv"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"image/png"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// The counts below come from demo/data/README.md (the documented
// invented data): the held-out set has 500 rows, by line A 94/19/31,
// B 102/47/29, C 91/46/41 (normal/degraded/failing), 287 normal,
// 112 degraded, 101 failing, and the model's held-out accuracy is 497/500.
var pumpLineRows = map[string]float64{"A": 94 + 19 + 31, "B": 102 + 47 + 29, "C": 91 + 46 + 41}

// ruleFeatures are the features of the documented labelling rule
// (demo/data/README.md).
var ruleFeatures = map[string]bool{"vibration_rms": true, "bearing_temp": true, "hours_since_service": true}

// pumpsCSV returns the header and the first n data lines of the embedded
// pumps_test.csv as CSV text.
func pumpsCSV(t *testing.T, from, to int) string {
	t.Helper()
	raw, err := demo.File("pumps_test.csv")
	require.NoError(t, err)
	lines := strings.Split(strings.TrimRight(string(raw), "\n"), "\n")
	require.Len(t, lines, 501, "README: 500 held-out rows and a header")
	return lines[0] + "\n" + strings.Join(lines[1+from:1+to], "\n") + "\n"
}

func writeTemp(t *testing.T, name, content string) string {
	t.Helper()
	p := filepath.Join(t.TempDir(), name)
	require.NoError(t, os.WriteFile(p, []byte(content), 0o644))
	return p
}

func TestSummarizeDemoTable(t *testing.T) {
	code, out, errOut := cli(t, "summarize", "-allow-incomplete", "-steps", "32")
	require.Equal(t, exitOK, code, errOut)
	// No progress bar when standard error is not a terminal: only the
	// note on the column the summary does not read, and the count of rows
	// whose completeness check failed (32 trapezoid points are too few
	// for many of these rows: see TestSummarizeCountsIncompleteRows).
	assert.Equal(t, "apportion summarize: demo:pumps_test.csv: ignored the columns the model does not read: label\n"+
		"apportion summarize: 218 of the 500 rows summarised failed their completeness check (attributions that do not add up to the output's change, by more than -tolerance)\n", errOut)
	assert.Contains(t, out, "500 rows summarised (218 failed their completeness check), 0 skipped")
	assert.Contains(t, out, "all rows (500 rows)")
	for line, n := range pumpLineRows {
		assert.Contains(t, out, "pump_line = "+line+" ("+strconv.Itoa(int(n))+" rows)")
	}
	// The first three features of the overall table are the rule's.
	lines := strings.Split(out, "\n")
	i := 0
	for i < len(lines) && !strings.HasPrefix(lines[i], "all rows") {
		i++
	}
	require.Less(t, i+5, len(lines))
	for _, l := range lines[i+2 : i+5] {
		name := strings.Fields(l)[0]
		assert.True(t, ruleFeatures[name], "feature %q ranked in the first three: %s", name, l)
	}
	// One scale for every group: exactly one row, the largest mean |a| of
	// any group, has the full bar.
	assert.Equal(t, 1, strings.Count(out, "████████████"))
	assert.Contains(t, out, "the largest of any group)")
}

func TestSummarizeDemoJSON(t *testing.T) {
	code, out, errOut := cli(t, "summarize", "-allow-incomplete", "-steps", "32", "-format", "json", "-bootstrap", "50")
	require.Equal(t, exitOK, code, errOut)
	doc := decodeJSON(t, out)
	assert.Equal(t, "apportion-summary", doc["format"])
	assert.Equal(t, 500.0, doc["rows"])
	assert.Equal(t, 50.0, doc["bootstrap"])
	assert.Equal(t, "pump_line", doc["group_by"])
	s, err := demo.Get("pumps")
	require.NoError(t, err)
	sum := sha256.Sum256(s.Model) // the embedded model file's SHA-256
	assert.Equal(t, hex.EncodeToString(sum[:]), doc["model_sha256"])
	groups := doc["groups"].([]any)
	require.Len(t, groups, 3)
	for _, g := range groups {
		g := g.(map[string]any)
		assert.Equal(t, pumpLineRows[g["name"].(string)], g["rows"], "README counts per line")
	}
	// The feature names are the model's metadata feature_names, which are
	// the CSV header's first 8 columns (README table).
	header := strings.Split(strings.SplitN(pumpsCSV(t, 0, 0), "\n", 2)[0], ",")
	feats := doc["features"].([]any)
	require.Len(t, feats, 8)
	for i, f := range feats {
		assert.Equal(t, header[i], f)
	}
	settings := doc["settings"].(map[string]any)
	assert.Equal(t, []any{map[string]any{"kind": "mean"}}, settings["baselines"])
	assert.True(t, strings.HasPrefix(settings["reference"].(string), "sha256:"))
}

func TestSummarizeCSVAndByPredicted(t *testing.T) {
	code, out, errOut := cli(t, "summarize", "-allow-incomplete", "-steps", "32", "-by", "predicted", "-format", "csv")
	require.Equal(t, exitOK, code, errOut)
	recs, err := csv.NewReader(strings.NewReader(out)).ReadAll()
	require.NoError(t, err)
	require.Equal(t, []string{"scope", "group", "rows", "rank", "feature", "mean_abs", "mean_abs_lo", "mean_abs_hi", "mean", "mean_lo", "mean_hi", "sd"}, recs[0])
	rows := map[string]int{}
	for _, r := range recs[1:] {
		if r[0] == "all" {
			assert.Equal(t, "500", r[2])
			continue
		}
		assert.Equal(t, "predicted", r[0])
		n, err := strconv.Atoi(r[2])
		require.NoError(t, err)
		rows[r[1]] = n
		// Each record: lo ≤ mean ≤ hi.
		v := make([]float64, 12)
		for k := 5; k <= 10; k++ {
			v[k], err = strconv.ParseFloat(r[k], 64)
			require.NoError(t, err)
		}
		assert.LessOrEqual(t, v[6], v[5])
		assert.LessOrEqual(t, v[5], v[7])
		assert.LessOrEqual(t, v[9], v[8])
		assert.LessOrEqual(t, v[8], v[10])
	}
	require.Len(t, recs, 1+8*4, "8 features for all rows and each of the 3 classes")
	// README: labels 287/112/101 and 497 of 500 predicted right, so each
	// predicted-class count is within 3 of its label count.
	assert.InDelta(t, 287, rows["normal"], 3)
	assert.InDelta(t, 112, rows["degraded"], 3)
	assert.InDelta(t, 101, rows["failing"], 3)
	assert.Equal(t, 500, rows["normal"]+rows["degraded"]+rows["failing"])
}

func TestSummarizeBadRows(t *testing.T) {
	good := pumpsCSV(t, 0, 12)
	lines := strings.Split(strings.TrimRight(good, "\n"), "\n")
	// Lines (1-based, header = 1): 4 wrong length, 7 NaN, 10 not a number.
	lines[3] = "1,2,3"
	lines[6] = strings.Replace(lines[6], strings.Split(lines[6], ",")[1], "NaN", 1)
	lines[9] = strings.Replace(lines[9], strings.Split(lines[9], ",")[0], "warm", 1)
	bad := writeTemp(t, "bad.csv", strings.Join(lines, "\n")+"\n")

	code, out, errOut := cli(t, "summarize", "-allow-incomplete", "-input", bad, "-steps", "32", "-format", "json")
	assert.Equal(t, exitFail, code, "a bad row makes the status 1")
	assert.Contains(t, errOut, "line 4: expected 10 fields, as in the header, got 3")
	assert.Contains(t, errOut, "line 7: column vibration_rms: NaN value is not a finite number")
	assert.Contains(t, errOut, `line 10: column bearing_temp: "warm" is not a number`)
	assert.Contains(t, errOut, "3 of 12 rows skipped")
	doc := decodeJSON(t, out)
	assert.Equal(t, 9.0, doc["rows"], "the other rows are summarised")
	assert.Equal(t, 3.0, doc["skipped_rows"])
	skipped := doc["skipped"].([]any)
	require.Len(t, skipped, 3)
	assert.Equal(t, 2.0, skipped[0].(map[string]any)["key"], "data row 2 is line 4")

	// The means over the 9 good rows equal those of a file holding only
	// them (the bootstrap intervals differ: the rows' keys do).
	var keep []string
	for i, l := range lines {
		if i != 3 && i != 6 && i != 9 {
			keep = append(keep, l)
		}
	}
	clean := writeTemp(t, "clean.csv", strings.Join(keep, "\n")+"\n")
	code, out2, errOut := cli(t, "summarize", "-allow-incomplete", "-input", clean, "-steps", "32", "-format", "json")
	require.Equal(t, exitOK, code, errOut)
	mean := func(d map[string]any) []any {
		var out []any
		for _, f := range d["overall"].(map[string]any)["features"].([]any) {
			f := f.(map[string]any)
			out = append(out, f["mean"], f["mean_abs"])
		}
		return out
	}
	assert.Equal(t, mean(decodeJSON(t, out2)), mean(doc))
}

func TestSummarizeMergeEqualsWhole(t *testing.T) {
	dir := t.TempDir()
	whole := writeTemp(t, "whole.csv", pumpsCSV(t, 0, 90))
	a := writeTemp(t, "a.csv", pumpsCSV(t, 0, 37))
	b := writeTemp(t, "b.csv", pumpsCSV(t, 37, 90))
	outs := map[string]string{}
	for name, args := range map[string][]string{
		"whole": {"-input", whole},
		"a":     {"-input", a},
		"b":     {"-input", b, "-first-row", "37"},
	} {
		p := filepath.Join(dir, name+".json")
		args = append([]string{"summarize", "-allow-incomplete", "-steps", "16", "-by", "pump_line", "-bootstrap", "64", "-format", "json", "-out", p}, args...)
		code, _, errOut := cli(t, args...)
		require.Equal(t, exitOK, code, errOut)
		outs[name] = p
	}
	code, merged, errOut := cli(t, "summarize", "-merge", "-format", "json", outs["a"], outs["b"])
	require.Equal(t, exitOK, code, errOut)
	want, err := os.ReadFile(outs["whole"])
	require.NoError(t, err)
	// Bit for bit: the exact sums, counts and intervals of the two parts
	// merged are those of the whole.
	assert.Equal(t, string(want), merged)

	// Flags may follow the files; the merged table names all 90 rows.
	code, table, errOut := cli(t, "summarize", "-merge", outs["b"], outs["a"], "-format", "table")
	require.Equal(t, exitOK, code, errOut)
	assert.Contains(t, table, "90 rows summarised (41 failed their completeness check), 0 skipped") // the parts' counts added

	// A part merged twice is refused, pointing to -first-row.
	code, _, errOut = cli(t, "summarize", "-merge", outs["a"], outs["a"])
	assert.Equal(t, exitFail, code)
	assert.Equal(t, "apportion summarize: -merge "+outs["a"]+": it holds row key 0, as "+outs["a"]+" does: row keys count from -first-row (0 unless given), so each part of a data set must be summarized with -first-row set to the index of its first row in the whole\n", errOut)

	// Summaries of another method are refused, naming the difference.
	other := filepath.Join(dir, "other.json")
	code, _, errOut = cli(t, "summarize", "-allow-incomplete", "-input", b, "-first-row", "37", "-method", "grad-input", "-by", "pump_line", "-bootstrap", "64", "-format", "json", "-out", other)
	require.Equal(t, exitOK, code, errOut)
	code, _, errOut = cli(t, "summarize", "-merge", outs["a"], other)
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errOut, "apportion summarize: -merge "+other+": it differs from "+outs["a"]+" in its method (integrated-gradients there, gradient-times-input here)")

	// A file that is not a summary, or no file: the same one prefix.
	code, _, errOut = cli(t, "summarize", "-merge", outs["a"], whole)
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errOut, "apportion summarize: -merge "+whole+": gradattr: invalid input: not a summary document")
	code, _, errOut = cli(t, "summarize", "-merge", outs["a"], whole+".gone")
	assert.Equal(t, exitFail, code)
	assert.Equal(t, "apportion summarize: -merge "+whole+".gone: no such file or directory\n", errOut)
}

func TestSummarizePNG(t *testing.T) {
	p := filepath.Join(t.TempDir(), "s.png")
	code, _, errOut := cli(t, "summarize", "-allow-incomplete", "-steps", "16", "-bootstrap", "20", "-format", "png", "-out", p)
	require.Equal(t, exitOK, code, errOut)
	raw, err := os.ReadFile(p)
	require.NoError(t, err)
	img, err := png.Decode(bytes.NewReader(raw)) // the PNG standard's decoder, image/png
	require.NoError(t, err)
	assert.Greater(t, img.Bounds().Dx(), 0)
}

func TestSummarizeUsageErrors(t *testing.T) {
	model := writeTemp(t, "m.onnx", "")
	s, err := demo.Get("pumps")
	require.NoError(t, err)
	require.NoError(t, os.WriteFile(model, s.Model, 0o644))
	data := writeTemp(t, "d.csv", pumpsCSV(t, 0, 3))
	for _, tc := range []struct {
		args []string
		msg  string
	}{
		{[]string{"-format", "npy"}, "-format must be table, json, csv or png"},
		{[]string{"-format", "png"}, "-format png needs -out"},
		{[]string{"-merge"}, "-merge needs the summary JSON files"},
		{[]string{"-merge", "-model", model, "a.json"}, "-model cannot be given with it"},
		{[]string{"-bootstrap", "0"}, "-bootstrap must be from 1"},
		{[]string{"-first-row", "18446744073709551615"}, "-first-row must be at most"},
		{[]string{"-model", model}, "-input is required with -model"},
		{[]string{"x.json"}, "unexpected arguments: x.json"},
		{[]string{"-model", model, "-input", data, "-baseline", "mean"}, "-baseline mean needs -reference"},
		{[]string{"-input", data, "-by", "colour"}, "-by colour: no such column"},
		{[]string{"-method", "nope"}, "-method must be one of"},
		{[]string{"-steps", "32", "-noise", "0.2"}, "-noise applies to -method smoothgrad only"},
		{[]string{"-nosuchflag"}, "flag provided but not defined"},
	} {
		code, _, errOut := cli(t, append([]string{"summarize"}, tc.args...)...)
		assert.Equal(t, exitUsage, code, "%v: %s", tc.args, errOut)
		assert.Contains(t, errOut, tc.msg, "%v", tc.args)
	}
	code, out, _ := cli(t, "summarize", "-allow-incomplete", "-h")
	assert.Equal(t, exitOK, code)
	assert.Contains(t, out, "apportion summarize -merge")
	code, out, _ = cli(t, "help")
	assert.Equal(t, exitOK, code)
	assert.Contains(t, out, "summarize")
}

// TestSummarizeModelFile runs a model given as a file on a CSV whose
// columns are in another order than the model's, with extra columns: the
// features are matched by the metadata feature_names, so the summary equals
// the one of the file in the model's order.
func TestSummarizeModelFile(t *testing.T) {
	s, err := demo.Get("pumps")
	require.NoError(t, err)
	model := writeTemp(t, "pumps.onnx", string(s.Model))
	ref := writeTemp(t, "ref.csv", string(s.Reference))
	text := pumpsCSV(t, 0, 20)
	recs, err := csv.NewReader(strings.NewReader(text)).ReadAll()
	require.NoError(t, err)
	var buf bytes.Buffer
	w := csv.NewWriter(&buf)
	for _, r := range recs {
		// label, pump_line first; features reversed.
		out := []string{r[9], r[8]}
		for j := 7; j >= 0; j-- {
			out = append(out, r[j])
		}
		require.NoError(t, w.Write(out))
	}
	w.Flush()
	shuffled := writeTemp(t, "shuffled.csv", buf.String())
	inOrder := writeTemp(t, "ordered.csv", text)
	var docs []string
	for _, in := range []string{inOrder, shuffled} {
		code, out, errOut := cli(t, "summarize", "-allow-incomplete", "-model", model, "-input", in, "-reference", ref, "-baseline", "mean", "-steps", "16", "-by", "label", "-bootstrap", "30", "-format", "json")
		require.Equal(t, exitOK, code, errOut)
		assert.Equal(t, 1, strings.Count(errOut, filepath.Base(in)+": ignored the columns the model does not read: pump_line\n"), errOut)
		docs = append(docs, out)
	}
	assert.Equal(t, docs[0], docs[1])
	var doc map[string]any
	require.NoError(t, json.Unmarshal([]byte(docs[0]), &doc))
	assert.Equal(t, "label", doc["group_by"])
	assert.Equal(t, 20.0, doc["rows"])
}

// TestSummarizeTargetOutOfRange asks for an output the model does not have
// (the pumps model has 3, demo/data/README.md): a usage error naming the
// range, before any row is explained.
func TestSummarizeTargetOutOfRange(t *testing.T) {
	in := writeTemp(t, "few.csv", pumpsCSV(t, 0, 4))
	code, out, errOut := cli(t, "summarize", "-allow-incomplete", "-input", in, "-target", "7", "-steps", "8", "-format", "json")
	assert.Equal(t, exitUsage, code)
	assert.Contains(t, errOut, `-target must be top or an index from 0 to 2 (output "condition" has 3 values), got 7`)
	assert.Empty(t, out)
}

// TestSummarizeBackendSoftmax summarises gradient×input of the ONNX
// backend node case test_softmax_example (y = Softmax(x), x of shape
// [1, 3]; ONNX backend test data 1.12.0), read from its .pb tensor, which
// carries no feature names. For the top output t, ∂y_t/∂x_i = y_t(δ_ti − y_i)
// (closed form of the softmax Jacobian), so the one row's attribution, and
// the mean of a one-row summary, is a_i = x_i y_t (δ_ti − y_i), with y from
// output_0.pb.
func TestSummarizeBackendSoftmax(t *testing.T) {
	model, x, y, xpb := softmaxCase(t)
	code, out, errOut := cli(t, "summarize", "-allow-incomplete", "-model", model, "-input", xpb,
		"-method", "grad-input", "-bootstrap", "20", "-format", "json")
	require.Equal(t, exitOK, code, errOut)
	doc := decodeJSON(t, out)
	assert.Equal(t, 1.0, doc["rows"])
	assert.Equal(t, []any{"0", "1", "2"}, doc["features"], "features named by index without metadata")
	top := argmax(y)
	for _, f := range doc["overall"].(map[string]any)["features"].([]any) {
		f := f.(map[string]any)
		i := int(f["index"].(float64))
		d := 0.0
		if i == top {
			d = 1
		}
		want := x[i] * y[top] * (d - y[i])
		// float32 model: rtol 1e-3, atol 1e-7 (the backend node tests').
		assert.InDelta(t, want, f["mean"], 1e-7+1e-3*math.Abs(want), "feature %d", i)
		assert.InDelta(t, math.Abs(want), f["mean_abs"], 1e-7+1e-3*math.Abs(want), "feature %d", i)
		// One row: every replicate mean is w·a/w = a, up to the rounding of
		// one product and one quotient (IEEE 754: ≤ 1 ulp each).
		m := f["mean"].(float64)
		assert.InDelta(t, m, f["mean_lo"], 4e-16*math.Abs(m))
		assert.InDelta(t, m, f["mean_hi"], 4e-16*math.Abs(m))
	}
}

// TestSummarizeCSVWithoutFeatureNames runs test_softmax_example (no
// feature_names metadata; ONNX backend test data 1.12.0) on a CSV with a
// text column first and a numeric column too many: the model's 3 features
// are the first 3 numeric columns, named by the header. Check values:
// gradient×input of the top softmax output, a_i = x_i y_t (δ_ti − y_i)
// with y = softmax(x) (closed form; for the backend row, y is also
// output_0.pb), averaged over the rows of each group.
func TestSummarizeCSVWithoutFeatureNames(t *testing.T) {
	model, x, y, _ := softmaxCase(t)
	rows := [][]float64{x, {2 * x[0], -x[1], 0.5}, {0.1, 0.2, -0.3}}
	softmax := func(v []float64) []float64 {
		m := math.Max(v[0], math.Max(v[1], v[2]))
		out := make([]float64, 3)
		s := 0.0
		for i := range v {
			out[i] = math.Exp(v[i] - m)
			s += out[i]
		}
		for i := range out {
			out[i] /= s
		}
		return out
	}
	assertClose(t, y, softmax(x), "softmax closed form vs output_0.pb")
	var b strings.Builder
	b.WriteString("site,u,v,w,extra,batch\n")
	for i, r := range rows {
		fmt.Fprintf(&b, "s%d,%v,%v,%v,99,%s\n", i, r[0], r[1], r[2], []string{"p", "q", "p"}[i])
	}
	in := writeTemp(t, "nonames.csv", b.String())
	code, out, errOut := cli(t, "summarize", "-allow-incomplete", "-model", model, "-input", in, "-method", "grad-input", "-by", "batch", "-bootstrap", "10", "-format", "json")
	require.Equal(t, exitOK, code, errOut)
	doc := decodeJSON(t, out)
	assert.Equal(t, []any{"u", "v", "w"}, doc["features"])
	want := map[string][]float64{"": make([]float64, 3), "p": make([]float64, 3), "q": make([]float64, 3)}
	count := map[string]float64{"": 3, "p": 2, "q": 1}
	for i, r := range rows {
		p := softmax(r)
		top := argmax(p)
		for k := range r {
			d := 0.0
			if k == top {
				d = 1
			}
			a := r[k] * p[top] * (d - p[k])
			want[""][k] += a / count[""]
			g := []string{"p", "q", "p"}[i]
			want[g][k] += a / count[g]
		}
	}
	groups := append([]any{doc["overall"]}, doc["groups"].([]any)...)
	require.Len(t, groups, 3)
	for _, g := range groups {
		g := g.(map[string]any)
		name := g["name"].(string)
		for _, f := range g["features"].([]any) {
			f := f.(map[string]any)
			k := int(f["index"].(float64))
			w := want[name][k]
			// float32 model: rtol 1e-3, atol 1e-7 (the backend node tests').
			assert.InDelta(t, w, f["mean"], 1e-7+1e-3*math.Abs(w), "group %q feature %d", name, k)
		}
	}
}

// TestSummarizeMergesWithLibrary summarises the first 37 rows of the demo's
// held-out set with the command line and the next 53 through the library
// (explain, samples, gradattr), with the same settings: the two summaries
// record the same method and settings, and merged they are, bit for bit,
// the command line's summary of all 90 rows.
func TestSummarizeMergesWithLibrary(t *testing.T) {
	dir := t.TempDir()
	args := []string{"summarize", "-allow-incomplete", "-steps", "16", "-by", "pump_line", "-bootstrap", "64", "-format", "json"}
	outs := map[string]string{}
	for name, rows := range map[string][2]int{"whole": {0, 90}, "a": {0, 37}} {
		in := writeTemp(t, name+".csv", pumpsCSV(t, rows[0], rows[1]))
		p := filepath.Join(dir, name+".json")
		code, _, errOut := cli(t, append(args, "-input", in, "-out", p)...)
		require.Equal(t, exitOK, code, errOut)
		outs[name] = p
	}

	s, err := demo.Get("pumps")
	require.NoError(t, err)
	m, err := explain.Decode(s.Model, "pumps.onnx", explain.DecodeOptions{})
	require.NoError(t, err)
	spec, err := m.Input()
	require.NoError(t, err)
	require.NoError(t, m.Compile(explain.CompileOptions{}))
	tbl, err := samples.ReadTable(strings.NewReader(pumpsCSV(t, 37, 90)), "b.csv", spec,
		samples.TableOptions{Features: m.Meta.Features, Size: 8, Group: "pump_line"})
	require.NoError(t, err)
	ref, err := samples.Read(bytes.NewReader(s.Reference), s.ReferenceFile, spec, m.ReadOptions(false))
	require.NoError(t, err)
	settings := explain.Defaults()
	settings.Steps = 16
	settings.Baseline = explain.Baseline{Kind: gradattr.BaselineMean}
	settings.Reference = explain.NewDataset(s.ReferenceFile, s.Reference, ref)
	head, err := m.Head("", false)
	require.NoError(t, err)
	ex, err := explain.New(m, head, settings)
	require.NoError(t, err)
	opt, err := ex.SummaryOptions(ex.Features(tbl.Columns), "pump_line", 64, gradattr.DefaultSeed)
	require.NoError(t, err)
	lib, err := gradattr.NewSummary(opt)
	require.NoError(t, err)
	skipped, err := ex.Summarize(context.Background(), tbl.Rows, lib, explain.SummarizeOptions{FirstKey: 37})
	require.NoError(t, err)
	require.Empty(t, skipped)

	raw, err := os.ReadFile(outs["a"])
	require.NoError(t, err)
	merged, err := gradattr.DecodeSummary(bytes.NewReader(raw))
	require.NoError(t, err)
	assert.Equal(t, gradattr.MethodIntegratedGradients, merged.Options().Method)
	require.NoError(t, merged.Merge(lib))
	got, err := merged.MarshalJSON()
	require.NoError(t, err)
	want, err := os.ReadFile(outs["whole"])
	require.NoError(t, err)
	assert.Equal(t, strings.TrimSpace(string(want)), string(got))
}

// keyedPumps returns the first n rows of the demo's held-out set with a
// key column in front: key(i) for data row i.
func keyedPumps(t *testing.T, n int, key func(i int) string) []string {
	t.Helper()
	lines := strings.Split(strings.TrimRight(pumpsCSV(t, 0, n), "\n"), "\n")
	lines[0] = "reading," + lines[0]
	for i := 1; i < len(lines); i++ {
		lines[i] = key(i-1) + "," + lines[i]
	}
	return lines
}

func TestSummarizeKeyColumn(t *testing.T) {
	args := []string{"summarize", "-allow-incomplete", "-steps", "16", "-by", "pump_line", "-bootstrap", "64", "-format", "json"}
	summarize := func(extra ...string) string {
		t.Helper()
		code, out, errOut := cli(t, append(append([]string{}, args...), extra...)...)
		require.Equal(t, exitOK, code, errOut)
		assert.NotContains(t, errOut, "reading", "the key column is read, not ignored")
		return out
	}
	// Keys 0..59 in file order are the keys rows have without -key (their
	// places), so the summaries are the same, bit for bit.
	numbered := keyedPumps(t, 60, strconv.Itoa)
	plain := summarize("-input", writeTemp(t, "plain.csv", pumpsCSV(t, 0, 60)))
	assert.Equal(t, plain, summarize("-input", writeTemp(t, "numbered.csv", strings.Join(numbered, "\n")+"\n"), "-key", "reading"))

	// Text keys: the rows reversed and split in two parts give, merged,
	// the summary of the whole in file order, bit for bit: each row's
	// bootstrap weights follow its key, not its place.
	text := keyedPumps(t, 60, func(i int) string { return fmt.Sprintf("R-%03d", 7*i) })
	whole := summarize("-input", writeTemp(t, "whole.csv", strings.Join(text, "\n")+"\n"), "-key", "reading")
	var reversed []string
	for i := len(text) - 1; i >= 1; i-- {
		reversed = append(reversed, text[i])
	}
	dir := t.TempDir()
	var parts []string
	for k, rows := range [][]string{reversed[:23], reversed[23:]} {
		in := writeTemp(t, fmt.Sprintf("part%d.csv", k), text[0]+"\n"+strings.Join(rows, "\n")+"\n")
		p := filepath.Join(dir, fmt.Sprintf("part%d.json", k))
		summarize("-input", in, "-key", "reading", "-out", p)
		parts = append(parts, p)
	}
	code, merged, errOut := cli(t, append([]string{"summarize", "-merge", "-format", "json"}, parts...)...)
	require.Equal(t, exitOK, code, errOut)
	assert.Equal(t, whole, merged)
	assert.NotEqual(t, plain, whole, "other keys, other bootstrap weights")

	// A key that repeats stops the summary, naming both lines.
	text[9] = strings.Replace(text[9], "R-056", "R-014", 1)
	code, _, errOut = cli(t, append(args, "-input", writeTemp(t, "twice.csv", strings.Join(text, "\n")+"\n"), "-key", "reading")...)
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errOut, `key column reading: line 10 has the key "R-014" of line 4`)

	for _, tc := range []struct {
		args []string
		msg  string
	}{
		{[]string{"-key", "reading", "-first-row", "5"}, "give one of them"},
		{[]string{"-key", "serial"}, "-key serial: no such column"},
	} {
		code, _, errOut := cli(t, append([]string{"summarize"}, tc.args...)...)
		assert.Equal(t, exitUsage, code, "%v: %s", tc.args, errOut)
		assert.Contains(t, errOut, tc.msg, "%v", tc.args)
	}
}

func TestSummarizeManyGroupsWarns(t *testing.T) {
	// Grouping by a feature column (hours_since_service, nearly one value
	// per row in the demo's held-out file) makes more than 50 groups: the
	// summary is written, with a warning on standard error.
	in := writeTemp(t, "rows.csv", pumpsCSV(t, 0, 60))
	code, out, errOut := cli(t, "summarize", "-allow-incomplete", "-input", in, "-by", "hours_since_service", "-method", "grad", "-bootstrap", "10")
	require.Equal(t, exitOK, code, errOut)
	assert.Contains(t, out, "60 rows summarised")
	assert.Regexp(t, `apportion summarize: warning: grouping by hours_since_service makes \d+ groups, more than 50`, errOut)
	code, _, errOut = cli(t, "summarize", "-allow-incomplete", "-input", in, "-by", "pump_line", "-method", "grad", "-bootstrap", "10")
	require.Equal(t, exitOK, code, errOut)
	assert.NotContains(t, errOut, "warning")
}

// TestSummarizeTokens summarises the tickets demo's held-out notes per
// token string: the table ranks the planted deciding words first
// (demo/data/README.md: one deciding word decides each note), the JSON of
// the whole equals the merge of its halves, and a summary per token string
// does not merge with one per feature.
func TestSummarizeTokens(t *testing.T) {
	dir := t.TempDir()
	model := filepath.Join(dir, "tickets.onnx")
	raw, err := demo.File("tickets.onnx")
	require.NoError(t, err)
	require.NoError(t, os.WriteFile(model, raw, 0o644))
	text, err := demo.File("tickets_test.txt")
	require.NoError(t, err)
	lines := strings.SplitAfter(strings.TrimSuffix(string(text), "\n"), "\n")
	require.Len(t, lines, 600, "demo/data/README.md: 600 held-out notes")
	whole := writeTemp(t, "whole.txt", strings.Join(lines, ""))
	a := writeTemp(t, "a.txt", strings.Join(lines[:250], ""))
	b := writeTemp(t, "b.txt", strings.Join(lines[250:], ""))

	code, table, errOut := cli(t, "summarize", "-allow-incomplete", "-model", model, "-input", whole, "-by", "predicted")
	require.Equal(t, exitOK, code, errOut)
	assert.Contains(t, table, "600 rows summarised, 0 skipped; 95% Student t intervals")
	assert.Contains(t, table, "predicted = urgent (")
	assert.Contains(t, table, "tokens with smaller mean |a| not shown")
	assert.Contains(t, table, "[pad] is the padding token")
	// The first row of all rows is a deciding word of some class.
	deciding := strings.Fields("leaking smoking seized sparking flooding overheating cracked burst tripped screeching " +
		"greased lubricated tightened replaced scheduled calibrated flushed cleaned adjusted serviced " +
		"noted logged fyi observed recorded photographed reported mentioned documented forwarded")
	_, rest, ok := strings.Cut(table, "all rows (600 rows")
	require.True(t, ok)
	first := strings.Fields(strings.Split(rest, "\n")[2])[0]
	assert.Contains(t, deciding, first)

	outs := map[string]string{}
	for name, args := range map[string][]string{
		"whole": {"-input", whole},
		"a":     {"-input", a},
		"b":     {"-input", b, "-first-row", "250"},
	} {
		p := filepath.Join(dir, name+".json")
		args = append([]string{"summarize", "-allow-incomplete", "-model", model, "-by", "predicted", "-format", "json", "-out", p}, args...)
		code, _, errOut := cli(t, args...)
		require.Equal(t, exitOK, code, errOut)
		outs[name] = p
	}
	code, merged, errOut := cli(t, "summarize", "-merge", "-format", "json", outs["b"], outs["a"])
	require.Equal(t, exitOK, code, errOut)
	want, err := os.ReadFile(outs["whole"])
	require.NoError(t, err)
	assert.Equal(t, string(want), merged)

	pumps := filepath.Join(dir, "pumps.json")
	code, _, errOut = cli(t, "summarize", "-allow-incomplete", "-steps", "16", "-bootstrap", "8", "-format", "json", "-out", pumps)
	require.Equal(t, exitOK, code, errOut)
	code, _, errOut = cli(t, "summarize", "-merge", outs["a"], pumps)
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errOut, "-merge "+pumps+": it is a summary per feature, and "+outs["a"]+" is a summary per token string (of a model of token ids): a summary per token string and one per feature do not merge")

	code, _, errOut = cli(t, "summarize", "-allow-incomplete", "-model", model, "-input", a, "-format", "csv")
	assert.Equal(t, exitUsage, code)
	assert.Contains(t, errOut, "written as a table or as json, not csv")
}

func TestSummarizeCountsIncompleteRows(t *testing.T) {
	// The rows a summary counts as incomplete are those whose explanation,
	// with the same settings, fails its completeness check (Sundararajan
	// et al. 2017, §3: integrated gradients sum to f(x) − f(x′); the
	// trapezoid rule with 32 points misses it by more than 0.5% on many of
	// these rows). Without -allow-incomplete the status is 1.
	ref := filepath.Join("..", "..", "demo", "data", "pumps_reference.csv")
	model := filepath.Join("..", "..", "demo", "data", "pumps.onnx")
	input := filepath.Join("..", "..", "demo", "data", "pumps_test.csv")
	code, out, _ := cli(t, "explain", "-model", model, "-input", input, "-baseline", "mean", "-reference", ref,
		"-steps", "32", "-format", "json", "-allow-incomplete")
	require.Equal(t, exitOK, code)
	var doc struct {
		Explanations []struct {
			Completeness struct{ OK bool }
		}
	}
	require.NoError(t, json.Unmarshal([]byte(out), &doc))
	failed := 0
	for _, e := range doc.Explanations {
		if !e.Completeness.OK {
			failed++
		}
	}
	require.Len(t, doc.Explanations, 500)

	code, out, errOut := cli(t, "summarize", "-model", model, "-input", input, "-baseline", "mean", "-reference", ref,
		"-steps", "32", "-bootstrap", "8", "-format", "json")
	assert.Equal(t, exitFail, code)
	assert.Contains(t, errOut, fmt.Sprintf("%d of the 500 rows summarised failed their completeness check", failed))
	var sum struct {
		Rows       int `json:"rows"`
		Incomplete int `json:"incomplete_rows"`
	}
	require.NoError(t, json.Unmarshal([]byte(out), &sum))
	assert.Equal(t, 500, sum.Rows)
	assert.Equal(t, failed, sum.Incomplete)
	assert.Positive(t, failed)
}
