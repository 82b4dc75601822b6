package main

import (
	"fmt"
	"math"
	"sort"

	"github.com/apportion/apportion/onnxlite"
)

// rows is the batch of every whole-model case (declared as the symbolic
// dimension "N").
const rows = 3

// newModel starts a whole-model case under model/, with seeded weights and a
// symbolic batch.
func newModel(name string, opset int64, checks string) *kase {
	c := newCase(name, opset, wholeModel, "", checks)
	c.group = "model"
	c.batch = rows
	return c
}

// finish lists the operators the model uses and names the opset's
// revision of each.
func (c *kase) finish() *kase {
	seen := map[string]bool{}
	for _, n := range c.g.Nodes {
		seen[n.OpType] = true
	}
	c.ops = c.ops[:0]
	for op := range seen {
		c.ops = append(c.ops, op)
	}
	sort.Strings(c.ops)
	c.revision = fmt.Sprintf("opset %d", c.opset)
	return c
}

// dense adds Gemm(x, W, b) with W stored as (out, in) and transB = 1, as
// PyTorch exports nn.Linear.
func (c *kase) dense(x, name string, in, out int64) string {
	return c.op("Gemm", name, []string{x, c.weights(name+".weight", in, out, in), c.randInit(name+".bias", -0.1, 0.1, out)}, attrInt("transB", 1))
}

// conv adds a 2-D or 1-D convolution with bias and the given padding.
func (c *kase) conv(x, name string, cin, cout int64, kernel []int64, pads ...int64) string {
	fan := cin
	for _, k := range kernel {
		fan *= k
	}
	w := c.weights(name+".weight", fan, append([]int64{cout, cin}, kernel...)...)
	return c.op("Conv", name, []string{x, w, c.randInit(name+".bias", -0.1, 0.1, cout)}, attrInts("kernel_shape", kernel...), attrInts("pads", pads...))
}

// layerNorm adds LayerNormalization over the last axis with seeded scale
// and bias.
func (c *kase) layerNorm(x, name string, n int64) string {
	return c.op("LayerNormalization", name, []string{x, c.randInit(name+".weight", 0.8, 1.2, n), c.randInit(name+".bias", -0.1, 0.1, n)}, attrFloat("epsilon", 1e-5))
}

// erfGelu adds GELU written out as PyTorch 1.13 exports nn.GELU() below
// opset 20: x · 0.5 · (1 + erf(x / √2)) as Div, Erf, Add, Mul, Mul.
func (c *kase) erfGelu(x, name string) string {
	d := c.op("Div", name+".div", []string{x, c.scalar(name+".sqrt2", float32(math.Sqrt2))})
	e := c.op("Erf", name+".erf", []string{d})
	a := c.op("Add", name+".add", []string{e, c.scalar(name+".one", 1)})
	m := c.op("Mul", name+".mul", []string{x, a})
	return c.op("Mul", name, []string{m, c.scalar(name+".half", 0.5)})
}

// tokenIDs returns rows×length token ids in [1, vocab) with a trailing run of
// padding id 0 in every row but the first.
func (c *kase) tokenIDs(length, vocab int64) []int64 {
	ids := make([]int64, rows*length)
	for r := int64(0); r < rows; r++ {
		pad := r // row r ends in r padding tokens
		for j := int64(0); j < length; j++ {
			if j >= length-pad {
				continue
			}
			ids[r*length+j] = 1 + int64(c.rng.IntN(int(vocab-1)))
		}
	}
	return ids
}

// modelCases are small whole models with seeded weights, at opsets 18, 21
// and 26.
func modelCases() []*kase {
	var cs []*kase

	// A residual MLP with LayerNormalization and GELU, as PyTorch 1.13
	// exports it (GELU through Erf), declared at 18.
	c := newModel("mlp_residual_layernorm_gelu_opset18", 18,
		"x (N, 16) -> Linear 32 -> LayerNorm -> GELU (Erf form) -> [Linear 32 -> + residual] -> LayerNorm -> Linear 3 -> Softmax")
	h := c.erfGelu(c.layerNorm(c.dense(c.floatIn("x", rows, 16), "fc1", 16, 32), "ln1", 32), "gelu1")
	h = c.layerNorm(c.op("Add", "residual", []string{h, c.dense(h, "fc2", 32, 32)}), "ln2", 32)
	c.op("Softmax", "probs", []string{c.dense(h, "head", 32, 3)}, attrInt("axis", -1))
	c.out(f32, "probs")
	cs = append(cs, c.finish())

	// The same architecture at 26 with the Gelu operator: exact in the first
	// block, tanh in the second.
	c = newModel("mlp_residual_layernorm_gelu_opset26", 26,
		"x (N, 16) -> Linear 32 -> LayerNorm -> Gelu -> two residual blocks [Linear 32 -> Gelu (none, then tanh) -> + residual -> LayerNorm] -> Linear 3 -> Softmax")
	h = c.op("Gelu", "gelu0", []string{c.layerNorm(c.dense(c.floatIn("x", rows, 16), "fc0", 16, 32), "ln0", 32)})
	for i, approx := range []string{"none", "tanh"} {
		n := fmt.Sprintf("block%d", i+1)
		g := c.op("Gelu", n+".gelu", []string{c.dense(h, n+".fc", 32, 32)}, attrString("approximate", approx))
		h = c.layerNorm(c.op("Add", n+".residual", []string{h, g}), n+".ln", 32)
	}
	c.op("Softmax", "probs", []string{c.dense(h, "head", 32, 3)}, attrInt("axis", -1))
	c.out(f32, "probs")
	cs = append(cs, c.finish())

	// A small CNN with Resize: nearest upsampling as PyTorch exports
	// nn.Upsample(scale_factor=2) (asymmetric, floor), then a bilinear
	// half-pixel downsampling.
	c = newModel("cnn_resize_opset21", 21,
		"x (N, 1, 8, 8) -> Conv 4 -> Relu -> MaxPool 2 -> Conv 6 -> Relu -> Resize x2 nearest (asymmetric, floor) -> Conv 4 -> Relu -> Resize x0.5 linear (half_pixel) -> GlobalAveragePool -> Flatten -> Gemm 3")
	h = c.op("Relu", "relu1", []string{c.conv(c.floatInRange("x", 0, 1, rows, 1, 8, 8), "conv1", 1, 4, []int64{3, 3}, 1, 1, 1, 1)})
	h = c.op("MaxPool", "pool1", []string{h}, attrInts("kernel_shape", 2, 2), attrInts("strides", 2, 2))
	h = c.op("Relu", "relu2", []string{c.conv(h, "conv2", 4, 6, []int64{3, 3}, 1, 1, 1, 1)})
	h = c.op("Resize", "up", []string{h, "", c.floats("up.scales", []int64{4}, 1, 1, 2, 2)},
		attrString("mode", "nearest"), attrString("coordinate_transformation_mode", "asymmetric"), attrString("nearest_mode", "floor"))
	h = c.op("Relu", "relu3", []string{c.conv(h, "conv3", 6, 4, []int64{3, 3}, 1, 1, 1, 1)})
	h = c.op("Resize", "down", []string{h, "", c.floats("down.scales", []int64{4}, 1, 1, 0.5, 0.5)}, attrString("mode", "linear"))
	h = c.op("Flatten", "flat", []string{c.op("GlobalAveragePool", "gap", []string{h})})
	c.dense(h, "logits", 4, 3)
	c.out(f32, "logits")
	cs = append(cs, c.finish())

	// An embedding + mean-pool text classifier: int64 token ids feed Gather.
	c = newModel("text_embedding_meanpool_opset18", 18,
		"ids (N, 6) int64 in [0, 20), 0 the padding id -> Gather from a 20x8 embedding table -> ReduceMean over the tokens (axes input [1], keepdims 0) -> Linear 8 -> Relu -> Linear 3")
	emb := c.op("Gather", "embedding", []string{c.randInit("embedding.weight", -1, 1, 20, 8), c.int64In("ids", "indices", []int64{rows, 6}, c.tokenIDs(6, 20))})
	h = c.op("ReduceMean", "pool", []string{emb, c.ints("pool.axes", 1)}, attrInt("keepdims", 0))
	h = c.op("Relu", "relu", []string{c.dense(h, "fc1", 8, 8)})
	c.dense(h, "logits", 8, 3)
	c.out(f32, "logits")
	cs = append(cs, c.finish())

	// An embedding + 1-D convolution text classifier with max-over-time
	// pooling (ReduceMax with an axes input), declared at 26.
	c = newModel("text_embedding_conv1d_opset26", 26,
		"ids (N, 7) int64 in [0, 20) -> Gather from a 20x8 table -> Transpose to (N, 8, 7) -> Conv1d 6, kernel 3, pad 1 -> Relu -> ReduceMax over time (axes [2], keepdims 0) -> Linear 3")
	emb = c.op("Gather", "embedding", []string{c.randInit("embedding.weight", -1, 1, 20, 8), c.int64In("ids", "indices", []int64{rows, 7}, c.tokenIDs(7, 20))})
	h = c.op("Transpose", "channels_first", []string{emb}, attrInts("perm", 0, 2, 1))
	h = c.op("Relu", "relu", []string{c.conv(h, "conv", 8, 6, []int64{3}, 1, 1)})
	h = c.op("ReduceMax", "pool", []string{h, c.ints("pool.axes", 2)}, attrInt("keepdims", 0))
	c.dense(h, "logits", 6, 3)
	c.out(f32, "logits")
	cs = append(cs, c.finish())

	// A conv net whose reflection-pad amounts come from the all-constant
	// chain PyTorch 1.13 emits for nn.ReflectionPad2d((1, 2, 1, 0)):
	// ConstantOfShape -> Concat -> Reshape -> Slice (step -1) -> Transpose ->
	// Reshape -> Cast, node for node (checked against torch.onnx.export).
	c = newModel("cnn_reflect_pad_chain_opset18", 18,
		"x (N, 1, 8, 8) -> Pad reflect with pads (left 1, right 2, top 1, bottom 0) computed by the constant chain ConstantOfShape -> Concat -> Reshape -> Slice (step -1) -> Transpose -> Reshape -> Cast -> Conv 4 (3x3) -> Relu -> GlobalAveragePool -> Flatten -> Gemm 3")
	pads := c.reflectPadChain("pad", 4, 1, 2, 1, 0)
	h = c.op("Pad", "pad", []string{c.floatInRange("x", 0, 1, rows, 1, 8, 8), pads}, attrString("mode", "reflect"))
	h = c.op("Relu", "relu", []string{c.conv(h, "conv", 1, 4, []int64{3, 3}, 0, 0, 0, 0)})
	h = c.op("Flatten", "flat", []string{c.op("GlobalAveragePool", "gap", []string{h})})
	c.dense(h, "logits", 4, 3)
	c.out(f32, "logits")
	cs = append(cs, c.finish())
	return cs
}

// reflectPadChain adds the constant chain torch.onnx.export (1.13, opset 17)
// emits for the pads of F.pad(x, torch_pads, mode="reflect") on a rank-rank
// input and returns its output, the ONNX pads [x1_begin, ..., x1_end, ...].
// torch_pads lists (begin, end) pairs from the last axis backwards.
func (c *kase) reflectPadChain(name string, rank int64, torchPads ...int64) string {
	k := func(v *onnxlite.Tensor, out string) string {
		v.Name = ""
		return c.op("Constant", out, nil, attrTensor("value", v))
	}
	i64 := func(v ...int64) *onnxlite.Tensor {
		return &onnxlite.Tensor{DType: onnxlite.Int64, Dims: []int64{int64(len(v))}, Data: v}
	}
	n := k(i64(2*rank-int64(len(torchPads))), name+".zeros_len")
	given := k(i64(torchPads...), name+".torch_pads")
	zeros := c.op("ConstantOfShape", name+".zeros", []string{n}, attrTensor("value", &onnxlite.Tensor{DType: onnxlite.Int64, Dims: []int64{1}, Data: []int64{0}}))
	all := c.op("Concat", name+".concat", []string{given, zeros}, attrInt("axis", 0))
	pairs := c.op("Reshape", name+".pairs", []string{all, k(i64(-1, 2), name+".pairs_shape")}, attrInt("allowzero", 0))
	rev := c.op("Slice", name+".reversed", []string{pairs, k(i64(-1), name+".slice_starts"), k(i64(-math.MaxInt64), name+".slice_ends"),
		k(i64(0), name+".slice_axes"), k(i64(-1), name+".slice_steps")})
	tr := c.op("Transpose", name+".begin_end", []string{rev}, attrInts("perm", 1, 0))
	flat := c.op("Reshape", name+".flat", []string{tr, k(i64(-1), name+".flat_shape")}, attrInt("allowzero", 0))
	return c.op("Cast", name+".pads", []string{flat}, attrInt("to", int64(onnxlite.Int64)))
}
