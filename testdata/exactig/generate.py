#!/usr/bin/python3
"""Exact integrated-gradients fixtures for apportion's tests, from float64 torch.

For each case (a model, a sample x, a baseline x' and a target output t) it
computes, in float64 on the model's float32 weights upcast exactly:

- the linear pieces of the straight path x' + a(x - x'), a in [0, 1], of the
  network before its head (Sotoudeh & Thakur 2019, "Computing Linear
  Restrictions of Neural Networks", ExactLine): an independent
  implementation here, layer by layer over the whole point set, with the
  breakpoints of a max-pool window found from all pairwise crossings of its
  elements (those where the two crossing elements are the window's maximum);
- the exact integral of the gradient of output t along the path: the input
  gradient at each piece's midpoint (torch.autograd), weighted by the piece's
  length for a linear head, or, for a Softmax/LogSoftmax/Sigmoid head, seeded
  with the head's gradient integrated along the piece's affine logit segment
  by adaptive Gauss-Legendre quadrature; and integrated gradients from it;
- for the record, the 2^16-point midpoint rule of the same integral;
- the activation pattern (the sign of every Relu input, the first maximum of
  every MaxPool window) at 10^5 evenly spaced points a_i = i/(10^5 - 1), and
  the cells [a_i, a_i+1] across which it changes.

Run by hand (not in CI) with Debian's python3-torch and python3-onnx:

    /usr/bin/python3 testdata/exactig/generate.py [--only CASE,...]

Nothing is random; the files are written next to this script.
"""

import argparse
import json
import os

import numpy as np
import onnx
import onnx.helper
import onnx.numpy_helper
import torch
import torch.nn.functional as F

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.normpath(os.path.join(HERE, "..", ".."))
SCAN = 100000  # points of the activation-pattern scan
MIDPOINTS = 1 << 16  # points of the midpoint rule kept for the record
CHUNK = 2048  # points per autograd batch
HEAD_OPS = ("Softmax", "LogSoftmax", "Sigmoid")

torch.set_num_threads(2)
torch.set_default_dtype(torch.float64)


def attr(node, name, default=None):
    for a in node.attribute:
        if a.name == name:
            v = onnx.helper.get_attribute_value(a)
            return v.decode() if isinstance(v, bytes) else v
    return default


class Graph:
    """A float64 torch interpreter of the operators the fixture models use.
    Every value carries a leading axis of points (the batch)."""

    def __init__(self, path, logits=False):
        m = onnx.load(path)
        self.consts = {t.name: torch.from_numpy(onnx.numpy_helper.to_array(t).astype(np.float64)) for t in m.graph.initializer}
        self.input = m.graph.input[0].name
        self.shape = [d.dim_value for d in m.graph.input[0].type.tensor_type.shape.dim[1:]]
        nodes = []
        for n in m.graph.node:
            if n.op_type == "Constant":
                self.consts[n.output[0]] = torch.from_numpy(onnx.numpy_helper.to_array(attr(n, "value")).astype(np.float64))
                continue
            nodes.append(n)
        self.head = None
        if nodes[-1].op_type in HEAD_OPS and not logits:
            self.head = nodes[-1].op_type
        if nodes[-1].op_type in HEAD_OPS:
            nodes = nodes[:-1]
        self.nodes = nodes
        self.output = nodes[-1].output[0]
        last = {}
        for i, n in enumerate(nodes):
            for v in n.input:
                last[v] = i
        self.last = last

    def get(self, env, name):
        return env[name] if name in env else self.consts[name]

    def apply(self, n, env):
        op, g = n.op_type, lambda i: self.get(env, n.input[i])
        if op == "Gemm":
            a, b = g(0), g(1)
            if attr(n, "transA", 0):
                raise ValueError("transA")
            if attr(n, "transB", 0):
                b = b.t()
            y = attr(n, "alpha", 1.0) * a @ b
            if len(n.input) > 2 and n.input[2]:
                y = y + attr(n, "beta", 1.0) * g(2)
            return y
        if op == "MatMul":
            return g(0) @ g(1)
        if op in ("Add", "Sub", "Mul", "Div"):
            return {"Add": torch.add, "Sub": torch.sub, "Mul": torch.mul, "Div": torch.div}[op](g(0), g(1))
        if op == "Relu":
            return torch.relu(g(0))
        if op == "Conv":
            w = g(1)
            b = g(2) if len(n.input) > 2 and n.input[2] else None
            k = w.dim() - 2
            pads = attr(n, "pads", [0] * (2 * k))
            if pads[:k] != pads[k:]:
                raise ValueError("asymmetric pads")
            conv = F.conv1d if k == 1 else F.conv2d
            return conv(g(0), w, b, stride=attr(n, "strides", [1] * k), padding=pads[:k],
                        dilation=attr(n, "dilations", [1] * k), groups=attr(n, "group", 1))
        if op == "MaxPool":
            x = self.pool_pad(n, g(0), float("-inf"))
            k = attr(n, "kernel_shape")
            return (F.max_pool1d if len(k) == 1 else F.max_pool2d)(x, k, attr(n, "strides", k))
        if op == "AveragePool":
            if attr(n, "count_include_pad", 0) or any(attr(n, "pads", [0])):
                raise ValueError("AveragePool padding")
            k = attr(n, "kernel_shape")
            return (F.avg_pool1d if len(k) == 1 else F.avg_pool2d)(g(0), k, attr(n, "strides", k))
        if op == "Pad":
            if attr(n, "mode", "constant") != "constant":
                raise ValueError("pad mode")
            pads = [int(v) for v in self.consts[n.input[1]].tolist()]
            r = len(pads) // 2
            value = float(self.consts[n.input[2]]) if len(n.input) > 2 and n.input[2] else 0.0
            tp = []
            for ax in reversed(range(r)):
                tp += [pads[ax], pads[ax + r]]
            return F.pad(g(0), tp, value=value)
        if op == "BatchNormalization":
            x, s, b, mu, var = (g(i) for i in range(5))
            shp = [1, -1] + [1] * (x.dim() - 2)
            eps = attr(n, "epsilon", 1e-5)
            return (x - mu.view(shp)) / torch.sqrt(var.view(shp) + eps) * s.view(shp) + b.view(shp)
        if op == "Flatten":
            return g(0).flatten(1)
        raise ValueError("operator %s" % op)

    def pool_pad(self, n, x, value):
        pads = attr(n, "pads", None)
        if pads and any(pads):
            r = len(pads) // 2
            tp = []
            for ax in reversed(range(r)):
                tp += [pads[ax], pads[ax + r]]
            x = F.pad(x, tp, value=value)
        return x

    def forward(self, x, until=None):
        env = {self.input: x}
        for i, n in enumerate(self.nodes):
            env[n.output[0]] = self.apply(n, env)
        return env[self.output]

    def pattern(self, x):
        """The activation pattern at each point: Relu input signs and the
        index of the first maximum of every max-pool window."""
        env = {self.input: x}
        parts = []
        for n in self.nodes:
            if n.op_type == "Relu":
                parts.append((self.get(env, n.input[0]) > 0).flatten(1).to(torch.int64))
            elif n.op_type == "MaxPool":
                parts.append(windows(self, n, self.get(env, n.input[0])).argmax(-1).flatten(1))
            env[n.output[0]] = self.apply(n, env)
        return torch.cat(parts, 1) if parts else torch.zeros((x.shape[0], 0), dtype=torch.int64)


def windows(graph, n, u):
    """The max-pool windows of u as a last axis: (points, C, out..., taps).
    torch's argmax returns the first maximal index, as the engines route
    max-pool gradients."""
    x = graph.pool_pad(n, u, float("-inf"))
    k = attr(n, "kernel_shape")
    s = attr(n, "strides", k)
    if attr(n, "dilations", None) and any(d != 1 for d in attr(n, "dilations")):
        raise ValueError("dilated pool")
    if len(k) == 1:
        return x.unfold(2, k[0], s[0])
    return x.unfold(2, k[0], s[0]).unfold(3, k[1], s[1]).flatten(-2)


def relu_breaks(u, alpha):
    """The points in each segment where a Relu input crosses zero."""
    ua, ub = u[:-1].flatten(1), u[1:].flatten(1)
    cross = (ua * ub) < 0
    seg, _ = cross.nonzero(as_tuple=True)
    r = ua[cross] / (ua[cross] - ub[cross])
    return alpha[seg] + r * (alpha[seg + 1] - alpha[seg])


def pool_breaks(graph, n, u, alpha):
    """The points in each segment where a max-pool window's maximum passes
    from one element to another: a crossing of two elements at which both
    are the window's maximum."""
    w = windows(graph, n, u)
    wa, wb = w[:-1], w[1:]
    k = w.shape[-1]
    out = []
    for i in range(k):
        for j in range(i + 1, k):
            ai, aj, bi, bj = wa[..., i], wa[..., j], wb[..., i], wb[..., j]
            den = (bj - aj) - (bi - ai)
            with np.errstate(all="ignore"):
                r = torch.where(den != 0, (ai - aj) / den, torch.full_like(den, -1.0))
            ok = (r > 0) & (r < 1)
            if not ok.any():
                continue
            idx = ok.nonzero(as_tuple=True)
            rr = r[idx]
            at = wa[idx] + rr[:, None] * (wb[idx] - wa[idx])  # all taps at the crossing
            v = ai[idx] + rr * (bi[idx] - ai[idx])
            tol = 1e-12 * torch.clamp(at.abs().amax(-1), min=1.0)
            top = (at <= v[:, None] + tol[:, None]).all(-1)
            seg = idx[0][top]
            out.append(alpha[seg] + rr[top] * (alpha[seg + 1] - alpha[seg]))
    if not out:
        return alpha.new_zeros(0)
    return torch.cat(out)


def insert(alpha, env, new):
    """Adds the points new (inside segments of alpha) with every value
    interpolated linearly, which is exact on a piece."""
    new = torch.unique(new)
    new = new[(new > 0) & (new < 1)]
    new = new[~torch.isin(new, alpha)]
    if len(new) == 0:
        return alpha, env
    seg = torch.searchsorted(alpha, new) - 1
    r = (new - alpha[seg]) / (alpha[seg + 1] - alpha[seg])
    all_a = torch.cat([alpha, new])
    order = torch.argsort(all_a)
    out = {}
    for name, v in env.items():
        shp = [-1] + [1] * (v.dim() - 1)
        vn = v[seg] + r.view(shp) * (v[seg + 1] - v[seg])
        out[name] = torch.cat([v, vn])[order]
    return all_a[order], out


def exact_line(graph, x0, x1, lo=0.0, hi=1.0):
    """The breakpoints of [lo, hi] and the pre-head output at every one."""
    alpha = torch.tensor([lo, hi])
    env = {graph.input: torch.stack([x0 + lo * (x1 - x0), x0 + hi * (x1 - x0)])}
    for i, n in enumerate(graph.nodes):
        new = None
        if n.op_type == "Relu":
            new = relu_breaks(graph.get(env, n.input[0]), alpha)
        elif n.op_type == "MaxPool":
            new = pool_breaks(graph, n, graph.get(env, n.input[0]), alpha)
        if new is not None and len(new):
            alpha, env = insert(alpha, env, new)
        env[n.output[0]] = graph.apply(n, env)
        for name in [v for v in env if graph.last.get(v, -1) <= i and v != graph.output]:
            del env[name]
    return alpha, env[graph.output]


def head_grad(head, y, t):
    """The gradient of head output t with respect to the pre-head values y
    (rows of points)."""
    if head is None:
        g = torch.zeros_like(y)
        g[:, t] = 1
        return g
    if head == "Sigmoid":
        s = torch.sigmoid(y[:, t])
        g = torch.zeros_like(y)
        g[:, t] = s * (1 - s)
        return g
    p = torch.softmax(y, 1)
    e = torch.zeros_like(y)
    e[:, t] = 1
    if head == "LogSoftmax":
        return e - p
    return p[:, t:t + 1] * (e - p)


def gl_nodes(n):
    x, w = np.polynomial.legendre.leggauss(n)
    return torch.from_numpy(x), torch.from_numpy(w)


def integrate_head(head, ya, yb, width, t):
    """The integral over each piece of the head's gradient along the piece's
    affine segment y(s) = ya + s (yb - ya), s in [0, 1], times the piece's
    length: adaptive Gauss-Legendre (32 against 64 nodes per panel, halving
    the panels that disagree by more than 1e-15 of the piece's length)."""
    if head is None:
        g = torch.zeros_like(ya)
        g[:, t] = width
        return g
    x32, w32 = gl_nodes(32)
    x64, w64 = gl_nodes(64)

    def panel(a, b, x, w):  # a, b: (m,) fractions of each piece
        s = (a[:, None] + b[:, None]) / 2 + (b - a)[:, None] / 2 * x[None, :]
        m = len(a)
        return s, w, m

    total = torch.zeros_like(ya)
    todo = [(torch.arange(len(ya)), torch.zeros(len(ya)), torch.ones(len(ya)))]
    while todo:
        idx, a, b = todo.pop()
        res = []
        for x, w in ((x32, w32), (x64, w64)):
            s = (a + b)[:, None] / 2 + (b - a)[:, None] / 2 * x[None, :]
            yy = ya[idx][:, None, :] + s[..., None] * (yb[idx] - ya[idx])[:, None, :]
            gg = head_grad(head, yy.reshape(-1, ya.shape[1]), t).reshape(len(idx), len(x), -1)
            res.append(((b - a) / 2)[:, None] * (w[None, :, None] * gg).sum(1))
        bad = (res[0] - res[1]).abs().amax(1) > 1e-15 * (b - a)
        good = ~bad
        total.index_add_(0, idx[good], res[1][good])
        if bad.any():
            mid = (a[bad] + b[bad]) / 2
            todo.append((idx[bad], a[bad], mid))
            todo.append((idx[bad], mid, b[bad]))
    return total * width[:, None]


def grad_sum(graph, x0, x1, alpha, seeds):
    """Sum over points a_j of the gradient of (seeds_j . y) with respect to
    the input at x0 + a_j (x1 - x0)."""
    out = torch.zeros_like(x0)
    shp = [-1] + [1] * x0.dim()
    for lo in range(0, len(alpha), CHUNK):
        a = alpha[lo:lo + CHUNK]
        pts = (x0[None] + a.view(shp) * (x1 - x0)[None]).requires_grad_(True)
        y = graph.forward(pts)
        (g,) = torch.autograd.grad((y * seeds[lo:lo + CHUNK]).sum(), pts)
        out += g.sum(0)
    return out


def exact_case(graph, x0, x1, t, parts):
    alphas, ys = [], []
    for p in range(parts):
        a, y = exact_line(graph, x0, x1, p / parts, (p + 1) / parts)
        if p > 0:
            a, y = a[1:], y[1:]
        alphas.append(a)
        ys.append(y)
    alpha = torch.cat(alphas)
    y = torch.cat(ys)
    width = alpha[1:] - alpha[:-1]
    seeds = integrate_head(graph.head, y[:-1], y[1:], width, t)
    mid = (alpha[1:] + alpha[:-1]) / 2
    integral = grad_sum(graph, x0, x1, mid, seeds)
    breaks = alpha[1:-1]
    if parts > 1:  # drop the artificial breaks between the parts unless real
        keep = torch.ones(len(breaks), dtype=torch.bool)
        for p in range(1, parts):
            keep &= breaks != p / parts
        breaks = breaks[keep]
    return integral, breaks, len(width) - (parts - 1)


def apply_head(graph, y):
    if graph.head == "Softmax":
        return torch.softmax(y, 1)
    if graph.head == "LogSoftmax":
        return torch.log_softmax(y, 1)
    if graph.head == "Sigmoid":
        return torch.sigmoid(y)
    return y


def head_out(graph, x):
    return apply_head(graph, graph.forward(x[None]))[0]


def midpoint(graph, x0, x1, t, n):
    a = (torch.arange(n, dtype=torch.float64) + 0.5) / n
    out = torch.zeros_like(x0)
    shp = [-1] + [1] * x0.dim()
    for lo in range(0, n, CHUNK):
        pts = (x0[None] + a[lo:lo + CHUNK].view(shp) * (x1 - x0)[None]).requires_grad_(True)
        y = apply_head(graph, graph.forward(pts))
        (g,) = torch.autograd.grad(y[:, t].sum(), pts)
        out += g.sum(0)
    return out / n


def scan(graph, x0, x1):
    a = torch.arange(SCAN, dtype=torch.float64) / (SCAN - 1)
    shp = [-1] + [1] * x0.dim()
    changed, prev = [], None
    with torch.no_grad():
        for lo in range(0, SCAN, CHUNK):
            p = graph.pattern(x0[None] + a[lo:lo + CHUNK].view(shp) * (x1 - x0)[None])
            if prev is not None:
                p = torch.cat([prev, p])
            d = (p[1:] != p[:-1]).any(1).nonzero(as_tuple=True)[0]
            start = lo - 1 if prev is not None else 0
            changed.append(d + start)
            prev = p[-1:]
    return torch.cat(changed)


def zoo_input(shape, n):
    """bench.Input: element i of the batch is 0.5 sin(0.37 i + 0.1), as float32."""
    size = n * int(np.prod(shape))
    x = 0.5 * np.sin(0.37 * np.arange(size, dtype=np.float64) + 0.1)
    return x.astype(np.float32).astype(np.float64).reshape([n] + shape)


def f32(a):
    return np.asarray(a, dtype=np.float32).astype(np.float64)


def cases():
    """(name, model file relative to the repository, logits, x, baseline, parts)."""
    out = []
    zoo = {"mlp-s": [30], "mlp-m": [100], "cnn-s": [1, 28, 28], "cnn-m": [3, 32, 32]}
    parts = {"mlp-s": 1, "mlp-m": 1, "cnn-s": 8, "cnn-m": 64}
    for name, shape in zoo.items():
        x = zoo_input(shape, 2)
        out.append((name + "-zero", "bench/models/%s.onnx" % name, False, x[0], np.zeros_like(x[0]), parts[name]))
        out.append((name + "-tenth", "bench/models/%s.onnx" % name, False, x[1], 0.1 * x[1], parts[name]))
    pumps = f32(json.load(open(os.path.join(ROOT, "demo/data/pumps_sample.json"))))
    ref = np.loadtxt(os.path.join(ROOT, "demo/data/pumps_reference.csv"), delimiter=",", skiprows=1)
    pumps_mean = ref.mean(0)
    out.append(("pumps-zero", "demo/data/pumps.onnx", False, pumps, np.zeros_like(pumps), 1))
    out.append(("pumps-mean", "demo/data/pumps.onnx", False, pumps, pumps_mean, 1))
    out.append(("pumps-logits", "demo/data/pumps.onnx", True, pumps, pumps_mean, 1))
    welds = f32(json.load(open(os.path.join(ROOT, "demo/data/welds_sample.json")))).reshape(1, 32, 32)
    welds_ref = np.load(os.path.join(ROOT, "demo/data/welds_reference.npy")).astype(np.float64)
    out.append(("welds-zero", "demo/data/welds.onnx", False, welds, np.zeros_like(welds), 8))
    out.append(("welds-mean", "demo/data/welds.onnx", False, welds, welds_ref.mean(0).reshape(1, 32, 32), 8))
    for name, fixture in (("breast_mlp", "breast_mlp"), ("digits_cnn", "digits_cnn"), ("signal_conv1d", "signal_conv1d")):
        d = np.load(os.path.join(ROOT, "testdata/reference/%s.npz" % fixture))
        x = d["x"][0]
        out.append((name + "-zero", "testdata/reference/%s.onnx" % name, False, x, np.zeros_like(x), 1))
        out.append((name + "-mean", "testdata/reference/%s.onnx" % name, False, x, d["baseline_mean"].reshape(x.shape), 1))
    return out


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--only", default="")
    args = ap.parse_args()
    only = set(args.only.split(",")) if args.only else None
    manifest_path = os.path.join(HERE, "manifest.json")
    manifest = json.load(open(manifest_path)) if os.path.exists(manifest_path) else {"cases": []}
    done = {c["name"]: c for c in manifest["cases"]}
    for name, path, logits, x, base, parts in cases():
        if only is not None and name not in only:
            continue
        graph = Graph(os.path.join(ROOT, path), logits=logits)
        x1 = torch.from_numpy(np.asarray(x, dtype=np.float64).reshape(graph.shape))
        x0 = torch.from_numpy(np.asarray(base, dtype=np.float64).reshape(graph.shape))
        with torch.no_grad():
            fx, fb = head_out(graph, x1), head_out(graph, x0)
        t = int(fx.argmax())
        integral, breaks, pieces = exact_case(graph, x0, x1, t, parts)
        ig = (x1 - x0) * integral
        mid = (x1 - x0) * midpoint(graph, x0, x1, t, MIDPOINTS)
        cells = scan(graph, x0, x1)
        gap = float(ig.sum() - (fx[t] - fb[t]))
        np.savez_compressed(os.path.join(HERE, name + ".npz"), x=x1.numpy(), baseline=x0.numpy(), target=np.array(t),
                            out=fx.numpy(), base_out=fb.numpy(), integral=integral.numpy(), ig=ig.numpy(),
                            breaks=breaks.numpy(), pieces=np.array(pieces), ig_midpoint=mid.numpy(),
                            scan_changes=cells.numpy().astype(np.int32))
        l1 = float((mid - ig).abs().sum() / ig.abs().sum())
        done[name] = {"name": name, "model": path, "logits": logits, "head": graph.head, "target": t,
                      "pieces": pieces, "scan_changes": int(len(cells)), "completeness_gap": gap,
                      "midpoint_rel_l1": l1, "parts": parts}
        print("%-20s pieces %6d  scan changes %6d  gap %.2e  midpoint-2^16 rel L1 %.2e" % (name, pieces, len(cells), gap, l1), flush=True)
        manifest["cases"] = [done[c[0]] for c in cases() if c[0] in done]
        manifest["versions"] = {"torch": torch.__version__, "numpy": np.__version__, "onnx": onnx.__version__}
        with open(manifest_path, "w") as f:
            json.dump(manifest, f, indent=1)
            f.write("\n")


if __name__ == "__main__":
    main()
