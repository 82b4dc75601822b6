package nn

import (
	"context"
	"reflect"
	"sync"
	"testing"
	_ "unsafe" // go:linkname

	"github.com/stretchr/testify/require"
	G "gorgonia.org/gorgonia"
)

// gorgonia's package-level constants 1, which G.Grad seeds the backward
// pass with.
var (
	//go:linkname gorgoniaOne32 gorgonia.org/gorgonia.onef32
	gorgoniaOne32 *G.Node
	//go:linkname gorgoniaOne64 gorgonia.org/gorgonia.onef64
	gorgoniaOne64 *G.Node
)

func TestBuildTouchesNoSharedGorgoniaNode(t *testing.T) {
	// Machines are built on the goroutines of the calls that need them,
	// several at once. Node.Hashcode (gorgonia v0.9.18, node.go) caches a
	// node's hash in the node on first use, unsynchronised, and G.Grad
	// hashes gorgonia's package-level constant 1 each time it seeds a
	// backward pass: so machines must seed their own. Gradient programs
	// of both element types, built concurrently, leave those shared nodes
	// as the package left them (no cached hash).
	hashed := func(n *G.Node) bool { return reflect.ValueOf(n).Elem().FieldByName("hashed").Bool() }
	require.False(t, hashed(gorgoniaOne32), "a test before this one hashed gorgonia's constant")
	require.False(t, hashed(gorgoniaOne64), "a test before this one hashed gorgonia's constant")
	var wg sync.WaitGroup
	for _, dt := range []DType{Float32, Float64} {
		nw, err := Compile(cnnModel(42), Options{DType: dt, Machines: 3})
		require.NoError(t, err)
		h, err := nw.Head(Selection{})
		require.NoError(t, err)
		for c := 0; c < 3; c++ {
			wg.Add(1)
			go func() {
				defer wg.Done()
				x := make([]float64, 2*prod(h.InputShape()))
				_, _, err := h.Gradient(context.Background(), x, 2, []int{0, 1})
				require.NoError(t, err)
			}()
		}
	}
	wg.Wait()
	require.False(t, hashed(gorgoniaOne32), "float32 seed")
	require.False(t, hashed(gorgoniaOne64), "float64 seed")
}
