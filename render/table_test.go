package render

import (
	"bytes"
	"strconv"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/gradattr"
)

func TestTableStandardErrorsAndFit(t *testing.T) {
	// The table shows what the result holds: a surrogate's intercept and
	// weighted R², and, when a method reports them, a standard error
	// beside each attribution and each group's value, in the table's
	// five significant digits. The model is node/test_softmax_example
	// (ONNX backend test data 1.12.0).
	groups := []gradattr.Group{{Name: "first two", Indices: []int{0, 1}}, {Name: "last", Indices: []int{2}}}
	rep, _, _ := explainCase(t, "node/test_softmax_example", gradattr.MethodSurrogate, groups)
	res := rep.Explanations[0].Result
	require.NotNil(t, res.Surrogate)
	var buf bytes.Buffer
	require.NoError(t, Table(&buf, rep, Options{}))
	out := buf.String()
	assert.Contains(t, out, "surrogate: intercept "+Number(res.Surrogate.Intercept)+"  fidelity (weighted R²) "+Number(res.Surrogate.Fidelity)+"\n")
	assert.NotContains(t, out, "± s.e.", "no standard errors, no column")

	res.StandardErrors = []float64{0.125, 0.25, 0.5}
	rep.Explanations[0].Grouped.StandardErrors = []float64{0.0625, 0.03125}
	buf.Reset()
	require.NoError(t, Table(&buf, rep, Options{}))
	assert.Regexp(t, `(?m)^  feature\s+value\s+attribution\s+± s\.e\.$`, buf.String())
	for i, se := range []string{"0.125", "0.25", "0.5"} {
		// The features are named by index: the model has no names.
		assert.Regexp(t, `(?m)^  `+strconv.Itoa(i)+`\s+\S+\s+[-+]\S+\s+`+se+`\s`, buf.String())
	}
	assert.Regexp(t, `(?m)^  first two\s+[-+]\S+ ± 0\.0625\s`, buf.String())
	assert.Regexp(t, `(?m)^  last\s+[-+]\S+ ± 0\.03125\s`, buf.String())
}
