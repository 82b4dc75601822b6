// Package modelmeta reads and writes the names a model carries in its ONNX
// metadata_props: the names of its input features, their units and the
// names of its output classes. One convention, written here once:
//
//	feature_names  ["bearing_temp", "vibration_rms", ...]  one per input value
//	feature_units  ["°C", "mm/s", ...]                      one per input value
//	class_names    ["normal", "degraded", "failing"]        one per output value
//	vocabulary     ["[pad]", "[unk]", "leaking", ...]       one per token id, from 0
//
// Write stores each list as a JSON array of strings. Read accepts a JSON
// array or a comma-separated list, and "classes" for class_names.
package modelmeta

import (
	"encoding/json"
	"fmt"
	"strconv"
	"strings"

	"github.com/apportion/apportion/onnxlite"
)

// The metadata_props keys.
const (
	KeyFeatureNames = "feature_names"
	KeyFeatureUnits = "feature_units"
	KeyClassNames   = "class_names"
	KeyVocabulary   = "vocabulary"
	// keyClasses is read in place of class_names when that is absent.
	keyClasses = "classes"
)

// Meta holds the names of a model's features and classes; a nil list is
// one the model does not carry.
type Meta struct {
	// Features names the values of one input sample, row-major.
	Features []string
	// Units gives each feature's unit ("" for none).
	Units []string
	// Classes names the values of one output sample.
	Classes []string
	// Vocabulary names the token ids of a model whose input holds them:
	// id i is Vocabulary[i].
	Vocabulary []string
}

// Read returns the names in m's metadata_props.
func Read(m *onnxlite.Model) Meta {
	if m == nil {
		return Meta{}
	}
	return FromProps(m.Metadata)
}

// FromProps reads the names from metadata_props key/value pairs.
func FromProps(md map[string]string) Meta {
	return Meta{
		Features:   list(md, KeyFeatureNames),
		Units:      list(md, KeyFeatureUnits),
		Classes:    list(md, KeyClassNames, keyClasses),
		Vocabulary: list(md, KeyVocabulary),
	}
}

// list reads a list-valued entry: a JSON array (of strings; other values
// are written as JSON) or a comma-separated list. The first of keys that is
// present wins.
func list(md map[string]string, keys ...string) []string {
	for _, k := range keys {
		v, ok := md[k]
		if !ok {
			continue
		}
		v = strings.TrimSpace(v)
		if strings.HasPrefix(v, "[") {
			var items []any
			if err := json.Unmarshal([]byte(v), &items); err == nil {
				out := make([]string, len(items))
				for i, e := range items {
					if s, ok := e.(string); ok {
						out[i] = s
					} else {
						b, _ := json.Marshal(e) // a decoded JSON value marshals
						out[i] = strings.Trim(string(b), `"`)
					}
				}
				return out
			}
		}
		if v == "" {
			return nil
		}
		parts := strings.Split(v, ",")
		for i := range parts {
			parts[i] = strings.TrimSpace(parts[i])
		}
		return parts
	}
	return nil
}

// Write stores meta's lists in m's metadata_props as JSON arrays, leaving
// the other entries and the lists meta leaves nil as they are. It refuses
// units without one per feature, and lists that do not match the model:
// features against the values of one sample of its one runtime input,
// classes against the values of one sample of its first output, when the
// model declares those sizes.
func Write(m *onnxlite.Model, meta Meta) error {
	if m == nil || m.Graph == nil {
		return fmt.Errorf("modelmeta: the model has no graph")
	}
	if meta.Units != nil && len(meta.Units) != len(meta.Features) {
		return fmt.Errorf("modelmeta: %d units for %d features, want one per feature", len(meta.Units), len(meta.Features))
	}
	if n, ok := sampleSize(runtimeInput(m.Graph)); ok && meta.Features != nil && len(meta.Features) != n {
		return fmt.Errorf("modelmeta: %d feature names, the model's input takes %d values per sample", len(meta.Features), n)
	}
	if len(m.Graph.Outputs) > 0 {
		if n, ok := sampleSize(m.Graph.Outputs[0]); ok && meta.Classes != nil && len(meta.Classes) != n {
			return fmt.Errorf("modelmeta: %d class names, the model's output %q has %d values per sample", len(meta.Classes), m.Graph.Outputs[0].Name, n)
		}
	}
	if m.Metadata == nil {
		m.Metadata = map[string]string{}
	}
	for key, names := range map[string][]string{KeyFeatureNames: meta.Features, KeyFeatureUnits: meta.Units, KeyClassNames: meta.Classes, KeyVocabulary: meta.Vocabulary} {
		if names != nil {
			b, _ := json.Marshal(names) // a []string always marshals
			m.Metadata[key] = string(b)
		}
	}
	return nil
}

// runtimeInput is the graph's one input not backed by an initializer; nil
// when there is not exactly one.
func runtimeInput(g *onnxlite.Graph) *onnxlite.ValueInfo {
	inits := make(map[string]bool, len(g.Initializers))
	for _, t := range g.Initializers {
		inits[t.Name] = true
	}
	var found *onnxlite.ValueInfo
	for _, vi := range g.Inputs {
		if inits[vi.Name] {
			continue
		}
		if found != nil {
			return nil
		}
		found = vi
	}
	return found
}

// sampleSize is the number of values of one sample of a declared tensor
// whose dimensions after the first (the batch) are all known.
func sampleSize(vi *onnxlite.ValueInfo) (int, bool) {
	if vi == nil || vi.Type == nil || !vi.Type.HasShape || len(vi.Type.Shape) == 0 {
		return 0, false
	}
	n := 1
	for _, d := range vi.Type.Shape[1:] {
		if !d.HasValue {
			return 0, false
		}
		n *= int(d.Value)
	}
	return n, true
}

// Label names feature i: its name, with its unit in parentheses when it
// has one ("bearing_temp (°C)"), or its index when the features are not
// named.
func (m Meta) Label(i int) string {
	if i < 0 || i >= len(m.Features) {
		return strconv.Itoa(i)
	}
	label := m.Features[i]
	if len(m.Units) == len(m.Features) && m.Units[i] != "" {
		label += " (" + m.Units[i] + ")"
	}
	return label
}

// Labels names every feature of a sample of the given shape: by Label when
// there is one name per value, else by index, a multi-index such as
// "[0,3,1]" for samples of rank 2 or more.
func (m Meta) Labels(shape []int) []string {
	n := 1
	for _, d := range shape {
		n *= d
	}
	labels := make([]string, n)
	if len(m.Features) == n {
		for i := range labels {
			labels[i] = m.Label(i)
		}
		return labels
	}
	idx := make([]int, len(shape))
	for i := range labels {
		if len(shape) <= 1 {
			labels[i] = strconv.Itoa(i)
			continue
		}
		parts := make([]string, len(idx))
		for d, v := range idx {
			parts[d] = strconv.Itoa(v)
		}
		labels[i] = "[" + strings.Join(parts, ",") + "]"
		for d := len(shape) - 1; d >= 0; d-- {
			idx[d]++
			if idx[d] < shape[d] {
				break
			}
			idx[d] = 0
		}
	}
	return labels
}

// Class names output k: its class name, or its index when the model names
// no class k.
func (m Meta) Class(k int) string {
	if k >= 0 && k < len(m.Classes) && m.Classes[k] != "" {
		return m.Classes[k]
	}
	return strconv.Itoa(k)
}
