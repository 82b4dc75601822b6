package gradattr

import (
	"bytes"
	"errors"
	"math"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestTokenSummaryStudentInterval checks a token's mean and interval
// against a hand computation: the attributions 1, 2, 3, 4, 5 of token "x"
// have mean 3 and sample sd √2.5; t_{0.975, 4} = 2.7764 (the standard
// t table, e.g. Fisher & Yates, Statistical Tables, Table III, 4 degrees
// of freedom, two-sided 0.05; the digits from memory), so the 95% interval
// is 3 ± 2.7764·√2.5/√5 = 3 ± 1.9632 (Student 1908).
func TestTokenSummaryStudentInterval(t *testing.T) {
	s, err := NewTokenSummary(TokenSummaryOptions{Model: "m", Method: MethodIntegratedGradients})
	require.NoError(t, err)
	require.NoError(t, s.Add(0, "", []string{"x", "x", "x", "y"}, []float64{1, -2, 3, 7}))
	require.NoError(t, s.Add(1, "", []string{"x", "x"}, []float64{4, 5}))
	var x, y TokenStats
	for _, ts := range s.Overall().Tokens {
		switch ts.Token {
		case "x":
			x = ts
		case "y":
			y = ts
		}
	}
	assert.Equal(t, int64(5), x.Count)
	assert.InDelta(t, 11.0/5, x.Mean, 1e-15)
	assert.InDelta(t, 3.0, x.MeanAbs, 1e-15)
	// |a| = 1..5: sd √2.5, half-width 2.7764·√0.5.
	half := 2.7764 * math.Sqrt(2.5) / math.Sqrt(5)
	require.NotNil(t, x.MeanAbsLo)
	assert.InDelta(t, 3-half, *x.MeanAbsLo, 1e-4)
	assert.InDelta(t, 3+half, *x.MeanAbsHi, 1e-4)
	// a = 1, −2, 3, 4, 5: Σa² = 55, sd = √((55 − 5·2.2²)/4).
	sd := math.Sqrt((55 - 5*2.2*2.2) / 4)
	assert.InDelta(t, sd, x.SD, 1e-12)
	assert.InDelta(t, 2.2-2.7764*sd/math.Sqrt(5), *x.MeanLo, 1e-4)
	// One occurrence has no interval.
	assert.Equal(t, int64(1), y.Count)
	assert.Nil(t, y.MeanLo)
	assert.Equal(t, "y", s.Overall().Ranked()[0].Token) // mean |a| 7 > 3
}

// TestTokenSummaryMerge checks exact merging in any split, and the
// refusals: a shared row key, other settings.
func TestTokenSummaryMerge(t *testing.T) {
	rows := [][]float64{{0.1, 1e-17, -0.3}, {1e16, 1, -1e16}, {0.7, 0.2, 0.1}, {-0.5, 0.25, 3}}
	toks := [][]string{{"a", "b", "a"}, {"b", "c", "b"}, {"a", "a", "[pad]"}, {"c", "b", "[pad]"}}
	opt := TokenSummaryOptions{Model: "m", Method: MethodIntegratedGradients, GroupBy: "g", Padding: "[pad]"}
	build := func(keys ...int) *TokenSummary {
		s, err := NewTokenSummary(opt)
		require.NoError(t, err)
		for _, k := range keys {
			require.NoError(t, s.Add(uint64(k), []string{"u", "v"}[k%2], toks[k], rows[k]))
		}
		return s
	}
	whole := build(0, 1, 2, 3)
	a, b := build(3, 1), build(2, 0)
	require.NoError(t, a.Merge(b))
	want, err := whole.MarshalJSON()
	require.NoError(t, err)
	got, err := a.MarshalJSON()
	require.NoError(t, err)
	assert.Equal(t, string(want), string(got))

	err = a.Merge(build(2))
	assert.True(t, errors.Is(err, ErrMismatch))
	other, err := NewTokenSummary(TokenSummaryOptions{Model: "m", Method: MethodGradient, GroupBy: "g", Padding: "[pad]"})
	require.NoError(t, err)
	assert.ErrorIs(t, whole.Merge(other), ErrMismatch)

	// A feature summary's document is not a token summary's.
	fs, err := NewSummary(SummaryOptions{Features: []string{"f"}})
	require.NoError(t, err)
	raw, err := fs.MarshalJSON()
	require.NoError(t, err)
	_, err = DecodeTokenSummary(bytes.NewReader(raw))
	require.Error(t, err)
	assert.True(t, strings.Contains(err.Error(), TokenSummaryFormat))
	f, err := SummaryDocumentFormat(got)
	require.NoError(t, err)
	assert.Equal(t, TokenSummaryFormat, f)
}
