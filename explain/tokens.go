package explain

import (
	"context"
	"fmt"
	"slices"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// TokenInput describes a model whose input holds token ids that select
// rows of an embedding table (a Gather from a floating-point initializer):
// explanations attribute at the Gather's output, the embedded tokens, and
// sum over the embedding axis, one attribution per token (Sundararajan,
// Taly & Yan 2017, the text experiments).
type TokenInput struct {
	// Input names the model input of token ids.
	Input string
	// Embedding names the value the Gather computes, [L, E] per sample.
	Embedding string
	// Table names the embedding table, an initializer of [vocabulary, E].
	Table string
	// Vocabulary is the number of rows of the table.
	Vocabulary int
}

// Tokens reports whether m reads token ids, and how: whether its one
// runtime input holds integers that a Gather from an embedding table
// reads.
func (m *Model) Tokens() (TokenInput, bool) {
	if len(m.Inputs()) != 1 {
		return TokenInput{}, false
	}
	g := m.Graph.Graph
	inits := map[string]*onnxlite.Tensor{}
	for _, t := range g.Initializers {
		inits[t.Name] = t
	}
	for _, vi := range m.Inputs() {
		if vi.Type == nil || (vi.Type.Elem != onnxlite.Int64 && vi.Type.Elem != onnxlite.Int32) {
			continue
		}
		for _, n := range g.Nodes {
			if n.OpType != "Gather" || len(n.Inputs) < 2 || n.Inputs[1] != vi.Name || n.AttrInt("axis", 0) != 0 || len(n.Outputs) == 0 {
				continue
			}
			t := inits[n.Inputs[0]]
			if t == nil || !floating(t.DType) || len(t.Dims) != 2 {
				continue
			}
			return TokenInput{Input: vi.Name, Embedding: n.Outputs[0], Table: t.Name, Vocabulary: int(t.Dims[0])}, true
		}
	}
	return TokenInput{}, false
}

// Vocabulary returns the model's vocabulary (Meta.Vocabulary, from its
// metadata or set by the caller), nil when it has none.
func (m *Model) Vocabulary() *samples.Vocabulary {
	if m.Meta.Vocabulary == nil {
		return nil
	}
	return samples.NewVocabulary(m.Meta.Vocabulary)
}

// tokenHead is a token model's output as a function of its token ids:
// Forward runs the model; Gradient refuses, since ids have none (the
// explanations go through the embedding).
type tokenHead struct {
	l *nn.Layer
}

func (h tokenHead) InputShape() []int { return h.l.SampleShape() }
func (h tokenHead) OutputSize() int   { return h.l.OutputSize() }

func (h tokenHead) Forward(ctx context.Context, x []float64, n int) ([]float64, error) {
	return h.l.Forward(ctx, x, n)
}

func (h tokenHead) Gradient(context.Context, []float64, int, []int) ([]float64, []float64, error) {
	return nil, nil, fmt.Errorf("token ids have no gradient: explanations of a token model attribute at its embedding")
}

// tokenBaselines returns the baselines at the embedding: zero vectors, or
// the embedding of token id at every position.
func (e *Explainer) tokenBaseline(ctx context.Context) ([]gradattr.Baseline, error) {
	if e.settings.BaselineToken == nil {
		return []gradattr.Baseline{{Kind: gradattr.BaselineZero}}, nil
	}
	id := *e.settings.BaselineToken
	ids := slices.Repeat([]float64{float64(id)}, samples.Product(e.shape))
	v, err := e.layer.l.Values(ctx, ids, 1)
	if err != nil {
		return nil, fmt.Errorf("the embedding of -baseline-token %d: %w", id, err)
	}
	return []gradattr.Baseline{{Kind: gradattr.BaselineValues, Values: v, Source: fmt.Sprintf("token %d", id)}}, nil
}

// perToken sums r's attributions over the embedding axis, in place: one
// per token. Sums, and so completeness, are unchanged.
func perToken(r *gradattr.Result) {
	if len(r.Shape) != 2 {
		return
	}
	L, E := r.Shape[0], r.Shape[1]
	out := make([]float64, L)
	for i := range L {
		for _, a := range r.Attributions[i*E : (i+1)*E] {
			out[i] += a
		}
	}
	r.Attributions, r.Shape = out, []int{L}
}

// TokenNames returns the tokens of sample ids by the model's vocabulary
// (#id for an id it does not name).
func (m *Model) TokenNames(ids []float64) []string {
	v := m.Vocabulary()
	out := make([]string, len(ids))
	for i, id := range ids {
		out[i] = v.Token(int(id))
	}
	return out
}

// perToken reports whether the attributions are one per token: a token
// model explained through its embedding, or Grad-CAM on a token model
// whose map has one place per token.
func (e *Explainer) perToken() bool {
	if e.tokens {
		return true
	}
	t, ok := e.model.Tokens()
	return ok && t.Input == e.input.Name && e.settings.Method == gradattr.MethodGradCAM &&
		len(e.attrShape) == 1 && len(e.shape) == 1 && e.attrShape[0] == e.shape[0]
}
