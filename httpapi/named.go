package httpapi

import (
	"bytes"
	"cmp"
	"encoding/json"
	"fmt"
	"math"
	"sort"
	"strconv"
	"strings"

	"github.com/apportion/apportion/onnxlite"
	"github.com/apportion/apportion/samples"
)

// namedInputs reads "inputs" given as one object, or an array of objects,
// keyed by the model's feature names (its feature_names metadata), the
// request's form of a CSV file with a header: each sample's values are
// taken by name, in the model's order. ok is false when inputs are not
// objects (arrays of numbers are read by samplesOf). Every feature must be
// given, and every key must name a feature, so that a misspelt name cannot
// pass unnoticed: an object that breaks this is a bad sample, left out of
// the answer (the request fails only when every sample does).
func (h *Handler) namedInputs(inputs json.RawMessage) (b *samples.Batch, ok bool, herr *httpError) {
	raw := bytes.TrimSpace(inputs)
	var objects []json.RawMessage
	switch {
	case len(raw) > 0 && raw[0] == '{':
		objects = []json.RawMessage{raw}
	case len(raw) > 0 && raw[0] == '[':
		// Decided by the first sample, before decoding any: arrays of
		// numbers are read by samplesOf without this copy of them.
		if first := bytes.TrimSpace(raw[1:]); len(first) == 0 || first[0] != '{' {
			return nil, false, nil
		}
		if err := json.Unmarshal(raw, &objects); err != nil || len(objects) == 0 {
			return nil, false, nil
		}
		if h.opt.MaxSamples > 0 && len(objects) > h.opt.MaxSamples {
			return nil, true, h.tooManySamples()
		}
	default:
		return nil, false, nil
	}
	features := h.model.Meta.Features
	size := samples.Product(h.sampleShape())
	if len(features) != size {
		return nil, true, badRequest(`"inputs" as objects need a model that names its %d features (feature_names metadata); this one does not: send each sample as an array of numbers`, size)
	}
	index := make(map[string]int, len(features))
	for i, f := range features {
		index[f] = i
	}
	b = &samples.Batch{Name: "request", Shape: append([]int{len(objects)}, h.sampleShape()...), Samples: len(objects),
		Data: make([]float64, 0, size*len(objects)), Features: features}
	var first error
	for n, o := range objects {
		x, err := namedSample(o, features, index)
		if err == nil && h.spec.Elem == onnxlite.Float {
			if j, ferr := samples.CheckFloat32(x); ferr != nil {
				err = fmt.Errorf("feature %q: %w", features[j], ferr)
			}
		}
		if err != nil {
			// Left out of the answer, its neighbours kept.
			err = fmt.Errorf(`"inputs"[%d] (for %q): %w`, n, h.spec.Name, err)
			first = cmp.Or(first, err)
			b.MarkBad(n, err)
			x = nanSample(size)
		}
		b.Data = append(b.Data, x...)
	}
	if len(b.Bad) == b.Samples {
		return nil, true, badRequest("%v", first)
	}
	return b, true, nil
}

// nanSample is the values of a sample that could not be read: n NaNs, as
// the samples readers leave them.
func nanSample(n int) []float64 {
	x := make([]float64, n)
	for i := range x {
		x[i] = math.NaN()
	}
	return x
}

// namedSample reads one object of feature values.
func namedSample(raw json.RawMessage, features []string, index map[string]int) ([]float64, error) {
	var fields map[string]json.RawMessage
	if err := json.Unmarshal(raw, &fields); err != nil {
		return nil, fmt.Errorf("expected an object of feature values, got %s", truncate(raw))
	}
	var unknown []string
	for k := range fields {
		if _, ok := index[k]; !ok {
			unknown = append(unknown, strconv.Quote(k))
		}
	}
	if len(unknown) > 0 {
		sort.Strings(unknown)
		return nil, fmt.Errorf("%s %s not a feature of the model (features: %s)", strings.Join(unknown, ", "), plural(len(unknown), "is", "are"), strings.Join(features, ", "))
	}
	x := make([]float64, len(features))
	for i, f := range features {
		v, ok := fields[f]
		if !ok {
			return nil, fmt.Errorf("feature %q is missing", f)
		}
		dec := json.NewDecoder(bytes.NewReader(v))
		dec.UseNumber()
		var num json.Number
		if err := dec.Decode(&num); err != nil {
			return nil, fmt.Errorf("feature %q: expected a number, got %s", f, truncate(v))
		}
		val, err := strconv.ParseFloat(string(num), 64)
		if err != nil || math.IsInf(val, 0) {
			return nil, fmt.Errorf("feature %q: %s is out of the float64 range", f, num)
		}
		x[i] = val
	}
	return x, nil
}

// plural picks the singular or the plural form for a count of n.
func plural(n int, one, many string) string {
	if n == 1 {
		return one
	}
	return many
}

// truncate returns raw for a message, cut to 40 bytes.
func truncate(raw json.RawMessage) string {
	s := string(bytes.TrimSpace(raw))
	if len(s) > 40 {
		s = s[:40] + "…"
	}
	return s
}
