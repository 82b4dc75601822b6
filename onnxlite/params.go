package onnxlite

// The parameters of a node of a Static graph, resolved the way its shape
// rule resolved them: what an engine needs to compute the node without
// reading the ONNX revisions again.

// ctx returns the inference context of node n of s.
func (s *Static) ctx(n *Node) *nodeCtx {
	idx := -1
	for i, m := range s.Model.Graph.Nodes {
		if m == n {
			idx = i
			break
		}
	}
	c := &nodeCtx{n: n, idx: idx, opset: s.Model.OpsetVersion(""),
		in: make([]*ValueShape, len(n.Inputs)), consts: make([]*Tensor, len(n.Inputs))}
	for i, name := range n.Inputs {
		if name == "" {
			continue
		}
		if v, ok := s.Values[name]; ok {
			c.in[i] = &v
		}
		c.consts[i] = s.Consts[name]
	}
	return c
}

// SliceParams returns the geometry of Slice node n.
func (s *Static) SliceParams(n *Node) (SliceParams, error) {
	c := s.ctx(n)
	if _, err := c.need(0); err != nil {
		return SliceParams{}, err
	}
	return sliceParams(c)
}

// SplitSizes returns the axis of Split node n and the length of each part
// along it, one per output.
func (s *Static) SplitSizes(n *Node) (axis int, sizes []int, err error) {
	c := s.ctx(n)
	if _, err := c.need(0); err != nil {
		return 0, nil, err
	}
	return splitSizes(c)
}

// ResizeParams returns the geometry of Resize or Upsample node n.
func (s *Static) ResizeParams(n *Node) (ResizeParams, error) {
	c := s.ctx(n)
	if _, err := c.need(0); err != nil {
		return ResizeParams{}, err
	}
	return resizeParams(c)
}

// Pads returns the pads of Pad node n, two per axis of its data (the begins,
// then the ends), with the axes input of opset 18 applied.
func (s *Static) Pads(n *Node) ([]int, error) {
	c := s.ctx(n)
	x, err := c.need(0)
	if err != nil {
		return nil, err
	}
	p, err := padsOf(c, len(x.Shape))
	if err != nil {
		return nil, err
	}
	out := make([]int, len(p))
	for i, v := range p {
		out[i] = int(v)
	}
	return out, nil
}

// ReduceAxes returns the axes Reduce* node n reduces, in [0, rank) and in
// the order given; every axis when it names none. noop reports a node that
// is the identity (no axes and noop_with_empty_axes=1).
func (s *Static) ReduceAxes(n *Node) (axes []int, noop bool, err error) {
	c := s.ctx(n)
	if _, err := c.need(0); err != nil {
		return nil, false, err
	}
	return reduceAxes(c)
}
