package explain

import (
	"encoding/json"
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
//	                   "points", "error", "groups",
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
	Index           int                    `json:"index"`
	Target          *int                   `json:"target"`
	Outputs         Numbers                `json:"outputs"`
	Attributions    Numbers                `json:"attributions"`
	Shape           []int                  `json:"shape"`
	BaselineOutputs Numbers                `json:"baseline_outputs"`
	Completeness    *gradattr.Completeness `json:"completeness"`
	// Points is the number of gradient evaluations spent.
	Points int     `json:"points"`
	Error  *string `json:"error"`
	// Groups is present with feature groups: the attributions summed per
	// group.
	Groups *gradattr.GroupedResult `json:"groups,omitempty"`
	// Warnings are the result's warnings, [] for none.
	Warnings []Warning `json:"warnings"`
}

// Document returns the report's document.
func (r *Report) Document() *Document {
	doc := &Document{
		Model:        ModelRecord{Path: r.Model.Name, SHA256: r.Model.SHA256, Input: r.Input, Output: r.Output},
		Method:       r.Settings.Method,
		Settings:     r.record,
		Explanations: []ExplanationDocument{},
	}
	shape := r.Batch.SampleShape()
	if shape == nil {
		shape = []int{}
	}
	for _, e := range r.Explanations {
		j := ExplanationDocument{Index: e.Index, Shape: shape, Warnings: []Warning{}}
		if e.Err != nil {
			msg := e.Err.Error()
			j.Error = &msg
		} else {
			res := e.Result
			t := res.Target
			j.Target = &t
			j.Outputs = Numbers{Values: nonNil(res.Outputs), Bits: 64}
			j.Attributions = Numbers{Values: nonNil(res.Attributions), Bits: 64}
			if len(res.Shape) > 0 {
				j.Shape = res.Shape
			}
			if e.BaselineOutputs != nil {
				j.BaselineOutputs = Numbers{Values: e.BaselineOutputs, Bits: 64}
			}
			j.Completeness = res.Completeness
			j.Points = res.Cost.GradientEvals
			j.Groups = e.Grouped
			if e.Warnings != nil {
				j.Warnings = e.Warnings
			}
		}
		doc.Explanations = append(doc.Explanations, j)
	}
	return doc
}

// WriteJSON writes the report's document, indented by two spaces.
func (r *Report) WriteJSON(w io.Writer) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(r.Document())
}

func nonNil(v []float64) []float64 {
	if v == nil {
		return []float64{}
	}
	return v
}
