package explain_test

import (
	"bytes"
	"context"
	"slices"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// ticketRows reads the tickets demo's held-out notes as rows grouped by
// their true class, with an explainer of the predicted class by the
// default method, integrated gradients at the embedding.
func ticketRows(t *testing.T) (*explain.Explainer, []samples.Row) {
	t.Helper()
	ex, b, truth := ticketNotes(t, explain.Defaults())
	rows := make([]samples.Row, b.Samples)
	classes := []string{"urgent", "routine", "informational"} // demo/data/README.md
	for i := range rows {
		rows[i] = samples.Row{Values: b.Sample(i), Group: classes[truth[2*i]]}
	}
	return ex, rows
}

func summarizeTickets(t *testing.T, ex *explain.Explainer, rows []samples.Row, first uint64) *gradattr.TokenSummary {
	t.Helper()
	opt, err := ex.TokenSummaryOptions("class")
	require.NoError(t, err)
	s, err := gradattr.NewTokenSummary(opt)
	require.NoError(t, err)
	skipped, err := ex.SummarizeTokens(context.Background(), rows, s, explain.SummarizeOptions{FirstKey: first})
	require.NoError(t, err)
	require.Empty(t, skipped)
	return s
}

// TestTicketsTokenSummary checks the summary per token string of the
// tickets demo's held-out notes against the generator (demo/data/README.md:
// every urgent note holds one of ten planted urgent words, which alone
// decide its class): among the tokens seen at least 5 times in the urgent
// notes, the one of largest mean attribution is a planted urgent word.
// It also checks that the summary of all notes equals, byte for byte in
// JSON, the merge of the summaries of its two halves (exact sums).
func TestTicketsTokenSummary(t *testing.T) {
	ex, rows := ticketRows(t)
	whole := summarizeTickets(t, ex, rows, 0)
	assert.Equal(t, "[pad]", whole.Options().Padding)

	// demo/data/README.md, the urgent deciding words.
	planted := []string{"leaking", "smoking", "seized", "sparking", "flooding", "overheating", "cracked", "burst", "tripped", "screeching"}
	var urgent gradattr.TokenGroupStats
	for _, g := range whole.Groups() {
		if g.Name == "urgent" {
			urgent = g
		}
	}
	assert.Equal(t, int64(201), urgent.Rows, "demo/data/README.md: 201 held-out urgent notes")
	var top *gradattr.TokenStats
	for i, ts := range urgent.Tokens {
		if ts.Count >= 5 && (top == nil || ts.Mean > top.Mean) {
			top = &urgent.Tokens[i]
		}
	}
	require.NotNil(t, top)
	t.Logf("urgent notes: top token by mean attribution %q (%d occurrences, mean %.4g)", top.Token, top.Count, top.Mean)
	assert.Contains(t, planted, top.Token)
	require.NotNil(t, top.MeanLo)
	assert.Less(t, *top.MeanLo, top.Mean)

	half := len(rows) / 2
	a := summarizeTickets(t, ex, rows[:half], 0)
	b := summarizeTickets(t, ex, rows[half:], uint64(half))
	require.NoError(t, b.Merge(a))
	want, err := whole.MarshalJSON()
	require.NoError(t, err)
	got, err := b.MarshalJSON()
	require.NoError(t, err)
	assert.True(t, bytes.Equal(want, got), "summary of all notes and merge of its halves differ")

	// The document reads back to the same bytes.
	back, err := gradattr.DecodeTokenSummary(bytes.NewReader(got))
	require.NoError(t, err)
	again, err := back.MarshalJSON()
	require.NoError(t, err)
	assert.True(t, slices.Equal(got, again))
}
