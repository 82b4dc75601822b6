package httpapi

import (
	"encoding/json"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestExplainAtLayer(t *testing.T) {
	_, ts, _ := testServer(t, nil)
	x := demoSampleJSON(t)
	explainAt := func(body string) explainDoc {
		code, _, resp := post(t, ts.URL+"/v1/explain", body)
		require.Equal(t, 200, code, resp)
		var doc explainDoc
		require.NoError(t, json.Unmarshal([]byte(resp), &doc))
		require.Len(t, doc.Explanations, 1)
		return doc
	}
	input := explainAt(`{"inputs": [` + x + `], "steps": 64}`)
	layer := explainAt(`{"inputs": [` + x + `], "steps": 64, "layer": "standardised"}`)
	// "standardised" is (x − μ)/σ feature by feature: the straight path
	// from V(0) to V(x) is the image of the input's path, and ∂F/∂x_i =
	// (∂g/∂V_i)/σ_i, so the integrated gradients at the layer are those at
	// the input (Sundararajan et al. 2017, eq. 1, under the change of
	// variables); the float32 engine rounds V.
	a, b := input.Explanations[0], layer.Explanations[0]
	assert.InDeltaSlice(t, a.Attributions, b.Attributions, 1e-4)
	assert.Equal(t, a.Outputs, b.Outputs, "g(V(x)) is F(x)")
	assert.InDelta(t, a.Completeness.Expected, b.Completeness.Expected, 1e-6, "f(x) − f(0) = g(V(x)) − g(V(0))")

	code, _, resp := post(t, ts.URL+"/v1/explain", `{"inputs": [`+x+`], "layer": "nope"}`)
	assert.Equal(t, 400, code)
	assert.Contains(t, errorOf(t, resp), `"layer" "nope": the model has no such value`)
	code, _, resp = post(t, ts.URL+"/v1/explain", `{"inputs": [`+x+`], "layer-baseline": "zero"}`)
	assert.Equal(t, 400, code)
	assert.Contains(t, errorOf(t, resp), `"layer-baseline" applies with "layer"`)
}
