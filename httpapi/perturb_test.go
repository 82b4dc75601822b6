package httpapi

import (
	"encoding/json"
	"net/http"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestServeShapleyAndOcclusion(t *testing.T) {
	// The methods that switch features on and off, over HTTP with the same
	// settings as the command line, in snake case. Shapley values are
	// efficient: they sum to f(x) minus the mean output over the server's
	// reference rows (Shapley 1953), which "baseline_outputs" reports.
	_, ts, _ := testServer(t, nil)
	sample := strings.TrimSpace(demoSampleJSON(t))
	code, _, body := post(t, ts.URL+"/v1/explain",
		`{"inputs":[`+sample+`],"method":"shapley","reference_rows":20,"estimator":"permutation","coalitions":56,"seed":3}`)
	require.Equal(t, http.StatusOK, code, body)
	var doc struct {
		Method       string         `json:"method"`
		Settings     map[string]any `json:"settings"`
		Explanations []struct {
			Target          int       `json:"target"`
			Outputs         []float64 `json:"outputs"`
			Attributions    []float64 `json:"attributions"`
			BaselineOutputs []float64 `json:"baseline_outputs"`
			StandardErrors  []float64 `json:"standard_errors"`
			Estimator       string    `json:"estimator"`
			Completeness    struct {
				Sum, Expected float64
				Judged, OK    bool
			} `json:"completeness"`
		} `json:"explanations"`
	}
	require.NoError(t, json.Unmarshal([]byte(body), &doc))
	assert.Equal(t, "shapley", doc.Method)
	assert.Equal(t, 20.0, doc.Settings["reference_rows"])
	assert.Equal(t, 56.0, doc.Settings["coalitions"])
	assert.Equal(t, "demo:pumps_reference.csv", doc.Settings["reference"])
	e := doc.Explanations[0]
	assert.Equal(t, "permutation", e.Estimator)
	assert.Len(t, e.StandardErrors, 8)
	assert.True(t, e.Completeness.Judged && e.Completeness.OK)
	assert.InDelta(t, e.Outputs[e.Target]-e.BaselineOutputs[e.Target], e.Completeness.Expected, 1e-12)
	assert.InDelta(t, e.Completeness.Expected, sum(e.Attributions), 1e-9)

	code, _, body = post(t, ts.URL+"/v1/explain", `{"inputs":[`+sample+`],"method":"occlusion","baseline":"mean"}`)
	require.Equal(t, http.StatusOK, code, body)

	for _, c := range []struct{ body, says string }{
		{`"method":"shapley","reference_rows":0`, `"reference_rows" must be a whole number from 1 to`},
		{`"method":"shapley","window":"2x2"`, `"window" applies to "method" occlusion only, not shapley`},
		{`"method":"surrogate","kernel_width":-1`, `"kernel_width" must be a positive number`},
		{`"superpixels":4`, `"superpixels" needs samples with at least two axes`},
		{`"method":"occlusion","window":"4"`, `"window": expected a size HxW in pixels`},
	} {
		code, _, body := post(t, ts.URL+"/v1/explain", `{"inputs":[`+sample+`],`+c.body+`}`)
		assert.Equal(t, http.StatusBadRequest, code, c.body)
		assert.Contains(t, errorOf(t, body), c.says, c.body)
	}
}
