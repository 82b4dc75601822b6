package explain

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"

	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// ReadGroups reads feature groups from a JSON file, in either form:
//
//	{"vibration": ["vibration_rms", "bearing_temp"], "load": [4, 5]}
//	[{"name": "vibration", "indices": ["vibration_rms", 1]}, ...]
//
// Groups keep the file's order. A feature is given by its index in the
// sample, row-major from 0 (below n, the number of features), or by its
// name in names (the model's feature names, or the CSV header's; nil
// when there are none).
func ReadGroups(r io.Reader, n int, names []string) ([]gradattr.Group, error) {
	raw, err := io.ReadAll(io.LimitReader(r, samples.MaxBytes))
	if err != nil {
		return nil, err
	}
	var groups []groupSpec
	dec := json.NewDecoder(bytes.NewReader(raw))
	tok, err := dec.Token()
	switch {
	case err != nil:
		return nil, fmt.Errorf("expected a JSON object of group names and their features, or an array of {\"name\", \"indices\"} objects, got: %w", err)
	case tok == json.Delim('['):
		for dec.More() {
			var g struct {
				Name    string            `json:"name"`
				Indices []json.RawMessage `json:"indices"`
			}
			if err := dec.Decode(&g); err != nil {
				return nil, fmt.Errorf("group %d: expected an object {\"name\": \"...\", \"indices\": [...]}, got: %w", len(groups), err)
			}
			if g.Name == "" {
				return nil, fmt.Errorf("group %d has no name", len(groups))
			}
			groups = append(groups, groupSpec{g.Name, g.Indices})
		}
	case tok == json.Delim('{'):
		for dec.More() {
			key, err := dec.Token()
			if err != nil {
				return nil, fmt.Errorf("reading the groups: %w", err)
			}
			var members []json.RawMessage
			if err := dec.Decode(&members); err != nil {
				return nil, fmt.Errorf("group %q: expected an array of feature indices or names, got: %w", key, err)
			}
			groups = append(groups, groupSpec{key.(string), members})
		}
	default:
		return nil, fmt.Errorf("expected a JSON object of group names and their features, or an array of {\"name\", \"indices\"} objects, got %v", tok)
	}
	if _, err := dec.Token(); err != nil && !errors.Is(err, io.EOF) {
		return nil, fmt.Errorf("reading the groups: %w", err)
	}
	index := make(map[string]int, len(names))
	for i, name := range names {
		if _, dup := index[name]; !dup {
			index[name] = i
		}
	}
	out := make([]gradattr.Group, len(groups))
	for k, g := range groups {
		out[k] = gradattr.Group{Name: g.name, Indices: make([]int, len(g.members))}
		for j, m := range g.members {
			i, err := memberIndex(m, n, names, index)
			if err != nil {
				return nil, fmt.Errorf("group %q: %w", g.name, err)
			}
			out[k].Indices[j] = i
		}
	}
	return out, nil
}

// groupSpec is a group as the file gives it.
type groupSpec struct {
	name    string
	members []json.RawMessage
}

// memberIndex reads one feature of a group: an index below n, or a name.
func memberIndex(m json.RawMessage, n int, names []string, index map[string]int) (int, error) {
	var name string
	if json.Unmarshal(m, &name) == nil {
		i, ok := index[name]
		if !ok {
			if len(names) == 0 {
				return 0, fmt.Errorf("feature %q: the features have no names here; give indices from 0 to %d", name, n-1)
			}
			return 0, fmt.Errorf("no feature is called %q (features: %s)", name, strings.Join(names, ", "))
		}
		return i, nil
	}
	var v float64
	if err := json.Unmarshal(m, &v); err != nil || v != math.Trunc(v) {
		return 0, fmt.Errorf("expected a feature index or name, got %s", m)
	}
	if v < 0 || v >= float64(n) {
		return 0, fmt.Errorf("feature index %s is out of range: the sample has %d features, 0 to %d", strconv.FormatFloat(v, 'g', -1, 64), n, n-1)
	}
	return int(v), nil
}
