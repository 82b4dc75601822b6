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

func TestServeOcclusionAndSurrogateAgainstPredict(t *testing.T) {
	// Occlusion of tabular features, one at a time, is by definition
	// f(x) − f(x with feature i at the baseline) (Zeiler & Fergus 2014):
	// checked against the server's own predictions of the occluded rows.
	// The surrogate's document carries its fit (Ribeiro et al. 2016: the
	// weighted R² lies in [0, 1]) and answers the same bits for the same
	// seed.
	_, ts, _ := testServer(t, nil)
	var x []float64
	require.NoError(t, json.Unmarshal([]byte(demoSampleJSON(t)), &x))
	code, _, body := post(t, ts.URL+"/v1/explain", `{"inputs":[`+floatsJSON(x)+`],"method":"occlusion","baseline":"zero"}`)
	require.Equal(t, http.StatusOK, code, body)
	var doc explainDoc
	require.NoError(t, json.Unmarshal([]byte(body), &doc))
	e := doc.Explanations[0]
	require.NotNil(t, e.Target)

	rows := [][]float64{x}
	for i := range x {
		r := append([]float64(nil), x...)
		r[i] = 0
		rows = append(rows, r)
	}
	in, err := json.Marshal(map[string]any{"inputs": rows})
	require.NoError(t, err)
	code, _, body = post(t, ts.URL+"/v1/predict", string(in))
	require.Equal(t, http.StatusOK, code, body)
	var pred struct {
		Outputs []struct {
			Name  string    `json:"name"`
			Shape []int     `json:"shape"`
			Data  []float64 `json:"data"`
		} `json:"outputs"`
	}
	require.NoError(t, json.Unmarshal([]byte(body), &pred))
	var f func(row int) float64
	for _, o := range pred.Outputs {
		if len(o.Shape) == 2 && o.Shape[1] == len(e.Outputs) && float32(o.Data[*e.Target]) == float32(e.Outputs[*e.Target]) {
			f = func(row int) float64 { return o.Data[row*o.Shape[1]+*e.Target] }
		}
	}
	require.NotNil(t, f, "the explained output among the predictions")
	require.Len(t, e.Attributions, len(x))
	for i := range x {
		// The predictions are float32 (the model's precision), written
		// to the shortest decimal that reads back the same.
		assert.InDelta(t, f(0)-f(i+1), e.Attributions[i], 1e-6, "feature %d", i)
	}

	req := `{"inputs":[` + floatsJSON(x) + `],"method":"surrogate","coalitions":300,"seed":5}`
	code, _, first := post(t, ts.URL+"/v1/explain", req)
	require.Equal(t, http.StatusOK, code, first)
	var fit struct {
		Explanations []struct {
			Attributions []float64 `json:"attributions"`
			Fidelity     *float64  `json:"fidelity"`
			Intercept    *float64  `json:"intercept"`
		} `json:"explanations"`
	}
	require.NoError(t, json.Unmarshal([]byte(first), &fit))
	s := fit.Explanations[0]
	require.NotNil(t, s.Fidelity)
	require.NotNil(t, s.Intercept)
	assert.GreaterOrEqual(t, *s.Fidelity, 0.0)
	assert.LessOrEqual(t, *s.Fidelity, 1.0)
	assert.Len(t, s.Attributions, len(x))
	_, _, again := post(t, ts.URL+"/v1/explain", req)
	assert.JSONEq(t, first, again)
}
