package explain_test

import (
	"bytes"
	"context"
	"testing"

	"codeberg.org/sbinet/npyio/npy"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/apportion/apportion/demo"
	"github.com/apportion/apportion/explain"
	"github.com/apportion/apportion/gradattr"
	"github.com/apportion/apportion/samples"
)

// TestTicketsPlantedWord checks the tickets demo against its generator:
// for every held-out urgent note, integrated gradients of the urgent
// probability (from zero embeddings, per token) are largest at the
// deciding word the generator planted (tickets_test_truth.npy, written by
// examples/train). README reports the figure.
func TestTicketsPlantedWord(t *testing.T) {
	st := explain.Defaults()
	require.NoError(t, st.Set(explain.FieldTarget, "0")) // urgent
	ex, b, truth := ticketNotes(t, st)
	urgent, hits, incomplete := 0, 0, 0
	for i := range b.Samples {
		if truth[2*i] != 0 {
			continue
		}
		urgent++
		r, err := ex.Attribute(context.Background(), b.Sample(i))
		require.NoError(t, err)
		require.Equal(t, []int{16}, r.Shape)
		if gradattr.Top(r.Attributions) == int(truth[2*i+1]) {
			hits++
		}
		if !r.Completeness.OK {
			incomplete++
		}
	}
	t.Logf("planted word carries the largest attribution in %d of %d held-out urgent notes (%.1f%%); %d incomplete", hits, urgent, 100*float64(hits)/float64(urgent), incomplete)
	assert.Equal(t, 201, urgent, "demo/data/README.md")
	assert.GreaterOrEqual(t, float64(hits), 0.9*float64(urgent))
}

// ticketNotes reads the tickets demo's held-out notes and their truth
// (tickets_test_truth.npy: per note its class and the position of its
// planted word), with an explainer of the model by st.
func ticketNotes(t *testing.T, st explain.Settings) (*explain.Explainer, *samples.Batch, []int64) {
	t.Helper()
	s, err := demo.Get("tickets")
	require.NoError(t, err)
	m, err := explain.Decode(s.Model, "tickets.onnx", explain.DecodeOptions{})
	require.NoError(t, err)
	spec, err := m.Input()
	require.NoError(t, err)
	text, err := demo.File("tickets_test.txt")
	require.NoError(t, err)
	b, err := samples.Read(bytes.NewReader(text), "tickets_test.txt", spec, m.ReadOptions(false))
	require.NoError(t, err)
	raw, err := demo.File("tickets_test_truth.npy")
	require.NoError(t, err)
	var truth []int64
	require.NoError(t, npy.Read(bytes.NewReader(raw), &truth))
	require.Equal(t, 2*b.Samples, len(truth))
	require.NoError(t, m.Compile(explain.CompileOptions{}))
	head, err := m.Head("", false)
	require.NoError(t, err)
	ex, err := explain.New(m, head, st)
	require.NoError(t, err)
	return ex, b, truth
}
