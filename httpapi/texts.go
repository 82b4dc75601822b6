package httpapi

import (
	"bytes"
	"cmp"
	"encoding/json"
	"fmt"

	"github.com/apportion/apportion/samples"
)

// textInputs reads "inputs" given as one text, or an array of texts, for a
// model of token ids: each text is split into words and mapped to the ids
// of the model's vocabulary (its metadata, or serve -vocab) as the command
// line reads a .txt file's lines (samples.Vocabulary.IDs). ok is false when
// inputs are not texts. A text that cannot be read (more words than the
// model reads, a word the vocabulary lacks with no unknown-word token) is
// a bad sample, left out of the answer; the request fails only when every
// text does.
func (h *Handler) textInputs(inputs json.RawMessage) (b *samples.Batch, ok bool, herr *httpError) {
	raw := bytes.TrimSpace(inputs)
	var texts []string
	switch {
	case len(raw) > 0 && raw[0] == '"':
		var t string
		if err := json.Unmarshal(raw, &t); err != nil {
			return nil, true, badRequest(`"inputs": %v`, err)
		}
		texts = []string{t}
	case len(raw) > 0 && raw[0] == '[':
		if first := bytes.TrimSpace(raw[1:]); len(first) == 0 || first[0] != '"' {
			return nil, false, nil
		}
		if err := json.Unmarshal(raw, &texts); err != nil {
			return nil, true, badRequest(`"inputs": expected an array of texts: %v`, err)
		}
		if h.opt.MaxSamples > 0 && len(texts) > h.opt.MaxSamples {
			return nil, true, h.tooManySamples()
		}
	default:
		return nil, false, nil
	}
	vocab := h.model.Vocabulary()
	if vocab == nil {
		return nil, true, badRequest(`"inputs" holds texts, but the model carries no vocabulary to read them with: give the server one (serve -vocab FILE), or send token ids`)
	}
	shape, fixed := h.spec.FixedSample()
	if !fixed || len(shape) != 1 {
		return nil, true, badRequest(`"inputs" holds texts, read as one sequence of token ids each, and input %q takes samples of shape %s`, h.spec.Name, samples.ShapeString(shape))
	}
	b = &samples.Batch{Name: "request", Shape: []int{len(texts), shape[0]}, Samples: len(texts)}
	var first error
	for n, t := range texts {
		ids, err := vocab.IDs(t, shape[0])
		if err != nil {
			err = fmt.Errorf(`"inputs"[%d] (for %q): %w`, n, h.spec.Name, err)
			first = cmp.Or(first, err)
			b.MarkBad(n, err)
			ids = nanSample(shape[0])
		}
		b.Data = append(b.Data, ids...)
	}
	if len(texts) == 0 || len(b.Bad) == b.Samples {
		if first == nil {
			first = fmt.Errorf(`"inputs" holds no text`)
		}
		return nil, true, badRequest("%v", first)
	}
	return b, true, nil
}
