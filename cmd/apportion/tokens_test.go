package main

import (
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"codeberg.org/sbinet/npyio/npz"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

const (
	textModel = "../../testdata/reference/text_cnn.onnx"
	textVocab = "../../testdata/reference/text_cnn_vocab.txt"
)

// tokenDoc is the part of the explain document of a token model these
// tests read.
type tokenDoc struct {
	Settings     map[string]any `json:"settings"`
	Explanations []struct {
		Target       *int      `json:"target"`
		Outputs      []float64 `json:"outputs"`
		Attributions []float64 `json:"attributions"`
		Shape        []int     `json:"shape"`
		Tokens       []string  `json:"tokens"`
		Completeness *struct {
			Expected float64 `json:"expected"`
			OK       bool    `json:"ok"`
		} `json:"completeness"`
		Error *string `json:"error"`
	} `json:"explanations"`
}

// TestExplainTokensReference explains the text classifier of
// testdata/reference on its ten held-out sequences, given as JSON arrays
// of ids, against float64 torch.autograd (python3-torch 1.13.1): token
// integrated gradients at the embedding from zero embeddings and from the
// padding token's, summed over the embedding axis, and f(x) − f(baseline
// embeddings) as the completeness check's expected value.
func TestExplainTokensReference(t *testing.T) {
	z, err := npz.Open("../../testdata/reference/text_cnn.npz")
	require.NoError(t, err)
	defer z.Close()
	read := func(name string) []float64 {
		var v []float64
		require.NoError(t, z.Read(name+".npy", &v), name)
		return v
	}
	var ids []int64
	require.NoError(t, z.Read("ids.npy", &ids))
	rows := [][]int64{}
	for r := range 10 {
		rows = append(rows, ids[r*12:(r+1)*12])
	}
	raw, err := json.Marshal(rows)
	require.NoError(t, err)
	input := filepath.Join(t.TempDir(), "ids.json")
	require.NoError(t, os.WriteFile(input, raw, 0o644))
	vocab, err := os.ReadFile(textVocab)
	require.NoError(t, err)
	words := strings.Fields(string(vocab))

	for _, tc := range []struct {
		name string
		args []string
	}{{"zero", nil}, {"pad", []string{"-baseline-token", "0"}}} {
		args := append([]string{"explain", "-format", "json", "-model", textModel, "-vocab", textVocab, "-input", input, "-tolerance", "0.0005"}, tc.args...)
		code, out, errs := cli(t, args...)
		require.Equal(t, 0, code, errs)
		var doc tokenDoc
		require.NoError(t, json.Unmarshal([]byte(out), &doc))
		want, expected := read("token_ig_"+tc.name), read("ig_"+tc.name+"_expected")
		require.Len(t, doc.Explanations, 10)
		worst := 0.0
		for r, e := range doc.Explanations {
			require.Nil(t, e.Error)
			assert.Equal(t, []int{12}, e.Shape, "one attribution per token")
			require.Len(t, e.Attributions, 12)
			for i, id := range rows[r] {
				// the vocabulary file, id = line number
				assert.Equal(t, words[id], e.Tokens[i])
			}
			// float64 torch.autograd, the exact integral (2^15-point midpoint sum),
			// summed over the embedding axis; the float32 engine here
			d := relL1(e.Attributions, want[r*12:(r+1)*12])
			assert.LessOrEqual(t, d, 0.005, "%s baseline, row %d", tc.name, r)
			worst = max(worst, d)
			// f(x) − f(baseline embeddings) by float64 torch
			assert.InDelta(t, expected[r], e.Completeness.Expected, 1e-4, "%s baseline, row %d", tc.name, r)
			assert.True(t, e.Completeness.OK)
			if tc.name == "pad" {
				for i, id := range rows[r] {
					if id == 0 {
						// E = E′ at a padding position: exactly 0 (testdata/reference/README.md)
						assert.Zero(t, e.Attributions[i])
					}
				}
			}
		}
		t.Logf("%s baseline: worst relative L1 %.1e", tc.name, worst)
		if tc.name == "pad" {
			assert.EqualValues(t, 0, doc.Settings["baseline_token"])
		}
	}
}

func TestExplainTokensText(t *testing.T) {
	dir := t.TempDir()
	text := filepath.Join(dir, "notes.txt")
	// Words of text_cnn_vocab.txt (ids 1, 2 and 10), in mixed case.
	require.NoError(t, os.WriteFile(text, []byte("Mineze REMUFO\n\nkisuta\n"), 0o644))
	code, out, errs := cli(t, "explain", "-format", "json", "-model", textModel, "-vocab", textVocab, "-input", text)
	assert.Equal(t, 1, code, "the second text has a word the vocabulary lacks")
	var doc tokenDoc
	require.NoError(t, json.Unmarshal([]byte(out), &doc), errs)
	require.Len(t, doc.Explanations, 2, "the blank line is skipped")
	assert.Equal(t, []string{"mineze", "remufo", "[pad]"}, doc.Explanations[0].Tokens[:3])
	require.NotNil(t, doc.Explanations[1].Error)
	assert.Contains(t, *doc.Explanations[1].Error, `line 3: word "kisuta" is not in the vocabulary`)

	for _, tc := range []struct {
		args []string
		msg  string
	}{
		{[]string{"-baseline", "mean"}, "-baseline sets a baseline of the input's values; the baseline of a model of token ids is zero embeddings, or the embedding of -baseline-token"},
		{[]string{"-baseline-token", "40"}, "-baseline-token must be a token id from 0 to 39"},
		{[]string{"-baseline-token", "x"}, "-baseline-token must be a token id"},
	} {
		code, _, errs := cli(t, append([]string{"explain", "-model", textModel, "-vocab", textVocab, "-input", text}, tc.args...)...)
		assert.Equal(t, 2, code, tc.args)
		assert.Contains(t, errs, tc.msg)
	}
	code, _, errs = cli(t, "explain", "-model", textModel, "-input", text)
	assert.Equal(t, 1, code)
	assert.Contains(t, errs, "a text file needs a vocabulary")
}

func TestExplainTicketsDemoFormats(t *testing.T) {
	code, out, errs := cli(t, "explain", "-demo", "tickets", "-format", "json")
	require.Equal(t, 0, code, errs)
	var doc tokenDoc
	require.NoError(t, json.Unmarshal([]byte(out), &doc))
	e := doc.Explanations[0]
	// demo/data/tickets_sample.txt, its deciding word at position 3
	assert.Equal(t, "screeching", e.Tokens[3])
	assert.Equal(t, 3, argmax(e.Attributions), "the planted urgent word carries the largest attribution")

	code, out, errs = cli(t, "explain", "-demo", "tickets", "-format", "html")
	require.Equal(t, 0, code, errs)
	assert.True(t, strings.HasPrefix(out, "<!DOCTYPE html>"))
	assert.Contains(t, out, ">screeching<small>")
	assert.NotContains(t, out, "http", "self-contained: nothing fetched")

	png := filepath.Join(t.TempDir(), "note.png")
	code, _, errs = cli(t, "explain", "-demo", "tickets", "-format", "png", "-out", png)
	require.Equal(t, 0, code, errs)
	b, err := os.ReadFile(png)
	require.NoError(t, err)
	assert.Equal(t, "\x89PNG", string(b[:4]), "PNG signature (PNG specification, §5.2)")

	code, _, errs = cli(t, "explain", "-format", "html")
	assert.Equal(t, 1, code)
	assert.Contains(t, errs, "the page shows attributions per token")
}

func TestExplainTicketsGradCAM(t *testing.T) {
	code, out, errs := cli(t, "explain", "-demo", "tickets", "-method", "grad-cam", "-format", "json")
	require.Equal(t, 0, code, errs)
	var doc tokenDoc
	require.NoError(t, json.Unmarshal([]byte(out), &doc))
	e := doc.Explanations[0]
	assert.Equal(t, "conv.relu", doc.Settings["layer"], "the last value with a channel axis and places")
	require.Len(t, e.Attributions, 16, "one place per token")
	require.Len(t, e.Tokens, 16)
	// The convolution's kernel of 3 (demo/data/README.md) lets place p see
	// tokens p − 1 to p + 1: the planted word, at 3, is in the receptive
	// field of the map's largest place.
	top := argmax(e.Attributions)
	assert.LessOrEqual(t, top-1, 3)
	assert.GreaterOrEqual(t, top+1, 3)
}
