package main

import (
	"bufio"
	"bytes"
	"compress/gzip"
	"encoding/json"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/gradattr"
)

// command builds this command and returns a function that runs it with
// args, returning its exit status and standard error.
func command(t *testing.T) func(args ...string) (int, string) {
	t.Helper()
	bin := filepath.Join(t.TempDir(), "apportion-beam")
	out, err := exec.Command("go", "build", "-o", bin, ".").CombinedOutput()
	require.NoError(t, err, "%s", out)
	return func(args ...string) (int, string) {
		var stderr bytes.Buffer
		cmd := exec.Command(bin, args...)
		cmd.Stderr = &stderr
		err := cmd.Run()
		if ee, ok := err.(*exec.ExitError); ok {
			return ee.ExitCode(), stderr.String()
		}
		require.NoError(t, err)
		return 0, stderr.String()
	}
}

// pumpsFiles writes the pumps demo's model and reference set (invented
// data, demo/data/README.md) into dir and returns their paths and the
// lines of its held-out rows, the header first.
func pumpsFiles(t *testing.T, dir string) (model, ref string, lines []string) {
	t.Helper()
	s, err := demo.Get("pumps")
	require.NoError(t, err)
	model, ref = filepath.Join(dir, "pumps.onnx"), filepath.Join(dir, "ref.csv")
	require.NoError(t, os.WriteFile(model, s.Model, 0o644))
	require.NoError(t, os.WriteFile(ref, s.Reference, 0o644))
	raw, err := demo.File("pumps_test.csv")
	require.NoError(t, err)
	return model, ref, strings.Split(strings.TrimRight(string(raw), "\n"), "\n")
}

func TestCommand(t *testing.T) {
	run := command(t)
	dir := t.TempDir()
	model, ref, lines := pumpsFiles(t, dir)
	// Two files of 20 rows; line 5 of the second holds text for a number.
	lines[25] = strings.Replace(lines[25], strings.Split(lines[25], ",")[4], "low", 1)
	data := filepath.Join(dir, "rows")
	require.NoError(t, os.Mkdir(data, 0o755))
	for k, rows := range [][]string{lines[1:21], lines[21:41]} {
		p := filepath.Join(data, []string{"a.csv", "b.csv"}[k])
		require.NoError(t, os.WriteFile(p, []byte(lines[0]+"\n"+strings.Join(rows, "\n")+"\n"), 0o644))
	}
	out, dead := filepath.Join(dir, "summary.json"), filepath.Join(dir, "dead.jsonl")

	for _, tc := range []struct {
		args []string
		msg  string
	}{
		{nil, "-model, -input, -output required"},
		{[]string{"-model", model, "-input", filepath.Join(data, "*.csv"), "-output", out, "-noise", "0.1"}, "-noise applies to -method smoothgrad only"},
		{[]string{"-model", model, "-input", filepath.Join(data, "*.csv"), "-output", out, "-baseline", "mean"}, "-baseline mean needs -reference"},
		{[]string{"-model", model, "-input", filepath.Join(data, "*.txt"), "-output", out}, "no file matches"},
		{[]string{"-model", model, "-input", filepath.Join(data, "*.csv"), "-output", out, "-bootstrap", "0"}, "-bootstrap must be from 1"},
	} {
		code, stderr := run(tc.args...)
		assert.Equal(t, exitUsage, code, "%v: %s", tc.args, stderr)
		assert.Contains(t, stderr, tc.msg, "%v", tc.args)
	}

	code, stderr := run("-model", model, "-input", filepath.Join(data, "*.csv"), "-by", "pump_line",
		"-reference", ref, "-baseline", "mean", "-steps", "16", "-bootstrap", "30", "-output", out, "-dead-letter", dead)
	assert.Equal(t, exitFail, code, "a skipped row makes the status 1: %s", stderr)
	assert.Contains(t, stderr, "apportion-beam: 39 rows summarised, 1 skipped")
	doc, err := os.ReadFile(out)
	require.NoError(t, err)
	sum, err := gradattr.DecodeSummary(bytes.NewReader(doc))
	require.NoError(t, err)
	assert.Equal(t, 39, sum.Rows())
	f, err := os.Open(dead)
	require.NoError(t, err)
	defer f.Close()
	sc := bufio.NewScanner(f)
	require.True(t, sc.Scan())
	var failed map[string]any
	require.NoError(t, json.Unmarshal(sc.Bytes(), &failed))
	assert.Equal(t, filepath.Join(data, "b.csv"), failed["file"])
	assert.Equal(t, "line 6", failed["where"], "data row 5 of b.csv: the header is line 1")
	assert.Equal(t, `column flow: "low" is not a number`, failed["error"])
	assert.False(t, sc.Scan(), "one row failed")
}

// TestCommandEqualsSummarize runs the command on 60 keyed rows of the
// pumps demo (invented data) dealt into three files, one gzipped, with a
// row that cannot be read: its summary is byte for byte the one apportion
// summarize -key writes for the whole file with the same settings, and
// both exit with status 1 for the skipped row.
func TestCommandEqualsSummarize(t *testing.T) {
	run := command(t)
	dir := t.TempDir()
	apportion := filepath.Join(dir, "apportion")
	out, err := exec.Command("go", "build", "-o", apportion, "github.com/apportion/apportion/cmd/apportion").CombinedOutput()
	require.NoError(t, err, "%s", out)

	model, ref, lines := pumpsFiles(t, dir)
	header := "reading," + lines[0]
	var rows []string
	for i, l := range lines[1:61] {
		rows = append(rows, fmt.Sprintf("P-%03d,%s", 3*i, l))
	}
	rows[17] = strings.Replace(rows[17], ",", ",n/a,", 1) // one field too many
	whole := filepath.Join(dir, "whole.csv")
	require.NoError(t, os.WriteFile(whole, []byte(header+"\n"+strings.Join(rows, "\n")+"\n"), 0o644))
	data := filepath.Join(dir, "rows")
	require.NoError(t, os.Mkdir(data, 0o755))
	for k, name := range []string{"part-0.csv", "part-1.csv.gz", "part-2.csv"} {
		var part []string
		for i := k; i < len(rows); i += 3 {
			part = append(part, rows[i])
		}
		text := []byte(header + "\n" + strings.Join(part, "\n") + "\n")
		if strings.HasSuffix(name, ".gz") {
			var b bytes.Buffer
			zw := gzip.NewWriter(&b)
			_, err := zw.Write(text)
			require.NoError(t, err)
			require.NoError(t, zw.Close())
			text = b.Bytes()
		}
		require.NoError(t, os.WriteFile(filepath.Join(data, name), text, 0o644))
	}

	settings := []string{"-model", model, "-by", "pump_line", "-key", "reading", "-reference", ref,
		"-baseline", "mean", "-steps", "16", "-bootstrap", "30", "-seed", "5"}
	var want, stderr bytes.Buffer
	cmd := exec.Command(apportion, append([]string{"summarize", "-format", "json", "-input", whole}, settings...)...)
	cmd.Stdout, cmd.Stderr = &want, &stderr
	var ee *exec.ExitError
	require.ErrorAs(t, cmd.Run(), &ee, stderr.String())
	require.Equal(t, 1, ee.ExitCode(), stderr.String())

	summary, dead := filepath.Join(dir, "summary.json"), filepath.Join(dir, "dead.jsonl")
	code, errOut := run(append(settings, "-input", filepath.Join(data, "part-*"), "-output", summary, "-dead-letter", dead)...)
	assert.Equal(t, exitFail, code, errOut)
	assert.Contains(t, errOut, "apportion-beam: 59 rows summarised, 1 skipped")
	got, err := os.ReadFile(summary)
	require.NoError(t, err)
	assert.Equal(t, want.String(), string(got))
	failed, err := os.ReadFile(dead)
	require.NoError(t, err)
	var f map[string]any
	require.NoError(t, json.Unmarshal(failed, &f))
	assert.Equal(t, filepath.Join(data, "part-2.csv"), f["file"], "data row 17 is the 6th of part 2")
	assert.Equal(t, "line 7", f["where"])
	assert.Equal(t, "expected 11 fields, as in the header, got 12", f["error"])
}
