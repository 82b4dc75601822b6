package summarize

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"sort"
	"strings"
	"sync"
	"testing"

	"github.com/apache/beam/sdks/v2/go/pkg/beam"
	_ "github.com/apache/beam/sdks/v2/go/pkg/beam/io/filesystem/local"
	_ "github.com/apache/beam/sdks/v2/go/pkg/beam/runners/prism"
	"github.com/apache/beam/sdks/v2/go/pkg/beam/testing/ptest"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/internal/onnxtestdata"
	"github.com/apportion/apportion/internal/testfiles"
	"github.com/apportion/apportion/samples"
)

// The pipelines run on Beam's prism runner, in this process (loopback).
func TestMain(m *testing.M) { ptest.MainWithDefault(m, "prism") }

// cli returns the path of the apportion command line, built once from
// this workspace.
var cli = sync.OnceValues(func() (string, error) {
	dir, err := os.MkdirTemp("", "apportion-cli")
	if err != nil {
		return "", err
	}
	bin := filepath.Join(dir, "apportion")
	out, err := exec.Command("go", "build", "-o", bin, "github.com/apportion/apportion/cmd/apportion").CombinedOutput()
	if err != nil {
		return "", fmt.Errorf("building apportion: %v\n%s", err, out)
	}
	return bin, nil
})

// summarizeCLI runs apportion summarize with args and returns its JSON
// document and exit status.
func summarizeCLI(t *testing.T, args ...string) (string, int) {
	t.Helper()
	bin, err := cli()
	require.NoError(t, err)
	var stdout, stderr bytes.Buffer
	cmd := exec.Command(bin, append([]string{"summarize", "-format", "json", "-allow-incomplete"}, args...)...)
	cmd.Stdout, cmd.Stderr = &stdout, &stderr
	err = cmd.Run()
	code := 0
	if ee, ok := err.(*exec.ExitError); ok {
		code = ee.ExitCode()
	} else {
		require.NoError(t, err)
	}
	require.NotEmpty(t, stdout.String(), stderr.String())
	return stdout.String(), code
}

// pumps writes the demo's held-out rows (invented data, demo/data/README.md)
// with a key column in front, "R-0000", "R-0007", ...: the whole file and
// the rows dealt round-robin into parts files, each with the header.
// edit may change a data row's line (i counts data rows).
func pumps(t *testing.T, parts int, edit func(i int, line string) string) (whole string, glob string) {
	t.Helper()
	raw, err := demo.File("pumps_test.csv")
	require.NoError(t, err)
	lines := strings.Split(strings.TrimRight(string(raw), "\n"), "\n")
	require.Len(t, lines, 501, "README: 500 held-out rows and a header")
	header := "reading," + lines[0]
	var rows []string
	for i, l := range lines[1:] {
		rows = append(rows, edit(i, fmt.Sprintf("R-%04d,%s", 7*i, l)))
	}
	dir := t.TempDir()
	whole = filepath.Join(dir, "whole.csv")
	require.NoError(t, os.WriteFile(whole, []byte(header+"\n"+strings.Join(rows, "\n")+"\n"), 0o644))
	require.NoError(t, os.Mkdir(filepath.Join(dir, "parts"), 0o755))
	for k := range parts {
		var part []string
		for i := k; i < len(rows); i += parts {
			part = append(part, rows[i])
		}
		p := filepath.Join(dir, "parts", fmt.Sprintf("part-%d.csv", k))
		require.NoError(t, os.WriteFile(p, []byte(header+"\n"+strings.Join(part, "\n")+"\n"), 0o644))
	}
	return whole, filepath.Join(dir, "parts", "part-*.csv")
}

// pumpsConfig is the demo's summary (integrated gradients against the
// mean of the reference set) by pump_line, with the given settings.
func pumpsConfig(t *testing.T, key string, settings ...Setting) (Config, []string) {
	t.Helper()
	s, err := demo.Get("pumps")
	require.NoError(t, err)
	cfg := Config{
		Model: s.Model, ModelName: "pumps.onnx", By: "pump_line", Key: key, Seed: gradattr.DefaultSeed,
		Settings:  append([]Setting{{explain.FieldBaseline, "mean"}, {explain.FieldReference, "reference.csv"}}, settings...),
		Reference: &File{Name: "reference.csv", Data: s.Reference},
	}
	dir := t.TempDir()
	model, ref := filepath.Join(dir, "pumps.onnx"), filepath.Join(dir, "reference.csv")
	require.NoError(t, os.WriteFile(model, s.Model, 0o644))
	require.NoError(t, os.WriteFile(ref, s.Reference, 0o644))
	args := []string{"-model", model, "-reference", ref, "-baseline", "mean", "-by", "pump_line"}
	if key != "" {
		args = append(args, "-key", key)
	}
	for _, st := range settings {
		args = append(args, "-"+string(st.Field), st.Text)
	}
	return cfg, args
}

// plan plans cfg with the first file that matches glob.
func plan(t *testing.T, cfg Config, glob string) *Plan {
	t.Helper()
	files, err := filepath.Glob(glob)
	require.NoError(t, err)
	require.NotEmpty(t, files)
	sort.Strings(files)
	f, err := os.Open(files[0])
	require.NoError(t, err)
	defer f.Close()
	p, err := NewPlan(cfg, f, files[0])
	require.NoError(t, err)
	return p
}

// run summarises the files that match glob on prism and returns the
// summary document, the dead letter (JSON lines, sorted) and the
// pipeline's counters.
func run(t *testing.T, p *Plan, glob string) (doc string, failed []Failed, counters map[string]int64) {
	t.Helper()
	dir := t.TempDir()
	out, dead := filepath.Join(dir, "summary.json"), filepath.Join(dir, "dead.jsonl")
	pipe, s := beam.NewPipelineWithRoot()
	summary, bad := Files(s, p, glob)
	Write(s, out, summary)
	WriteFailed(s, dead, bad)
	res, err := ptest.RunWithMetrics(pipe)
	require.NoError(t, err)
	raw, err := os.ReadFile(out)
	require.NoError(t, err)
	return string(raw), readFailed(t, dead), counterValues(res)
}

// readFailed reads the dead letter; with no rows failed, Beam writes no
// file.
func readFailed(t *testing.T, path string) []Failed {
	t.Helper()
	f, err := os.Open(path)
	if os.IsNotExist(err) {
		return nil
	}
	require.NoError(t, err)
	defer f.Close()
	var out []Failed
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		var r Failed
		require.NoError(t, json.Unmarshal(sc.Bytes(), &r), sc.Text())
		out = append(out, r)
	}
	require.NoError(t, sc.Err())
	sort.Slice(out, func(i, j int) bool { return out[i].Key < out[j].Key })
	return out
}

func counterValues(res beam.PipelineResult) map[string]int64 {
	out := map[string]int64{}
	for _, c := range res.Metrics().AllMetrics().Counters() {
		if c.Namespace() == "apportion" {
			out[c.Name()] += c.Result()
		}
	}
	return out
}

// TestPipelineEqualsSummarize runs the pumps demo's 500 rows, with a key
// column and split into 8 files, through the pipeline: the summary is
// byte for byte the one apportion summarize -key writes for the whole
// file with the same settings and seed.
func TestPipelineEqualsSummarize(t *testing.T) {
	whole, glob := pumps(t, 8, func(_ int, l string) string { return l })
	// 16 trapezoid points: too few for some rows' completeness check,
	// which the pipeline counts as the command does.
	cfg, args := pumpsConfig(t, "reading", Setting{explain.FieldSteps, "16"})
	want, code := summarizeCLI(t, append(args, "-input", whole)...)
	require.Equal(t, 0, code)
	var counts struct {
		Incomplete int `json:"incomplete_rows"`
	}
	require.NoError(t, json.Unmarshal([]byte(want), &counts))
	assert.Positive(t, counts.Incomplete)

	got, failed, counters := run(t, plan(t, cfg, glob), glob)
	assert.Equal(t, want, got)
	assert.Empty(t, failed)
	assert.Equal(t, map[string]int64{"rows_explained": 500}, counters)
	s, err := gradattr.DecodeSummary(strings.NewReader(got))
	require.NoError(t, err)
	assert.Equal(t, 500, s.Rows())
}

// TestPipelineBadRows mixes rows that cannot be read into the files: the
// dead letter holds exactly them, with their keys, files and lines; the
// summary counts them as skipped, and is still apportion summarize's.
// Without a key column, rows are keyed by file name and line.
func TestPipelineBadRows(t *testing.T) {
	bad := map[int]string{ // data row → the error samples gives it
		3:   "column vibration_rms: NaN value is not a finite number",
		41:  `column bearing_temp: "warm" is not a number`,
		42:  "expected 11 fields, as in the header, got 4",
		499: `column flow: "" is not a number`,
	}
	edit := func(i int, l string) string {
		f := strings.Split(l, ",")
		switch i {
		case 3:
			f[2] = "NaN"
		case 41:
			f[1] = "warm"
		case 42:
			f = f[:4]
		case 499:
			f[5] = ""
		}
		return strings.Join(f, ",")
	}
	whole, glob := pumps(t, 8, edit)
	cfg, args := pumpsConfig(t, "reading", Setting{explain.FieldSteps, "32"})
	want, code := summarizeCLI(t, append(args, "-input", whole)...)
	require.Equal(t, 1, code, "skipped rows make the status 1")

	got, failed, counters := run(t, plan(t, cfg, glob), glob)
	assert.Equal(t, want, got)
	assert.Equal(t, map[string]int64{"rows_explained": 496, "rows_skipped": 4}, counters)
	// Row i is line i/8 + 2 of part i%8 (a header, then every 8th row).
	var expect []Failed
	for i, msg := range bad {
		expect = append(expect, Failed{
			Key:   samples.RowKey(fmt.Sprintf("R-%04d", 7*i)),
			File:  strings.Replace(glob, "*", fmt.Sprint(i%8), 1),
			Where: fmt.Sprintf("line %d", i/8+2), Error: msg,
		})
		if i != 42 { // a short row has no group field
			expect[len(expect)-1].Group = lineGroup(t, whole, i)
		}
	}
	sort.Slice(expect, func(i, j int) bool { return expect[i].Key < expect[j].Key })
	assert.Equal(t, expect, failed)
	s, err := gradattr.DecodeSummary(strings.NewReader(got))
	require.NoError(t, err)
	assert.Equal(t, 496, s.Rows())
	assert.Equal(t, 4, s.SkippedRows())

	// Without -key: the keys of file and line.
	cfg.Key = ""
	got, failed, _ = run(t, plan(t, cfg, glob), glob)
	require.Len(t, failed, 4)
	var keys []uint64
	for i, f := range failed {
		assert.Equal(t, samples.PlaceKey(f.File, f.Where), f.Key, "row %d", i)
		keys = append(keys, f.Key)
	}
	s, err = gradattr.DecodeSummary(strings.NewReader(got))
	require.NoError(t, err)
	var skipped []uint64
	for _, r := range s.Skipped() {
		skipped = append(skipped, r.Key)
	}
	assert.ElementsMatch(t, keys, skipped)
}

// lineGroup returns the pump_line of data row i of the file.
func lineGroup(t *testing.T, path string, i int) string {
	t.Helper()
	raw, err := os.ReadFile(path)
	require.NoError(t, err)
	f := strings.Split(strings.Split(string(raw), "\n")[i+1], ",")
	require.Len(t, f, 11)
	return f[9]
}

// TestWorkerSetupOnce runs 200 rows in batches of 4 and counts the models
// compiled: one in this process, the one worker of prism's loopback
// environment, however many DoFn instances were set up and batches run.
func TestWorkerSetupOnce(t *testing.T) {
	_, glob := pumps(t, 5, func(_ int, l string) string { return l })
	cfg, _ := pumpsConfig(t, "reading", Setting{explain.FieldSteps, "8"})
	cfg.Batch = 4
	p := plan(t, cfg, glob)
	require.Equal(t, 0, compiles.get(p.ID), "NewPlan compiles for its own checks, not the workers'")
	_, failed, counters := run(t, p, glob)
	assert.Empty(t, failed)
	assert.Equal(t, int64(500), counters["rows_explained"])
	assert.Equal(t, 1, compiles.get(p.ID), "compiled once per worker")
	setups.Lock()
	n := setups.n[p.ID]
	setups.Unlock()
	assert.GreaterOrEqual(t, n, 1)
	t.Logf("%d DoFn instances set up, 1 model compiled, 500 rows in batches of 4", n)
}

// TestPipelineMergesWithSummarize summarises half the files on the
// pipeline and the other half with apportion summarize -key: merged,
// they are the summary of the whole, bit for bit.
func TestPipelineMergesWithSummarize(t *testing.T) {
	whole, glob := pumps(t, 2, func(_ int, l string) string { return l })
	cfg, args := pumpsConfig(t, "reading", Setting{explain.FieldSteps, "16"})
	want, _ := summarizeCLI(t, append(args, "-input", whole)...)
	first := strings.Replace(glob, "*", "0", 1)
	got, _, _ := run(t, plan(t, cfg, glob), first)
	other, _ := summarizeCLI(t, append(args, "-input", strings.Replace(glob, "*", "1", 1))...)
	a, err := gradattr.DecodeSummary(strings.NewReader(got))
	require.NoError(t, err)
	b, err := gradattr.DecodeSummary(strings.NewReader(other))
	require.NoError(t, err)
	require.NoError(t, a.Merge(b))
	merged, err := a.MarshalJSON()
	require.NoError(t, err)
	assert.Equal(t, want, string(merged)+"\n")
}

// TestSummarizeTypedRows summarises typed rows of the ONNX backend node
// case test_softmax_example (y = Softmax(x), x of shape [1, 3]; ONNX
// backend test data 1.12.0) with gradient × input, grouped by the
// predicted class. For the top output t, ∂y_t/∂x_i = y_t(δ_ti − y_i)
// (closed form of the softmax Jacobian), so a_i = x_i y_t (δ_ti − y_i),
// and each group's mean is the mean of those.
func TestSummarizeTypedRows(t *testing.T) {
	dir := filepath.Join(onnxtestdata.Dir(t), "node", "test_softmax_example")
	model, err := os.ReadFile(filepath.Join(dir, "model.onnx"))
	require.NoError(t, err)
	in, _ := onnxtestdata.SetFiles(filepath.Join(dir, "test_data_set_0"))
	_, x := testfiles.ReadPB(t, in[0])
	require.Len(t, x, 3)
	cfg := Config{Model: model, ModelName: "softmax.onnx", By: ByPredicted, Bootstrap: 20, Batch: 3,
		Settings: []Setting{{explain.FieldMethod, "grad-input"}}}
	p, err := NewPlan(cfg, nil, "")
	require.NoError(t, err)

	var rows []Row
	for i := range 40 {
		v := []float64{x[0] * float64(i%5), x[1] - float64(i%3), x[2] + 0.1*float64(i)}
		rows = append(rows, Row{Key: uint64(i), Where: fmt.Sprint("row ", i), Values: v})
	}
	rows = append(rows, Row{Key: 40, Where: "row 40", Error: "unreadable"})
	pipe, s := beam.NewPipelineWithRoot()
	summary, failed := Summarize(s, p, beam.CreateList(s, rows))
	out := filepath.Join(t.TempDir(), "s.json")
	Write(s, out, summary)
	deadPath := filepath.Join(t.TempDir(), "dead.jsonl")
	WriteFailed(s, deadPath, failed)
	_, err = ptest.RunWithMetrics(pipe)
	require.NoError(t, err)
	assert.Equal(t, []Failed{{Key: 40, Where: "row 40", Error: "unreadable"}}, readFailed(t, deadPath))

	raw, err := os.ReadFile(out)
	require.NoError(t, err)
	sum, err := gradattr.DecodeSummary(bytes.NewReader(raw))
	require.NoError(t, err)
	assert.Equal(t, 40, sum.Rows())
	assert.Equal(t, []string{"0", "1", "2"}, sum.Options().Features, "features named by index without metadata")
	want := map[string][]float64{}
	count := map[string]float64{}
	for _, r := range rows[:40] {
		y := softmax(r.Values)
		top := 0
		for k := range y {
			if y[k] > y[top] {
				top = k
			}
		}
		g := fmt.Sprint(top) // no class names in the metadata: the index
		if want[g] == nil {
			want[g] = make([]float64, 3)
		}
		for k := range y {
			d := 0.0
			if k == top {
				d = 1
			}
			want[g][k] += r.Values[k] * y[top] * (d - y[k])
		}
		count[g]++
	}
	groups := sum.Groups()
	require.Len(t, groups, len(want))
	for _, g := range groups {
		assert.Equal(t, int(count[g.Name]), g.Rows)
		for k, f := range g.Features {
			w := want[g.Name][k] / count[g.Name]
			// float32 model: rtol 1e-3, atol 1e-7 (the backend node tests').
			assert.InDelta(t, w, f.Mean, 1e-7+1e-3*math.Abs(w), "group %s feature %d", g.Name, k)
		}
	}
}

// softmax is y_i = e^{x_i} / Σ_j e^{x_j} (closed form).
func softmax(x []float64) []float64 {
	m := math.Inf(-1)
	for _, v := range x {
		m = math.Max(m, v)
	}
	y := make([]float64, len(x))
	s := 0.0
	for i, v := range x {
		y[i] = math.Exp(v - m)
		s += y[i]
	}
	for i := range y {
		y[i] /= s
	}
	return y
}

// TestRepeatedKeyStopsPipeline puts one key on rows of two files: the
// pipeline stops, naming the key.
func TestRepeatedKeyStopsPipeline(t *testing.T) {
	_, glob := pumps(t, 2, func(i int, l string) string {
		if i == 3 {
			return strings.Replace(l, "R-0021", "R-0000", 1) // data row 0 is in the other file
		}
		return l
	})
	cfg, _ := pumpsConfig(t, "reading", Setting{explain.FieldSteps, "4"})
	pipe, s := beam.NewPipelineWithRoot()
	summary, _ := Files(s, plan(t, cfg, glob), glob)
	Write(s, filepath.Join(t.TempDir(), "s.json"), summary)
	_, err := ptest.RunWithMetrics(pipe)
	require.Error(t, err)
	assert.Contains(t, err.Error(), fmt.Sprintf("row key %d", samples.RowKey("R-0000")))
}

func TestNewPlanErrors(t *testing.T) {
	_, glob := pumps(t, 1, func(_ int, l string) string { return l })
	cfg, _ := pumpsConfig(t, "reading")
	for _, tc := range []struct {
		edit func(*Config)
		msg  string
	}{
		{func(c *Config) { c.Settings = []Setting{{explain.FieldBaseline, "mean"}}; c.Reference = nil }, "baseline mean needs reference"},
		{func(c *Config) { c.Key = "serial" }, `no column "serial"`},
		{func(c *Config) { c.By = "colour" }, `no column "colour"`},
		{func(c *Config) { c.Settings = append(c.Settings, Setting{explain.FieldNoise, "0.2"}) }, "noise applies to method smoothgrad only"},
		{func(c *Config) { c.Model = []byte("not a model") }, "reading model pumps.onnx"},
	} {
		c := cfg
		tc.edit(&c)
		f, err := os.Open(strings.Replace(glob, "*", "0", 1))
		require.NoError(t, err)
		_, err = NewPlan(c, f, "part-0.csv")
		f.Close()
		assert.ErrorContains(t, err, tc.msg)
	}
}
