package samples

import (
	"bufio"
	"fmt"
	"io"
	"math"
	"slices"
	"strings"
)

// The tokens a vocabulary may name for a word it lacks and for padding, in
// the spellings in common use (common practice).
var (
	unknownTokens = []string{"[unk]", "<unk>", "[UNK]", "<UNK>"}
	paddingTokens = []string{"[pad]", "<pad>", "[PAD]", "<PAD>"}
)

// Vocabulary maps the words of a text to the token ids of a model: id i is
// Tokens[i].
type Vocabulary struct {
	Tokens []string
	ids    map[string]int
	// Unknown is the id words the vocabulary lacks take, -1 when it names
	// no unknown-word token; Padding the id that fills a text to the
	// model's length (the padding token's, else 0).
	Unknown, Padding int
}

// NewVocabulary indexes tokens. The unknown-word token is the first of
// [unk], <unk>, [UNK], <UNK> the vocabulary holds; the padding token the
// first of [pad], <pad>, [PAD], <PAD>, else id 0.
func NewVocabulary(tokens []string) *Vocabulary {
	v := &Vocabulary{Tokens: tokens, ids: make(map[string]int, len(tokens)), Unknown: -1}
	for i, t := range tokens {
		if _, ok := v.ids[t]; !ok {
			v.ids[t] = i
		}
	}
	find := func(names []string) int {
		for _, n := range names {
			if id, ok := v.ids[n]; ok {
				return id
			}
		}
		return -1
	}
	v.Unknown = find(unknownTokens)
	v.Padding = max(find(paddingTokens), 0)
	return v
}

// ReadVocabulary reads a vocabulary file: one token per line, id = line
// number from 0 (a final newline ends the last line, it does not start
// another).
func ReadVocabulary(r io.Reader) (*Vocabulary, error) {
	raw, err := io.ReadAll(r)
	if err != nil {
		return nil, err
	}
	text := strings.TrimSuffix(strings.ReplaceAll(string(raw), "\r\n", "\n"), "\n")
	if text == "" {
		return nil, fmt.Errorf("the vocabulary is empty: expected one token per line")
	}
	return NewVocabulary(strings.Split(text, "\n")), nil
}

// Token names id: its token, or #id outside the vocabulary.
func (v *Vocabulary) Token(id int) string {
	if v != nil && id >= 0 && id < len(v.Tokens) {
		return v.Tokens[id]
	}
	return fmt.Sprintf("#%d", id)
}

// Words splits a text into its words as the tokeniser does: lower-cased,
// at white space.
func Words(text string) []string {
	return strings.Fields(strings.ToLower(text))
}

// IDs returns the token ids of text, padded to length with the padding
// id: each word (see Words) is its token's id, or the unknown-word id.
func (v *Vocabulary) IDs(text string, length int) ([]float64, error) {
	words := Words(text)
	if len(words) > length {
		return nil, fmt.Errorf("%d words, more than the %d tokens the model reads", len(words), length)
	}
	ids := make([]float64, length)
	for i := range ids {
		ids[i] = float64(v.Padding)
	}
	for i, w := range words {
		id, ok := v.ids[w]
		if !ok {
			if v.Unknown < 0 {
				return nil, fmt.Errorf("word %q is not in the vocabulary, which names no unknown-word token (one of %s)", w, strings.Join(unknownTokens, ", "))
			}
			id = v.Unknown
		}
		ids[i] = float64(id)
	}
	return ids, nil
}

// ReadText reads texts, one per line (blank lines are skipped), as token
// ids of spec, whose per-sample shape must be [L]: each text is split
// into words (see Words) and padded to L. A text that cannot be read (too
// long, a word the vocabulary lacks with no unknown-word token) is a bad
// sample.
func ReadText(r io.Reader, spec Spec, vocab *Vocabulary) (*Batch, error) {
	if vocab == nil {
		return nil, fmt.Errorf("a text file needs a vocabulary: the model carries none; give one, one token per line")
	}
	shape, ok := spec.FixedSample()
	if !ok || len(shape) != 1 {
		return nil, fmt.Errorf("a text file is read as one sequence of token ids per line, and input %q takes samples of shape %s", spec.Name, ShapeString(shape))
	}
	length := shape[0]
	b := &Batch{Bad: map[int]error{}}
	sc := bufio.NewScanner(r)
	sc.Buffer(make([]byte, 64<<10), MaxBytes)
	line := 0
	for sc.Scan() {
		line++
		text := sc.Text()
		if strings.TrimSpace(text) == "" {
			continue
		}
		ids, err := vocab.IDs(text, length)
		if err != nil {
			ids = slices.Repeat([]float64{math.NaN()}, length)
			b.MarkBad(b.Samples, fmt.Errorf("line %d: %w", line, err))
		}
		b.Data = append(b.Data, ids...)
		b.Samples++
	}
	if err := sc.Err(); err != nil {
		return nil, err
	}
	if b.Samples == 0 {
		return nil, fmt.Errorf("expected at least one line of text, got none")
	}
	b.Shape = []int{b.Samples, length}
	return b, nil
}
