package main

import (
	"encoding/json"
	"math"
	"net/http"
	"os"
	"regexp"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestReadmeFirstCommand checks that the README shows what its first command
// prints today, the run's duration aside.
func TestReadmeFirstCommand(t *testing.T) {
	skipUnlessRecordedKernels(t, "the README's output was")
	raw, err := os.ReadFile("../../README.md")
	require.NoError(t, err)
	const start = "```text\n$ go run ./cmd/apportion explain\n"
	readme := string(raw)
	i := strings.Index(readme, start)
	require.GreaterOrEqual(t, i, 0, "the README shows the first command's output")
	block := readme[i+len(start):]
	block = block[:strings.Index(block, "```")]
	code, out, errs := cli(t, "explain")
	require.Equal(t, exitOK, code, errs)
	elapsed := regexp.MustCompile(`(cost: .*, )[0-9.]+(µs|ms|s)\n`)
	assert.Equal(t, elapsed.ReplaceAllString(block, "${1}…\n"), elapsed.ReplaceAllString(out, "${1}…\n"))
}

// TestReadmeCurl posts the README's curl example to the serve command's
// handler: the answer passes its own completeness check (Sundararajan et
// al. 2017, completeness: the attributions sum to f(x) − f(x′), read off
// the document's own outputs).
func TestReadmeCurl(t *testing.T) {
	raw, err := os.ReadFile("../../README.md")
	require.NoError(t, err)
	m := regexp.MustCompile(`curl -s -d '([^']*)' 127\.0\.0\.1:8080(/v1/explain)`).FindStringSubmatch(string(raw))
	require.NotNil(t, m, "the README has a curl example of /v1/explain")
	ts := testServer(t, nil)
	code, _, body := post(t, ts.URL+m[2], m[1])
	require.Equal(t, http.StatusOK, code, body)
	var doc explainDoc
	require.NoError(t, json.Unmarshal([]byte(body), &doc))
	require.Len(t, doc.Explanations, 1)
	e := doc.Explanations[0]
	require.NotNil(t, e.Completeness)
	assert.True(t, e.Completeness.OK, "relative gap %v", e.Completeness.RelativeGap)
	delta := e.Outputs[*e.Target] - e.BaselineOutputs[*e.Target]
	assert.InDelta(t, delta, sum(e.Attributions), e.Completeness.Tolerance*math.Abs(delta))
}
