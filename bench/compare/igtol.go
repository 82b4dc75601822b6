package main

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"strings"

	"github.com/apportion/apportion/bench"
	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/nn"
	"github.com/apportion/apportion/onnxlite"
)

// The "IG to 0.1%" rows answer a user who wants integrated gradients
// accurate to 0.1% relative L1 of the exact integral, one sample, from the
// zero baseline, for the top output:
//
//   - the reference is the exact integral in float64 (nn's float64 engine,
//     gradattr.ExactAlways: Sotoudeh & Thakur 2019), computed once and kept
//     in igref.json beside the models, keyed by the model's SHA-256 and the
//     sample, since it takes minutes on the CNNs;
//   - apportion runs integrated gradients with its defaults and a tolerance
//     of 0.1% (exact where the network has at most 1024 pieces, the
//     trapezoid rule refined adaptively until completeness and its error
//     estimate are within 0.1% otherwise); its error against the reference
//     is reported beside its time and its own estimate;
//   - PyTorch runs the trapezoid rule at the smallest doubling of its point
//     count (2, 4, 8, …, 65536) whose attributions are within 0.1% of the
//     reference (bench/torch_side.py, "igsweep"), then is timed at it.
const igTolerance = 1e-3

// igModels are the models of the IG rows: the zoo and the demos whose
// sample is a list of numbers (pumps and welds; the tickets model reads
// token ids, which have no path to integrate along).
func igModels(dir string, only []string) []string {
	names := []string{}
	for _, s := range bench.Zoo {
		names = append(names, s.Name)
	}
	for _, n := range demo.Names() {
		if s, err := demo.Get(n); err == nil && strings.HasSuffix(s.SampleFile, ".json") {
			names = append(names, n)
		}
	}
	if only == nil {
		return names
	}
	var out []string
	for _, n := range names {
		for _, o := range only {
			if n == o {
				out = append(out, n)
			}
		}
	}
	return out
}

// igCase is a model and sample of the IG rows.
type igCase struct {
	name, path string
	model      []byte
	x          []float64
	shape      []int
}

// loadIGCase reads a zoo model (bench.Input's first sample) or a demo
// (its sample).
func loadIGCase(dir, name string) (*igCase, error) {
	if spec, err := bench.Lookup(name); err == nil {
		path := filepath.Join(dir, name+".onnx")
		b, err := os.ReadFile(path)
		if err != nil {
			return nil, err
		}
		return &igCase{name: name, path: path, model: b, x: bench.Input(spec, 1), shape: spec.Input}, nil
	}
	s, err := demo.Get(name)
	if err != nil {
		return nil, err
	}
	var nested any
	if err := json.Unmarshal(s.Sample, &nested); err != nil {
		return nil, fmt.Errorf("%s sample: %w", name, err)
	}
	var x []float64
	var flatten func(v any) error
	flatten = func(v any) error {
		switch v := v.(type) {
		case float64:
			x = append(x, v)
		case []any:
			for _, e := range v {
				if err := flatten(e); err != nil {
					return err
				}
			}
		default:
			return fmt.Errorf("%s sample: %v is not a number", name, v)
		}
		return nil
	}
	if err := flatten(nested); err != nil {
		return nil, err
	}
	path := filepath.Join("demo", "data", s.ModelFile)
	return &igCase{name: name, path: path, model: s.Model, x: x}, nil
}

func compileHead(model []byte, opt nn.Options) (*nn.Head, error) {
	m, err := onnxlite.Decode(bytes.NewReader(model), onnxlite.DecodeOptions{})
	if err != nil {
		return nil, err
	}
	nw, err := nn.Compile(m, opt)
	if err != nil {
		return nil, err
	}
	return nw.Head(nn.Selection{})
}

// igReference is the float64 exact integral of a case, as kept in
// igref.json.
type igReference struct {
	Key          string    `json:"key"`
	Target       int       `json:"target"`
	Pieces       int       `json:"pieces"`
	Attributions []float64 `json:"attributions"`
}

// reference returns the case's float64 exact integral from the cache file,
// or computes and stores it.
func (c *igCase) reference(ctx context.Context, cache string) (*igReference, error) {
	h := sha256.New()
	h.Write(c.model)
	b, _ := json.Marshal(c.x)
	h.Write(b)
	key := hex.EncodeToString(h.Sum(nil))
	refs := map[string]*igReference{}
	if b, err := os.ReadFile(cache); err == nil {
		if err := json.Unmarshal(b, &refs); err != nil {
			return nil, fmt.Errorf("%s: %w", cache, err)
		}
	} else if !errors.Is(err, os.ErrNotExist) {
		return nil, err
	}
	if r := refs[c.name]; r != nil && r.Key == key {
		return r, nil
	}
	head, err := compileHead(c.model, nn.Options{DType: nn.Float64})
	if err != nil {
		return nil, err
	}
	out, err := head.Forward(ctx, c.x, 1)
	if err != nil {
		return nil, err
	}
	t := gradattr.Top(out)
	res, err := gradattr.IntegratedGradients(ctx, head, c.x, t, gradattr.IGOptions{Exact: gradattr.ExactAlways})
	if err != nil {
		return nil, err
	}
	r := &igReference{Key: key, Target: t, Pieces: res.Settings.Pieces, Attributions: res.Attributions}
	refs[c.name] = r
	b, err = json.MarshalIndent(refs, "", " ")
	if err != nil {
		return nil, err
	}
	return r, os.WriteFile(cache, b, 0o644)
}

// apportionIG is the timed call: integrated gradients to 0.1%.
func apportionIG(ctx context.Context, h *nn.Head, x []float64, target int) (*gradattr.Result, error) {
	return gradattr.IntegratedGradients(ctx, h, x, target, gradattr.IGOptions{Tolerance: igTolerance})
}

// relL1 is ‖a − ref‖₁ / ‖ref‖₁.
func relL1(a, ref []float64) float64 {
	var d, n float64
	for i := range ref {
		d += math.Abs(a[i] - ref[i])
		n += math.Abs(ref[i])
	}
	return d / n
}

// igRef answers the "igref" request: the case's sample, target and float64
// reference, and how apportion's own run compares with it.
func (s *goSide) igRef(ctx context.Context, name string) (response, error) {
	c, err := loadIGCase(s.dir, name)
	if err != nil {
		return response{}, err
	}
	ref, err := c.reference(ctx, filepath.Join(s.dir, "igref.json"))
	if err != nil {
		return response{}, fmt.Errorf("%s reference: %w", name, err)
	}
	h, err := s.igHead(c)
	if err != nil {
		return response{}, err
	}
	res, err := apportionIG(ctx, h, c.x, ref.Target)
	if err != nil {
		return response{}, err
	}
	how := fmt.Sprintf("%d points, est. %.1e", res.Settings.Points, res.Settings.ErrorEstimate)
	if res.Settings.Exact {
		how = fmt.Sprintf("exact, %d pieces", res.Settings.Pieces)
	}
	return response{X: c.x, Path: c.path, Target: ref.Target, IG: ref.Attributions, Pieces: ref.Pieces,
		How: how, IGError: relL1(res.Attributions, ref.Attributions)}, nil
}

// igHead is the float32 head of a case, compiled as the zoo's are.
func (s *goSide) igHead(c *igCase) (*nn.Head, error) {
	if h, ok := s.heads["ig:"+c.name]; ok {
		return h, nil
	}
	h, err := compileHead(c.model, s.options())
	if err != nil {
		return nil, err
	}
	s.heads["ig:"+c.name] = h
	return h, nil
}

// igTask is one timed call of apportion's IG to 0.1% on a case.
func (s *goSide) igTask(ctx context.Context, name string) (func() error, error) {
	c, err := loadIGCase(s.dir, name)
	if err != nil {
		return nil, err
	}
	h, err := s.igHead(c)
	if err != nil {
		return nil, err
	}
	out, err := h.Forward(ctx, c.x, 1)
	if err != nil {
		return nil, err
	}
	t := gradattr.Top(out)
	return func() error { _, err := apportionIG(ctx, h, c.x, t); return err }, nil
}
