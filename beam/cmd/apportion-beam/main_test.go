package main

import (
	"bufio"
	"bytes"
	"encoding/json"
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

func TestCommand(t *testing.T) {
	run := command(t)
	s, err := demo.Get("pumps")
	require.NoError(t, err)
	dir := t.TempDir()
	model, ref := filepath.Join(dir, "pumps.onnx"), filepath.Join(dir, "ref.csv")
	require.NoError(t, os.WriteFile(model, s.Model, 0o644))
	require.NoError(t, os.WriteFile(ref, s.Reference, 0o644))
	raw, err := demo.File("pumps_test.csv")
	require.NoError(t, err)
	lines := strings.Split(strings.TrimRight(string(raw), "\n"), "\n")
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
