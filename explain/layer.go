package explain

import (
	"context"
	"fmt"
	"strings"
	"sync"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
)

// The layer baselines: the value V at the input baseline, or V = 0.
const (
	LayerBaselineInput = "input"
	LayerBaselineZero  = "zero"
)

// Values lists the values the model computes from its input, in graph
// order, each with the operator that produces it and its per-sample
// shape: the names Settings.Layer accepts.
func (m *Model) Values() ([]nn.Value, error) {
	nw, err := m.network()
	if err != nil {
		return nil, err
	}
	var vals []nn.Value
	err = guard(func() (err error) {
		vals, err = nw.Values()
		return err
	})
	if err != nil {
		return nil, fmt.Errorf("listing the model's values: %w", err)
	}
	return vals, nil
}

// layer returns the output called output (with logits, the input of its
// final Softmax, LogSoftmax or Sigmoid) as a function of the value called
// name. An unknown name is a *FieldError.
func (m *Model) layer(name, output string, logits bool) (*nn.Layer, error) {
	nw, err := m.network()
	if err != nil {
		return nil, err
	}
	var l *nn.Layer
	err = guard(func() (err error) {
		l, err = nw.Layer(name, nn.Selection{Output: output, Logits: logits})
		return err
	})
	if err != nil {
		msg := err.Error()
		if i := strings.Index(msg, ": bad request: "); i >= 0 {
			msg = msg[i+len(": bad request: "):]
		}
		return nil, fieldError(FieldLayer, fmt.Sprintf(" %q: %s (inspect -values lists the values)", name, msg))
	}
	return l, nil
}

// CAMLayer returns the value Grad-CAM reads when no layer is given: the
// last value, in graph order, with a channel axis and at least one spatial
// axis that output depends on.
func (m *Model) CAMLayer(output string) (string, error) {
	vals, err := m.Values()
	if err != nil {
		return "", err
	}
	for i := len(vals) - 1; i >= 0; i-- {
		v := vals[i]
		if len(v.Shape) < 2 {
			continue
		}
		if _, err := m.layer(v.Name, output, false); err == nil {
			return v.Name, nil
		}
	}
	return "", fieldError(FieldMethod, " grad-cam reads a value with a channel axis and spatial axes, (C, H, W) or (C, L), and the model computes none; give ", FieldLayer)
}

// layerState is what an Explainer at a layer keeps.
type layerState struct {
	l *nn.Layer
	// once computes ref, V of every row of the reference set.
	once sync.Once
	ref  [][]float64
	err  error
}

// reference returns V of every row of the reference set.
func (e *Explainer) layerReference(ctx context.Context, rows [][]float64) ([][]float64, error) {
	ls := e.layer
	ls.once.Do(func() {
		for i, r := range rows {
			v, err := ls.l.Values(ctx, r, 1)
			if err != nil {
				ls.err = fmt.Errorf("reference sample %d at layer %s: %w", i, ls.l.Name(), err)
				return
			}
			ls.ref = append(ls.ref, v)
		}
	})
	return ls.ref, ls.err
}

// attribute explains output target at sample x with the options o: at
// the input (through head, which holds the model's other inputs), or at
// the layer. It returns the result, the point it
// attributes among (x, or V(x)), and the outputs at the one baseline the
// result reports (nil when there is none).
func (e *Explainer) attribute(ctx context.Context, head gradattr.Model, x []float64, o gradattr.Options) (res *gradattr.Result, at, baseOut []float64, err error) {
	if e.layer == nil {
		res, err = gradattr.Attribute(ctx, head, x, e.settings.Target, o)
		if err == nil {
			if res.BaselineOutputs != nil {
				baseOut = res.BaselineOutputs
			} else if b, ok := reportedBaseline(o); ok {
				baseOut = forwardAt(ctx, head, x, e.shape, b)
			}
		}
		return res, x, baseOut, err
	}
	l := e.layer.l
	h, v, err := l.At(ctx, x)
	if err != nil {
		return nil, nil, nil, err
	}
	lo := o
	lo.Reference, lo.Baselines = nil, nil
	if o.Reference != nil && o.Method.Reads(gradattr.ParamReference) && !o.Method.Reads(gradattr.ParamBaseline) {
		if lo.Reference, err = e.layerReference(ctx, o.Reference); err != nil {
			return nil, nil, nil, err
		}
	}
	switch {
	case o.Method.Reads(gradattr.ParamBaseline) && e.tokens:
		if lo.Baselines, err = e.tokenBaseline(ctx); err != nil {
			return nil, nil, nil, err
		}
	case o.Method.Reads(gradattr.ParamBaseline):
		if e.settings.LayerBaseline == LayerBaselineZero {
			lo.Baselines = []gradattr.Baseline{{Kind: gradattr.BaselineZero}}
		}
		for _, b := range o.Baselines {
			if e.settings.LayerBaseline == LayerBaselineZero {
				break
			}
			xb, err := b.Build(x, e.shape)
			if err != nil {
				return nil, nil, nil, err
			}
			vb, err := l.Values(ctx, xb, 1)
			if err != nil {
				return nil, nil, nil, fmt.Errorf("the baseline at layer %s: %w", l.Name(), err)
			}
			lo.Baselines = append(lo.Baselines, gradattr.Baseline{Kind: gradattr.BaselineValues, Values: vb, Source: string(b.Kind)})
		}
	}
	res, err = gradattr.Attribute(ctx, h, v, e.settings.Target, lo)
	if err != nil {
		return nil, nil, nil, err
	}
	if res.BaselineOutputs != nil {
		baseOut = res.BaselineOutputs
	} else if b, ok := reportedBaseline(lo); ok {
		baseOut = forwardAt(ctx, h, v, l.InputShape(), b)
	}
	if e.tokens {
		perToken(res)
		return res, x, baseOut, nil
	}
	return res, v, baseOut, nil
}

// forwardAt evaluates m at the baseline b of sample x; nil when that
// fails (the attribution itself has succeeded, so the sample is kept).
func forwardAt(ctx context.Context, m gradattr.Model, x []float64, shape []int, b gradattr.Baseline) []float64 {
	var out []float64
	err := guard(func() error {
		xb, err := b.Build(x, shape)
		if err != nil {
			return err
		}
		out, err = m.Forward(ctx, xb, 1)
		return err
	})
	if err != nil {
		return nil
	}
	return out
}

// atLayer sets the Explainer up at Settings.Layer, or, for Grad-CAM, at
// its layer (CAMLayer when none is given) and the logits of an output
// that a Softmax, LogSoftmax or Sigmoid squashes, the paper's y.
func (e *Explainer) atLayer() error {
	s := &e.settings
	name := s.Layer
	t, tokens := e.model.Tokens()
	tokens = tokens && t.Input == e.input.Name
	switch {
	case tokens && s.Given(FieldBaseline):
		return fieldError(FieldBaseline, " sets a baseline of the input's values; the baseline of a model of token ids is zero embeddings, or the embedding of ", FieldBaselineToken)
	case !tokens && s.BaselineToken != nil:
		return fieldError(FieldBaselineToken, " applies to a model that reads token ids through an embedding; this one does not")
	case tokens && s.BaselineToken != nil && *s.BaselineToken >= t.Vocabulary:
		return fieldError(FieldBaselineToken, fmt.Sprintf(" must be a token id from 0 to %d (the embedding has %d rows), got %d", t.Vocabulary-1, t.Vocabulary, *s.BaselineToken))
	case tokens && name == "" && s.Method != gradattr.MethodGradCAM:
		name, e.tokens = t.Embedding, true
	}
	if s.Method == gradattr.MethodGradCAM {
		s.Logits = s.Logits || squashing[e.model.producer(e.output)]
		if name == "" {
			var err error
			if name, err = e.model.CAMLayer(e.output); err != nil {
				return err
			}
		}
	}
	if name == "" {
		return nil
	}
	l, err := e.model.layer(name, e.output, s.Logits)
	if err != nil {
		return err
	}
	e.layer = &layerState{l: l}
	e.attrShape = l.InputShape()
	if s.Method == gradattr.MethodGradCAM {
		if len(e.attrShape) < 2 {
			return fieldError(FieldLayer, fmt.Sprintf(" %s has shape %v; grad-cam reads a value with a channel axis and spatial axes, (C, H, W) or (C, L)", name, e.attrShape))
		}
		e.attrShape = e.attrShape[1:]
	}
	if e.tokens {
		e.attrShape = e.attrShape[:1]
	}
	return nil
}

// layerBaseline is LayerBaseline, its default filled in.
func (s *Settings) layerBaseline() string {
	if s.LayerBaseline == "" {
		return LayerBaselineInput
	}
	return s.LayerBaseline
}
