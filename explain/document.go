package explain

import (
	"bytes"
	"encoding/json"
	"errors"
	"io"
	"math"
	"strconv"

	"github.com/apportion/apportion/gradattr"
)

// Numbers is a JSON array of floats written with the shortest decimal that
// reads back to the same value at Bits precision (32 or 64); NaN and ±Inf,
// which JSON cannot hold, are written as null, and so is a nil slice.
type Numbers struct {
	Values []float64
	Bits   int
}

// MarshalJSON writes the array.
func (n Numbers) MarshalJSON() ([]byte, error) {
	if n.Values == nil {
		return []byte("null"), nil
	}
	b := make([]byte, 0, 2+len(n.Values)*12)
	b = append(b, '[')
	for i, v := range n.Values {
		if i > 0 {
			b = append(b, ',')
		}
		if math.IsNaN(v) || math.IsInf(v, 0) {
			b = append(b, "null"...)
			continue
		}
		b = strconv.AppendFloat(b, v, 'g', -1, n.Bits)
	}
	return append(b, ']'), nil
}

// Document is the explain JSON document: stable, keys only ever added.
//
//	{"model": {"path", "sha256", "input", "output"},
//	 "method": canonical name,
//	 "settings": {the method's options as gradattr.Settings records them,
//	              defaults filled in; "target", "logits", "output",
//	              "reference" (the reference set's name)},
//	 "explanations": [{"index", "target", "outputs", "attributions",
//	                   "shape", "baseline_outputs", "completeness",
//	                   "points", "error_estimate", "exact", "pieces",
//	                   "exact_skipped",
//	                   "error", "groups", "standard_errors",
//	                   "estimator", "fidelity", "intercept",
//	                   "warnings": [{"code", "message", "suggest"}]}]}
//
// A failed sample has "error" and null results.
type Document struct {
	Model        ModelRecord           `json:"model"`
	Method       gradattr.Method       `json:"method"`
	Settings     map[string]any        `json:"settings"`
	Explanations []ExplanationDocument `json:"explanations"`
}

// ModelRecord identifies the model and the values explained.
type ModelRecord struct {
	Path   string `json:"path"`
	SHA256 string `json:"sha256"`
	Input  string `json:"input"`
	Output string `json:"output"`
}

// ExplanationDocument is one sample's record in a Document.
type ExplanationDocument struct {
	Index        int     `json:"index"`
	Target       *int    `json:"target"`
	Outputs      Numbers `json:"outputs"`
	Attributions Numbers `json:"attributions"`
	Shape        []int   `json:"shape"`
	// Tokens names the sample's tokens, for a model of token ids.
	Tokens          []string               `json:"tokens,omitempty"`
	BaselineOutputs Numbers                `json:"baseline_outputs"`
	Completeness    *gradattr.Completeness `json:"completeness"`
	// Points is the number of gradient evaluations spent.
	Points int `json:"points"`
	// ErrorEstimate is the estimated relative L1 error of integrated
	// gradients refined adaptively (gradattr.Settings.ErrorEstimate).
	ErrorEstimate float64 `json:"error_estimate,omitempty"`
	// Exact is present, true, when integrated gradients integrated
	// exactly, over Pieces pieces of the path (the most of any baseline).
	Exact  bool `json:"exact,omitempty"`
	Pieces int  `json:"pieces,omitempty"`
	// ExactSkipped says why automatic integrated gradients integrated by
	// quadrature on a model that may offer the exact integral.
	ExactSkipped string  `json:"exact_skipped,omitempty"`
	Error        *string `json:"error"`
	// Groups is present with feature groups: the attributions per group.
	Groups *gradattr.GroupedResult `json:"groups,omitempty"`
	// StandardErrors holds the standard error of each attribution, for
	// the sampled estimators of Shapley values.
	StandardErrors *Numbers `json:"standard_errors,omitempty"`
	// Estimator is the estimator of Shapley values that ran (the one
	// "auto" chose).
	Estimator string `json:"estimator,omitempty"`
	// Fidelity and Intercept describe the local surrogate's fit.
	Fidelity  *float64 `json:"fidelity,omitempty"`
	Intercept *float64 `json:"intercept,omitempty"`
	// Warnings are the result's warnings, [] for none.
	Warnings []Warning `json:"warnings"`
}

// Document returns the report's document.
func (r *Report) Document() *Document {
	doc := r.head()
	for _, e := range r.Explanations {
		doc.Explanations = append(doc.Explanations, r.explanationDocument(e))
	}
	return doc
}

// head is the document without its explanations.
func (r *Report) head() *Document {
	return &Document{
		Model:        ModelRecord{Path: r.Model.Name, SHA256: r.Model.SHA256, Input: r.Input, Output: r.Output},
		Method:       r.Settings.Method,
		Settings:     r.record,
		Explanations: []ExplanationDocument{},
	}
}

// explanationDocument is one sample's record.
func (r *Report) explanationDocument(e Explanation) ExplanationDocument {
	shape := r.Batch.SampleShape()
	if shape == nil {
		shape = []int{}
	}
	j := ExplanationDocument{Index: e.Index, Shape: shape, Warnings: []Warning{}}
	if e.Err != nil {
		msg := e.Err.Error()
		j.Error = &msg
		return j
	}
	res := e.Result
	t := res.Target
	j.Target = &t
	j.Outputs = Numbers{Values: nonNil(res.Outputs), Bits: 64}
	j.Attributions = Numbers{Values: nonNil(res.Attributions), Bits: 64}
	if len(res.Shape) > 0 {
		j.Shape = res.Shape
	}
	j.Tokens = e.Tokens
	if e.BaselineOutputs != nil {
		j.BaselineOutputs = Numbers{Values: e.BaselineOutputs, Bits: 64}
	}
	j.Completeness = res.Completeness
	j.Points = res.Cost.GradientEvals
	j.ErrorEstimate = res.Settings.ErrorEstimate
	j.Exact, j.Pieces, j.ExactSkipped = res.Settings.Exact, res.Settings.Pieces, res.Settings.ExactSkipped
	j.Groups = e.Grouped
	if res.StandardErrors != nil {
		j.StandardErrors = &Numbers{Values: res.StandardErrors, Bits: 64}
	}
	if res.Settings.Method == gradattr.MethodShapley {
		j.Estimator = res.Settings.Estimator
	}
	if fit := res.Surrogate; fit != nil {
		j.Fidelity, j.Intercept = &fit.Fidelity, &fit.Intercept
	}
	if e.Warnings != nil {
		j.Warnings = e.Warnings
	}
	return j
}

// WriteJSON writes the report's document, indented by two spaces.
func (r *Report) WriteJSON(w io.Writer) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(r.Document())
}

// DocumentWriter writes the reports of the batches of one stream of
// samples (Explainer.Explain of each, in order) as one explain document:
// the bytes Report.WriteJSON writes for all of them at once, written as
// they come, so that the document of a file of any length takes constant
// memory.
type DocumentWriter struct {
	w   io.Writer
	n   int // explanations written
	err error
}

// NewDocumentWriter returns a writer of one document to w.
func NewDocumentWriter(w io.Writer) *DocumentWriter { return &DocumentWriter{w: w, n: -1} }

// Write adds the explanations of rep; the first report also gives the
// document's head (model, method, settings).
func (d *DocumentWriter) Write(rep *Report) error {
	if d.err != nil {
		return d.err
	}
	if d.n < 0 {
		head, err := json.MarshalIndent(rep.head(), "", "  ")
		if err != nil {
			d.err = err
			return err
		}
		// The head ends with the explanations' empty array and the
		// object's brace: "[]\n}".
		head = bytes.TrimSuffix(head, []byte("]\n}"))
		d.write(head)
		d.n = 0
	}
	for _, e := range rep.Explanations {
		raw, err := json.MarshalIndent(rep.explanationDocument(e), "    ", "  ")
		if err != nil {
			d.err = err
			return err
		}
		if d.n > 0 {
			d.write([]byte(","))
		}
		d.write([]byte("\n    "))
		d.write(raw)
		d.n++
	}
	return d.err
}

// Close ends the document; a document with no report written is not one.
func (d *DocumentWriter) Close() error {
	switch {
	case d.err != nil:
		return d.err
	case d.n < 0:
		return errors.New("explain: no report was written to the document")
	case d.n == 0:
		d.write([]byte("]\n}\n"))
	default:
		d.write([]byte("\n  ]\n}\n"))
	}
	return d.err
}

func (d *DocumentWriter) write(b []byte) {
	if d.err == nil {
		_, d.err = d.w.Write(b)
	}
}

func nonNil(v []float64) []float64 {
	if v == nil {
		return []float64{}
	}
	return v
}
