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

// ticketsServer serves the tickets demo's model (token ids, with its
// vocabulary in its metadata).
func ticketsServer(t *testing.T) (*demo.Scenario, *explain.Model, *httptest.Server) {
	t.Helper()
	s, err := demo.Get("tickets")
	require.NoError(t, err)
	m, err := explain.Decode(s.Model, "demo:"+s.ModelFile, explain.DecodeOptions{})
	require.NoError(t, err)
	h, err := New(m, Options{Queue: DefaultQueue})
	require.NoError(t, err)
	ts := httptest.NewServer(h)
	t.Cleanup(func() { ts.Close(); h.Close() })
	return s, m, ts
}

func TestExplainTokenModel(t *testing.T) {
	s, m, ts := ticketsServer(t)
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

func TestExplainTexts(t *testing.T) {
	// A model of token ids with a vocabulary takes texts: each is read as
	// the command line reads a .txt line (words, lower-cased, padded), so
	// the answer equals the one for the same ids; the planted word leads
	// (demo/data/README.md). A text too long for the model beside a good
	// one is left out, named; texts alone that cannot be read, or texts
	// for a model without a vocabulary, are bad requests.
	s, m, ts := ticketsServer(t)
	text := strings.TrimSpace(string(s.Sample))
	ids, err := m.Vocabulary().IDs(text, 16)
	require.NoError(t, err)
	code, _, byIDs := post(t, ts.URL+"/v1/explain", `{"inputs": [`+floatsJSON(ids)+`]}`)
	require.Equal(t, 200, code, byIDs)
	quoted, _ := json.Marshal(strings.ToUpper(text))
	code, _, byText := post(t, ts.URL+"/v1/explain", `{"inputs": [`+string(quoted)+`]}`)
	require.Equal(t, 200, code, byText)
	assert.JSONEq(t, byIDs, byText)
	code, _, one := post(t, ts.URL+"/v1/explain", `{"inputs": `+string(quoted)+`}`)
	require.Equal(t, 200, code, one)
	assert.JSONEq(t, byIDs, one, "one text alone is one sample")

	long, _ := json.Marshal(strings.Repeat("pump ", 17))
	code, _, body := post(t, ts.URL+"/v1/predict", `{"inputs": [`+string(quoted)+`, `+string(long)+`]}`)
	require.Equal(t, 200, code, body)
	var res struct {
		Rows   []int
		Errors []explain.RowError
	}
	require.NoError(t, json.Unmarshal([]byte(body), &res))
	assert.Equal(t, []int{0}, res.Rows)
	require.Len(t, res.Errors, 1)
	assert.Equal(t, `"inputs"[1] (for "note"): 17 words, more than the 16 tokens the model reads`, res.Errors[0].Error)
	code, _, body = post(t, ts.URL+"/v1/predict", `{"inputs": [`+string(long)+`]}`)
	assert.Equal(t, 400, code)
	assert.Contains(t, errorOf(t, body), "17 words, more than the 16 tokens")

	bare, err := explain.Decode(s.Model, "demo:"+s.ModelFile, explain.DecodeOptions{})
	require.NoError(t, err)
	bare.Meta.Vocabulary = nil
	h2, err := New(bare, Options{Queue: DefaultQueue})
	require.NoError(t, err)
	ts2 := httptest.NewServer(h2)
	defer func() { ts2.Close(); h2.Close() }()
	code, _, body = post(t, ts2.URL+"/v1/predict", `{"inputs": [`+string(quoted)+`]}`)
	assert.Equal(t, 400, code)
	assert.Contains(t, errorOf(t, body), "the model carries no vocabulary to read them with")
}
