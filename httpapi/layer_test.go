package httpapi

import (
	"encoding/json"
	"net/http/httptest"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
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
	code, _, resp = post(t, ts.URL+"/v1/explain", `{"inputs": [`+x+`], "layer_baseline": "zero"}`)
	assert.Equal(t, 400, code)
	assert.Contains(t, errorOf(t, resp), `"layer_baseline" applies with "layer"`)
}

func TestExplainTokenModel(t *testing.T) {
	s, err := demo.Get("tickets")
	require.NoError(t, err)
	m, err := explain.Decode(s.Model, "demo:"+s.ModelFile, explain.DecodeOptions{})
	require.NoError(t, err)
	h, err := New(m, Options{Queue: DefaultQueue})
	require.NoError(t, err)
	ts := httptest.NewServer(h)
	defer func() { ts.Close(); h.Close() }()
	// demo/data/tickets_sample.txt as ids of the model's vocabulary
	// (its metadata), padded with [pad] (id 0).
	ids, err := m.Vocabulary().IDs(string(s.Sample), 16)
	require.NoError(t, err)
	code, _, body := post(t, ts.URL+"/v1/explain", `{"inputs": [`+floatsJSON(ids)+`], "baseline_token": 0}`)
	require.Equal(t, 200, code, body)
	var doc struct {
		Settings     map[string]any `json:"settings"`
		Explanations []struct {
			Attributions []float64 `json:"attributions"`
			Tokens       []string  `json:"tokens"`
		} `json:"explanations"`
	}
	require.NoError(t, json.Unmarshal([]byte(body), &doc))
	e := doc.Explanations[0]
	assert.Equal(t, strings.Fields(string(s.Sample)), e.Tokens[:len(strings.Fields(string(s.Sample)))])
	assert.Len(t, e.Attributions, 16)
	assert.Equal(t, "screeching", e.Tokens[gradattr.Top(e.Attributions)], "the planted urgent word (demo/data/README.md)")
	assert.EqualValues(t, 0, doc.Settings["baseline_token"])
	for i, tok := range e.Tokens {
		if tok == "[pad]" {
			// E = E′ at a padding position (Sundararajan et al. 2017, eq. 1: x − x′ = 0)
			assert.Zero(t, e.Attributions[i])
		}
	}
}
