package main

import (
	"bufio"
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"testing"

	"golang.org/x/sys/cpu"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestGoldenResults runs every case of testdata/golden/cases.txt and compares
// the numbers with the output recorded before the package layout changed
// (testdata/golden/README.md says how): for explain, every key the recorded
// explanation and model records carry, byte for byte after compacting the
// JSON; for predict, the outputs. Settings and method names are not compared,
// since the vocabulary they are written in may change; keys added later are
// not compared either. The reference is the program's own earlier output:
// this test guards refactoring, it does not check correctness.
func TestGoldenResults(t *testing.T) {
	skipUnlessRecordedKernels(t, "the golden results were")
	dir, err := filepath.Abs("../../testdata/golden")
	require.NoError(t, err)
	f, err := os.Open(filepath.Join(dir, "cases.txt"))
	require.NoError(t, err)
	defer f.Close()
	sc := bufio.NewScanner(f)
	cases := 0
	for sc.Scan() {
		line := strings.TrimSpace(sc.Text())
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		fields := strings.Fields(line)
		name, args := fields[0], fields[1:]
		for i, a := range args {
			if strings.HasSuffix(a, ".onnx") || strings.HasPrefix(a, "inputs/") {
				args[i] = filepath.Join(dir, a)
			}
		}
		cases++
		t.Run(name, func(t *testing.T) {
			want, err := os.ReadFile(filepath.Join(dir, "expected", name+".json"))
			require.NoError(t, err)
			var out, errb bytes.Buffer
			run(args, strings.NewReader(""), &out, &errb)
			require.NotEmpty(t, out.Bytes(), "stderr: %s", errb.String())
			if args[0] == "predict" {
				compareKeys(t, want, out.Bytes(), "outputs")
				return
			}
			compareKeys(t, want, out.Bytes(), "model", "explanations")
		})
	}
	require.NoError(t, sc.Err())
	require.Equal(t, 39, cases, "cases in cases.txt")
}

// skipUnlessRecordedKernels skips a test whose expected output, what, was
// recorded on the AVX2/FMA kernels, when they do not run here: the portable
// kernels round differently.
func skipUnlessRecordedKernels(t *testing.T, what string) {
	t.Helper()
	if goldenPortable || runtime.GOARCH != "amd64" || !cpu.X86.HasAVX2 || !cpu.X86.HasFMA {
		t.Skip(what + " recorded on the AVX2/FMA kernels; the portable kernels round differently")
	}
}

// compareKeys compares the values of the given top-level keys of two JSON
// documents. Objects are compared on the keys of want only; arrays element by
// element; everything else as compacted bytes.
func compareKeys(t *testing.T, want, got []byte, keys ...string) {
	t.Helper()
	var w, g map[string]json.RawMessage
	require.NoError(t, json.Unmarshal(want, &w))
	require.NoError(t, json.Unmarshal(got, &g))
	for _, k := range keys {
		require.Contains(t, w, k)
		require.Contains(t, g, k, "output lacks key %q", k)
		compareValue(t, k, w[k], g[k])
	}
}

func compareValue(t *testing.T, path string, want, got json.RawMessage) {
	t.Helper()
	want, got = bytes.TrimSpace(want), bytes.TrimSpace(got)
	switch {
	case len(want) > 0 && want[0] == '{':
		var w, g map[string]json.RawMessage
		require.NoError(t, json.Unmarshal(want, &w), path)
		require.NoError(t, json.Unmarshal(got, &g), path)
		for k := range w {
			if k == "path" {
				continue // the model's path is this machine's
			}
			if !assert.Contains(t, g, k, "%s: output lacks key %q", path, k) {
				continue
			}
			compareValue(t, path+"."+k, w[k], g[k])
		}
	case len(want) > 0 && want[0] == '[' && bytes.ContainsAny(want, "{"):
		var w, g []json.RawMessage
		require.NoError(t, json.Unmarshal(want, &w), path)
		require.NoError(t, json.Unmarshal(got, &g), path)
		require.Len(t, g, len(w), path)
		for i := range w {
			compareValue(t, path+"["+itoa(i)+"]", w[i], g[i])
		}
	default:
		var cw, cg bytes.Buffer
		require.NoError(t, json.Compact(&cw, want), path)
		require.NoError(t, json.Compact(&cg, got), path)
		assert.Equal(t, cw.String(), cg.String(), "%s differs", path)
	}
}

func itoa(i int) string {
	b, _ := json.Marshal(i)
	return string(b)
}
