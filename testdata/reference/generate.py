#!/usr/bin/python3
"""Reference fixtures for apportion's nn and gradattr tests.

Trains small PyTorch models on data that scikit-learn ships (or on seeded
synthetic signals and token sequences), exports them with torch.onnx.export,
and computes for ten held-out rows per model, with torch.autograd in float64,
the outputs, the input gradient of the predicted class, gradient x input,
integrated gradients to the exact integral (zero and training-mean baselines),
SmoothGrad and expected gradients, storing every random draw so that the Go
tests can replay them. For the token model: the outputs, the gradient at the
embedding (Gather) output and integrated gradients there from two baselines,
summed to one attribution per token. For an intermediate value of two models
(reached with torch forward hooks): the value, its gradient and integrated
gradients at that layer; and Grad-CAM on the digits CNN.

Run by hand (not in CI) with Debian's python3-torch, python3-sklearn and
python3-onnx:

    /usr/bin/python3 testdata/reference/generate.py [--only SECTION,...]

Everything is seeded; the files are written next to this script.
"""

import argparse
import io
import json
import os
import sys

import numpy as np
import onnx
import onnx.helper
import onnx.numpy_helper
import sklearn
import torch
import torch.nn as nn
import torch.nn.functional as F
from sklearn.datasets import load_breast_cancer, load_digits, load_wine
from sklearn.model_selection import train_test_split

OUT = os.path.dirname(os.path.abspath(__file__))

ROWS = 10  # held-out rows per model
IG_POINTS = 1 << 15  # midpoint points of the "exact" integral (>= 20,000)
SG_SAMPLES = 50
SG_NOISE = 0.15  # sigma = SG_NOISE * (max - min) of each sample
EG_DRAWS = 200
EG_REFS = 50
CHUNK = 4096  # points per autograd batch
TEXT_VOCAB = 40  # the text classifier's vocabulary, the padding token included
TEXT_LENGTH = 12  # token positions per sequence

torch.set_num_threads(2)


def f32(a):
    """Rounds to float32 and back: every stored input is exact in float32,
    so the float32 and float64 engines see the same sample."""
    return np.asarray(a, dtype=np.float32).astype(np.float64)


class Standardize(nn.Module):
    """(x - mean) / std with the training statistics as buffers, so that the
    exported graph takes raw features."""

    def __init__(self, mean, std):
        super().__init__()
        self.register_buffer("mean", torch.tensor(mean, dtype=torch.float32))
        self.register_buffer("std", torch.tensor(std, dtype=torch.float32))

    def forward(self, x):
        return (x - self.mean) / self.std


class BreastMLP(nn.Module):
    def __init__(self, mean, std):
        super().__init__()
        self.norm = Standardize(mean, std)
        self.fc1 = nn.Linear(30, 16)
        self.fc2 = nn.Linear(16, 8)
        self.fc3 = nn.Linear(8, 2)

    def logits(self, x):
        h = torch.relu(self.fc1(self.norm(x)))
        h = torch.relu(self.fc2(h))
        return self.fc3(h)

    def forward(self, x):
        return self.logits(x)


class DigitsCNN(nn.Module):
    """Conv, ReLU, MaxPool, flatten, Linear (Gemm), Softmax. view=True
    flattens with x.view(x.size(0), -1), which the exporter turns into shape
    arithmetic and a Reshape; view=False uses nn.Flatten (ONNX Flatten)."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(1, 8, 3, padding=1)
        self.pool = nn.MaxPool2d(2)
        self.flat = nn.Flatten()
        self.fc = nn.Linear(8 * 4 * 4, 10)
        self.view = False

    def logits(self, x):
        h = self.pool(torch.relu(self.conv(x)))
        h = h.view(h.size(0), -1) if self.view else self.flat(h)
        return self.fc(h)

    def forward(self, x):
        return torch.softmax(self.logits(x), dim=1)


class SignalNet(nn.Module):
    """Conv1d, ReLU, BatchNorm1d, AvgPool1d, Flatten, Linear. The batch norm
    follows the ReLU: directly after a convolution, the exporter's eval-mode
    pass folds it into the convolution's weights (see README.md)."""

    def __init__(self, length):
        super().__init__()
        self.conv = nn.Conv1d(1, 6, 5, padding=2)
        self.bn = nn.BatchNorm1d(6)
        self.pool = nn.AvgPool1d(4)
        self.flat = nn.Flatten()
        self.fc = nn.Linear(6 * (length // 4), 3)

    def logits(self, x):
        h = self.bn(torch.relu(self.conv(x)))
        return self.fc(self.flat(self.pool(h)))

    def forward(self, x):
        return self.logits(x)


class WineMLP(nn.Module):
    """Standardisation, Linear 13-32, LayerNorm, GELU; a residual block
    (Linear 32-32, GELU, added to the block's input, LayerNorm); Linear
    32-3. The output of act1 is read twice, by fc2 and by the residual
    addition."""

    def __init__(self, mean, std):
        super().__init__()
        self.norm = Standardize(mean, std)
        self.fc1 = nn.Linear(13, 32)
        self.ln1 = nn.LayerNorm(32)
        self.act1 = nn.GELU()
        self.fc2 = nn.Linear(32, 32)
        self.act2 = nn.GELU()
        self.ln2 = nn.LayerNorm(32)
        self.head = nn.Linear(32, 3)

    def logits(self, x):
        h = self.act1(self.ln1(self.fc1(self.norm(x))))
        h = self.ln2(h + self.act2(self.fc2(h)))
        return self.head(h)

    def forward(self, x):
        return self.logits(x)


class ErfGelu(nn.Module):
    """GELU in the form the opset-17 export writes nn.GELU(): Div by the
    float32 constant sqrt(2) = 1.4142135381698608, Erf, Add 1, Mul by x, Mul
    by 0.5. torch's own float64 GELU uses the exact 1/sqrt(2); this module
    computes what the exported graph computes in float64."""

    SQRT2 = float(np.float32(np.sqrt(2)))

    def forward(self, x):
        return x * (torch.erf(x / self.SQRT2) + 1.0) * 0.5


def as_exported(wine, onnx_file):
    """Makes the float64 WineMLP compute its exported graph: GELU through
    ErfGelu and the LayerNorm epsilon rounded to float32 as the ONNX
    attribute holds it, after checking that the graph holds those values."""
    m = onnx.load(os.path.join(OUT, onnx_file))
    consts = sorted({float(onnx.numpy_helper.to_array(n.attribute[0].t)) for n in m.graph.node if n.op_type == "Constant"})
    eps = {onnx.helper.get_attribute_value(a) for n in m.graph.node if n.op_type == "LayerNormalization" for a in n.attribute if a.name == "epsilon"}
    if consts != [0.5, 1.0, ErfGelu.SQRT2] or eps != {float(np.float32(1e-5))}:
        sys.exit(f"{onnx_file}: GELU constants {consts} or LayerNormalization epsilon {eps} not as expected")
    wine.act1, wine.act2 = ErfGelu(), ErfGelu()
    wine.ln1.eps = wine.ln2.eps = float(np.float32(1e-5))
    return wine


class ReflectCNN(nn.Module):
    """ReflectionPad2d((1, 2, 1, 0)), Conv 3x3, ReLU, MaxPool 2, Flatten,
    Linear. The padding is asymmetric (left 1, right 2, top 1, bottom 0) so
    that a runtime which reads the exporter's pad chain in the wrong order
    gets the wrong shape or values."""

    def __init__(self):
        super().__init__()
        self.pad = nn.ReflectionPad2d((1, 2, 1, 0))
        self.conv = nn.Conv2d(1, 8, 3)
        self.pool = nn.MaxPool2d(2)
        self.flat = nn.Flatten()
        self.fc = nn.Linear(8 * 3 * 4, 10)

    def logits(self, x):
        return self.fc(self.flat(self.pool(torch.relu(self.conv(self.pad(x))))))

    def forward(self, x):
        return self.logits(x)


class TextCNN(nn.Module):
    """Token ids -> Embedding (vocab x 8) -> Conv1d(8-16, kernel 3, padding 1)
    over the positions -> ReLU -> mean over positions -> Linear 16-3."""

    def __init__(self, vocab):
        super().__init__()
        self.emb = nn.Embedding(vocab, 8)
        self.conv = nn.Conv1d(8, 16, 3, padding=1)
        self.fc = nn.Linear(16, 3)

    def logits(self, ids):
        h = torch.relu(self.conv(self.emb(ids).transpose(1, 2)))
        return self.fc(h.mean(2))

    def forward(self, ids):
        return self.logits(ids)


def accuracy(model, x, y, dtype=torch.float32):
    with torch.no_grad():
        p = model.logits(torch.tensor(x, dtype=dtype)).argmax(1).numpy()
    return float((p == y).mean())


def train(model, x, y, epochs, lr, batch=64, seed=0, dtype=torch.float32):
    g = torch.Generator().manual_seed(seed)
    xt = torch.tensor(x, dtype=dtype)
    yt = torch.tensor(y, dtype=torch.long)
    opt = torch.optim.Adam(model.parameters(), lr=lr)
    model.train()
    for _ in range(epochs):
        perm = torch.randperm(len(xt), generator=g)
        for i in range(0, len(xt), batch):
            idx = perm[i : i + batch]
            opt.zero_grad()
            loss = F.cross_entropy(model.logits(xt[idx]), yt[idx])
            loss.backward()
            opt.step()
    model.eval()
    return accuracy(model, x, y, dtype)


def export(model, shape, path, opset, dynamic, dtype=torch.float32, input_name="x", **kw):
    dummy = torch.zeros((1,) + tuple(shape), dtype=dtype)
    axes = {input_name: {0: "N"}, "y": {0: "N"}} if dynamic else None
    buf = io.BytesIO()
    torch.onnx.export(
        model, dummy, buf, opset_version=opset, input_names=[input_name],
        output_names=["y"], dynamic_axes=axes, **kw)
    data = buf.getvalue()
    with open(os.path.join(OUT, path), "wb") as f:
        f.write(data)
    m = onnx.load_from_string(data)
    onnx.checker.check_model(m)
    ops = sorted({n.op_type for n in m.graph.node})
    check_weights(model, m, path)
    return ops, [n.op_type for n in m.graph.node]


def check_weights(model, m, path):
    """Every float initializer must equal, bit for bit, a float32 parameter or
    buffer of the module: then the float64 module (model.double()) is the
    exported graph computed in float64."""
    params = [p.detach().numpy() for p in list(model.parameters()) + list(model.buffers())
              if p.dtype == torch.float32]
    for init in m.graph.initializer:
        a = onnx.numpy_helper.to_array(init)
        if a.dtype != np.float32:
            continue
        if not any(p.shape == a.shape and np.array_equal(p, a) for p in params):
            sys.exit(f"{path}: initializer {init.name} {a.shape} matches no module tensor")


def grad_of(model, x, target):
    """Outputs and the gradient of out[i, target[i]] w.r.t. x[i] (float64)."""
    x = torch.tensor(x, dtype=torch.float64, requires_grad=True)
    out = model(x)
    t = torch.as_tensor(target, dtype=torch.long)
    out.gather(1, t.view(-1, 1)).sum().backward()
    return out.detach().numpy(), x.grad.detach().numpy()


def chunked_grad_mean(model, pts, target, shape):
    """Mean over rows of pts of the gradient of output `target`."""
    total = np.zeros(int(np.prod(shape)))
    for i in range(0, len(pts), CHUNK):
        p = pts[i : i + CHUNK]
        _, g = grad_of(model, p.reshape((-1,) + tuple(shape)), np.full(len(p), target))
        total += g.reshape(len(p), -1).sum(0)
    return total / len(pts)


def integrated_gradients(model, x, base, target, shape):
    """IG_i = (x_i - x'_i) * (1/M) sum_j dF(x' + a_j (x - x'))/dx_i with the
    midpoint nodes a_j = (j + 1/2)/M: the path integral of Sundararajan, Taly &
    Yan 2017, eq. 1, by a midpoint sum."""
    alpha = (np.arange(IG_POINTS) + 0.5) / IG_POINTS
    pts = base[None, :] + alpha[:, None] * (x - base)[None, :]
    return (x - base) * chunked_grad_mean(model, pts, target, shape)


def target_out(model, x, target, shape):
    with torch.no_grad():
        out = model(torch.tensor(x.reshape((-1,) + tuple(shape)), dtype=torch.float64))
    return out[:, target].numpy()


def references(name, model, shape, xtrain, xtest, seed, softmax=False, checks=None):
    """Writes NAME.npz with every reference value for ROWS held-out rows;
    records the IG completeness gaps in checks when given."""
    rng = np.random.default_rng(seed)
    model = model.double().eval()
    nf = int(np.prod(shape))
    x = f32(xtest[:ROWS]).reshape(ROWS, nf)
    xtrain = f32(xtrain).reshape(len(xtrain), nf)
    out, _ = grad_of(model, x.reshape((ROWS,) + tuple(shape)), np.zeros(ROWS, dtype=np.int64))
    target = out.argmax(1)
    out, grad = grad_of(model, x.reshape((ROWS,) + tuple(shape)), target)
    grad = grad.reshape(ROWS, nf)
    extra = {}
    if softmax:
        # The gradient of the logit (the Softmax input) of the same class.
        _, lg = grad_of(model.logits, x.reshape((ROWS,) + tuple(shape)), target)
        extra["logit_grad"] = lg.reshape(ROWS, nf)

    mean = xtrain.mean(0)
    ig = {"zero": np.zeros(nf), "mean": mean}
    res = {}
    for kind, base in ig.items():
        a = np.stack([integrated_gradients(model, x[r], base, target[r], shape) for r in range(ROWS)])
        fb = np.array([target_out(model, base, target[r], shape)[0] for r in range(ROWS)])
        res["ig_" + kind] = a
        res["ig_" + kind + "_base_out"] = fb
        fx = out[np.arange(ROWS), target]
        gap = np.abs(a.sum(1) - (fx - fb)) / np.maximum(np.abs(fx - fb), 1e-6)
        print(f"  {name}: IG {kind} baseline, exact-integral completeness gap max {gap.max():.2e}")
        if checks is not None:
            checks[f"{name}: IG {kind} completeness gap max"] = float(gap.max())
        res["ig_" + kind + "_gap"] = gap

    sigma = SG_NOISE * (x.max(1) - x.min(1))
    eps = rng.standard_normal((ROWS, SG_SAMPLES, nf)) * sigma[:, None, None]
    sg = np.stack([chunked_grad_mean(model, x[r][None, :] + eps[r], target[r], shape) for r in range(ROWS)])

    refidx = np.sort(rng.choice(len(xtrain), EG_REFS, replace=False))
    eref = xtrain[refidx]
    eidx = rng.integers(0, EG_REFS, (ROWS, EG_DRAWS))
    ealpha = rng.random((ROWS, EG_DRAWS))
    eg = np.zeros((ROWS, nf))
    eref_out = np.zeros(ROWS)
    for r in range(ROWS):
        b = eref[eidx[r]]
        pts = b + ealpha[r][:, None] * (x[r][None, :] - b)
        _, g = grad_of(model, pts.reshape((-1,) + tuple(shape)), np.full(EG_DRAWS, target[r]))
        eg[r] = ((x[r][None, :] - b) * g.reshape(EG_DRAWS, nf)).mean(0)
        eref_out[r] = target_out(model, eref, target[r], shape).mean()

    np.savez(
        os.path.join(OUT, name + ".npz"),
        x=x, out=out, target=target.astype(np.int64), grad=grad, grad_x_input=grad * x,
        baseline_mean=mean, ig_points=np.int64(IG_POINTS), **res, **extra,
        sg_sigma=sigma, sg_eps=eps, sg=sg,
        eg_ref=eref, eg_ref_rows=refidx.astype(np.int64), eg_index=eidx.astype(np.int64),
        eg_alpha=ealpha, eg=eg, eg_ref_out=eref_out)


class LayerSwap:
    """A forward hook on one module: it records the module's output V and,
    while `replace` is set, returns that tensor instead, so that the rest of
    the network computes from the given layer value (everything downstream
    of the module depends on the input only through V in these models)."""

    def __init__(self, module):
        self.replace = None
        self.value = None
        self.live = None
        self.handle = module.register_forward_hook(self)

    def __call__(self, module, inputs, output):
        self.live = output
        self.value = output.detach()
        return self.replace

    def remove(self):
        self.handle.remove()


def rest_of_network(model, swap, xin, v, target):
    """Outputs of model when the hooked layer value is v (a batch), and the
    gradient of output[target] with respect to v: autograd at the leaf the
    forward hook substitutes. xin supplies the batch (its upstream values are
    computed and then replaced)."""
    swap.replace = v.clone().requires_grad_(True)
    out = model(xin)
    out[:, target].sum().backward()
    grad = swap.replace.grad.detach()
    swap.replace = None
    return out.detach(), grad


def layer_ig(model, swap, xin_row, v, base, target):
    """Integrated gradients at a layer (Sundararajan, Taly & Yan 2017, eq. 1,
    with V in place of the input, the rest of the network g held fixed):
    IG_i = (V_i - V'_i) * (1/M) sum_j dg(V' + a_j (V - V'))/dV_i,
    a_j = (j + 1/2)/M, the straight path in V-space by a midpoint sum."""
    alpha = torch.tensor((np.arange(IG_POINTS) + 0.5) / IG_POINTS, dtype=torch.float64)
    total = torch.zeros_like(v)
    expand = (-1,) + (1,) * v.dim()
    for i in range(0, IG_POINTS, CHUNK):
        a = alpha[i : i + CHUNK].view(expand)
        pts = base.unsqueeze(0) + a * (v - base).unsqueeze(0)
        xin = xin_row.unsqueeze(0).expand((len(a),) + tuple(xin_row.shape))
        _, g = rest_of_network(model, swap, xin, pts, target)
        total += g.sum(0)
    return ((v - base) * total / IG_POINTS).numpy()


def value_names(m, op, consumers):
    """The output names of the nodes of type op whose readers are exactly the
    operator types consumers (as a sorted list)."""
    readers = {}
    for n in m.graph.node:
        for i in n.input:
            readers.setdefault(i, []).append(n.op_type)
    return [n.output[0] for n in m.graph.node
            if n.op_type == op and sorted(readers.get(n.output[0], [])) == sorted(consumers)]


def layer_references(name, model, module, shape, x, target, onnx_name, checks):
    """Writes NAME.npz: at the value V that module outputs (the ONNX value
    onnx_name), for the given rows and targets: V, dout[target]/dV, and
    integrated gradients at V from two baselines, V computed from the
    all-zero input and the zero layer value. Records its consistency checks
    in checks and returns the manifest entry."""
    model = model.double().eval()
    swap = LayerSwap(module)
    xt = torch.tensor(x.reshape((ROWS,) + tuple(shape)), dtype=torch.float64)
    t = torch.as_tensor(target).view(-1, 1)
    with torch.no_grad():
        out = model(xt)
    if not np.array_equal(out.numpy().argmax(1), target):
        sys.exit(f"{name}: the targets are not the predicted classes")
    v = swap.value.clone()
    outs, grads = zip(*(rest_of_network(model, swap, xt[r : r + 1], v[r : r + 1], int(target[r])) for r in range(ROWS)))
    # One row at a time through the substituted value against the batch of
    # ten: equal up to the batch-size dependence of torch's float64 kernels.
    diff = float((torch.cat(outs) - out).abs().max() / out.abs().max())
    if diff > 1e-12:
        sys.exit(f"{name}: substituting V does not reproduce the outputs ({diff:.3g})")
    checks[f"{name}: outputs through the substituted V against the plain forward pass, max relative difference"] = diff
    grad = torch.cat(grads)

    # Chain rule: the input gradient equals (dV/dx)^T dout/dV.
    xg = xt.clone().requires_grad_(True)
    gx = torch.autograd.grad(model(xg).gather(1, t).sum(), xg, retain_graph=True)[0]
    chained = torch.autograd.grad(swap.live, xg, grad)[0]
    checks[f"{name}: input gradient against (dV/dx)^T dout/dV, max relative difference"] = \
        float((chained - gx).abs().max() / gx.abs().max())

    with torch.no_grad():
        f_zero = model(torch.zeros((1,) + tuple(shape), dtype=torch.float64))[0].numpy()
    v_zero_input = swap.value[0].clone()
    fx = out.numpy()[np.arange(ROWS), target]
    res = {}
    for kind, base in (("zero_input", v_zero_input), ("zero_value", torch.zeros_like(v_zero_input))):
        ig = np.stack([layer_ig(model, swap, xt[r], v[r], base, int(target[r])) for r in range(ROWS)])
        with torch.no_grad():
            swap.replace = base.unsqueeze(0)
            fb = model(xt[:1])[0].numpy()
            swap.replace = None
        if kind == "zero_input" and not np.array_equal(fb, f_zero):
            sys.exit(f"{name}: the rest of the network at V(0) differs from f(0)")
        fb = fb[target]
        gap = np.abs(ig.reshape(ROWS, -1).sum(1) - (fx - fb)) / np.maximum(np.abs(fx - fb), 1e-6)
        print(f"  {name}: layer IG, baseline {kind}, completeness gap max {gap.max():.2e}")
        checks[f"{name}: layer IG {kind} completeness gap max"] = float(gap.max())
        res["ig_" + kind] = ig.reshape(ROWS, -1)
        res["ig_" + kind + "_base_out"] = fb
        res["ig_" + kind + "_gap"] = gap
    swap.remove()
    np.savez(
        os.path.join(OUT, name + ".npz"),
        x=x, out=out.numpy(), target=np.asarray(target, dtype=np.int64),
        value=v.reshape(ROWS, -1).numpy(), grad=grad.reshape(ROWS, -1).numpy(),
        value_zero_input=v_zero_input.reshape(-1).numpy(), ig_points=np.int64(IG_POINTS), **res)
    return {"fixture": name + ".npz", "value": onnx_name, "value_shape": list(v.shape[1:])}


def grad_cam(model, module, shape, x, target, checks):
    """Grad-CAM (Selvaraju et al. 2017, eq. 1-2) at the output A of module,
    for y = the target's logit (the Softmax input): alpha_c = mean over
    (h, w) of dy/dA_c, map = ReLU(sum_c alpha_c A_c)."""
    swap = LayerSwap(module)
    xt = torch.tensor(x.reshape((ROWS,) + tuple(shape)), dtype=torch.float64)
    with torch.no_grad():
        model.logits(xt)
    a = swap.value.clone()
    swap.replace = a.clone().requires_grad_(True)
    y = model.logits(xt).gather(1, torch.as_tensor(target).view(-1, 1)).sum()
    y.backward()
    da = swap.replace.grad.detach()
    swap.remove()
    alpha = da.mean((2, 3))
    cam = torch.relu((alpha[:, :, None, None] * a).sum(1))
    # The classifier after A is Flatten then one Linear: dy/dA is the
    # target's weight row, so alpha_c is that row's mean over channel c.
    w = model.fc.weight.detach()[torch.as_tensor(target)].view(a.shape)
    err = float((w.mean((2, 3)) - alpha).abs().max())
    checks["digits_cnn: Grad-CAM alpha = mean of the classifier row per channel, max difference"] = err
    return a, alpha, cam


def token_references(name, model, ids, pad_id, checks):
    """Writes NAME.npz for a token model: outputs, the embedding (Gather)
    output E and dout[target]/dE, and integrated gradients at E (the layer
    IG of layer_ig) from zero embeddings and from the padding token's
    embedding at every position, with their sums over the embedding axis:
    one attribution per token (Sundararajan, Taly & Yan 2017, the text
    experiments)."""
    model = model.double().eval()
    swap = LayerSwap(model.emb)
    it = torch.as_tensor(ids)
    with torch.no_grad():
        out = model(it)
    e = swap.value.clone()
    target = out.argmax(1).numpy()
    grad = torch.stack([rest_of_network(model, swap, it[r : r + 1], e[r : r + 1], int(target[r]))[1][0] for r in range(ROWS)])
    res = {}
    fx = out.numpy()[np.arange(ROWS), target]
    pad_row = model.emb.weight.detach()[pad_id]
    for kind, base in (("zero", torch.zeros_like(e[0])), ("pad", pad_row.expand_as(e[0]).clone())):
        ig = np.stack([layer_ig(model, swap, it[r], e[r], base, int(target[r])) for r in range(ROWS)])
        with torch.no_grad():
            swap.replace = base.unsqueeze(0)
            fb = model(it[:1])[0].numpy()[target]
            swap.replace = None
        if kind == "pad":
            with torch.no_grad():
                f_pad = model(torch.full((1, ids.shape[1]), pad_id, dtype=torch.long))[0].numpy()[target]
            if not np.allclose(fb, f_pad, rtol=0, atol=1e-12):
                sys.exit(f"{name}: the padding-embedding baseline differs from an all-padding input")
        tok = ig.sum(2)
        gap = np.abs(tok.sum(1) - (fx - fb)) / np.maximum(np.abs(fx - fb), 1e-6)
        print(f"  {name}: token IG, baseline {kind}, completeness gap max {gap.max():.2e}")
        checks[f"{name}: token IG {kind} completeness gap max"] = float(gap.max())
        if kind == "pad":
            # Where the token is the padding token, E = E' and IG is 0.
            checks[f"{name}: token IG pad at padding positions, max |attribution|"] = float(np.abs(tok[ids == pad_id]).max())
        res["ig_" + kind] = ig.reshape(ROWS, -1)
        res["token_ig_" + kind] = tok
        res["ig_" + kind + "_base_out"] = fb
        res["ig_" + kind + "_expected"] = fx - fb
        res["ig_" + kind + "_gap"] = gap
    swap.remove()
    np.savez(
        os.path.join(OUT, name + ".npz"),
        ids=ids.astype(np.int64), out=out.numpy(), target=target.astype(np.int64),
        emb=e.reshape(ROWS, -1).numpy(), emb_grad=grad.reshape(ROWS, -1).numpy(),
        pad_id=np.int64(pad_id), ig_points=np.int64(IG_POINTS), **res)
    return target


SECTIONS = ("breast_mlp", "digits_cnn", "signal_conv1d", "wine_mlp", "digits_reflect_cnn", "text_cnn", "layers")
MODEL_ORDER = ("breast_mlp.onnx", "digits_cnn.onnx", "digits_cnn_view.onnx", "digits_cnn_batch1.onnx",
               "signal_conv1d.onnx", "wine_mlp.onnx", "digits_reflect_cnn.onnx", "text_cnn.onnx")


def main():
    parser = argparse.ArgumentParser(description="Writes the torch.autograd reference fixtures next to this script.")
    parser.add_argument("--only", default=",".join(SECTIONS),
                        help="comma-separated sections to write (default: all): " + ", ".join(SECTIONS) +
                        "; manifest.json keeps the entries of the others")
    only = set(parser.parse_args().only.split(","))
    if not only <= set(SECTIONS):
        sys.exit(f"unknown sections {sorted(only - set(SECTIONS))}; known: {', '.join(SECTIONS)}")

    manifest = {"models": []}
    path = os.path.join(OUT, "manifest.json")
    if os.path.exists(path):
        with open(path) as f:
            manifest = json.load(f)
    manifest.update({
        "generator": "testdata/reference/generate.py",
        "torch": torch.__version__, "sklearn": sklearn.__version__,
        "onnx": onnx.__version__, "numpy": np.__version__,
        "ig_points": IG_POINTS, "sg_samples": SG_SAMPLES, "sg_noise": SG_NOISE,
        "eg_draws": EG_DRAWS, "eg_refs": EG_REFS})
    checks = manifest.setdefault("checks", {})

    # Every model is one apportion runs (its Go tests run every entry of
    # "models"); "new_models" held those it did not run yet.
    manifest.pop("new_models", None)

    def add(onnx_file, fixture, opset, shape, ops, nodes, dynamic, note, acc, test_acc):
        """Records a model under manifest["models"]."""
        entry = {
            "onnx": onnx_file, "fixture": fixture + ".npz", "opset": opset,
            "input_shape": list(shape), "dynamic_batch": dynamic, "ops": ops,
            "nodes": nodes, "train_accuracy": round(acc, 4),
            "test_accuracy": round(test_acc, 4), "note": note}
        models = [m for m in manifest.get("models", []) if m["onnx"] != onnx_file] + [entry]
        manifest["models"] = sorted(models, key=lambda m: MODEL_ORDER.index(m["onnx"]))
        print(f"{onnx_file}: opset {opset}, ops {ops}")
        return entry

    if "breast_mlp" in only:
        # (a) breast cancer MLP, standardisation inside the graph.
        torch.manual_seed(1)
        bc = load_breast_cancer()
        xtr, xte, ytr, yte = train_test_split(bc.data, bc.target, test_size=0.2, random_state=0, stratify=bc.target)
        xtr, xte = f32(xtr), f32(xte)
        mlp = BreastMLP(xtr.mean(0), xtr.std(0))
        acc = train(mlp, xtr, ytr, epochs=200, lr=1e-3, seed=1)
        test_acc = accuracy(mlp, xte, yte)
        ops, nodes = export(mlp, (30,), "breast_mlp.onnx", 13, True)
        add("breast_mlp.onnx", "breast_mlp", 13, (30,), ops, nodes, True,
            "MLP 30-16-8-2 on scikit-learn's breast cancer data; Sub/Div standardisation with buffers; logits output", acc, test_acc)
        references("breast_mlp", mlp, (30,), xtr, xte, seed=11)

    if "digits_cnn" in only:
        # (b) digits CNN; (c) the same weights with a view flatten (opset 17) and
        # with a fixed batch of one.
        torch.manual_seed(2)
        dg = load_digits()
        dx = (dg.images / 16.0).reshape(-1, 1, 8, 8)
        xtr, xte, ytr, yte = train_test_split(dx, dg.target, test_size=0.2, random_state=0, stratify=dg.target)
        xtr, xte = f32(xtr), f32(xte)
        cnn = DigitsCNN()
        acc = train(cnn, xtr, ytr, epochs=30, lr=3e-3, seed=2)
        test_acc = accuracy(cnn, xte, yte)
        ops, nodes = export(cnn, (1, 8, 8), "digits_cnn.onnx", 13, True)
        add("digits_cnn.onnx", "digits_cnn", 13, (1, 8, 8), ops, nodes, True,
            "CNN on scikit-learn's 8x8 digits (pixels / 16): Conv, Relu, MaxPool, Flatten, Gemm, Softmax", acc, test_acc)
        cnn.view = True
        ops, nodes = export(cnn, (1, 8, 8), "digits_cnn_view.onnx", 17, True)
        add("digits_cnn_view.onnx", "digits_cnn", 17, (1, 8, 8), ops, nodes, True,
            "same weights, flattened with x.view(x.size(0), -1), opset 17", acc, test_acc)
        ops, nodes = export(cnn, (1, 8, 8), "digits_cnn_batch1.onnx", 13, False)
        add("digits_cnn_batch1.onnx", "digits_cnn", 13, (1, 8, 8), ops, nodes, False,
            "same weights, view flatten, fixed batch of 1 (no dynamic_axes)", acc, test_acc)
        cnn.view = False
        references("digits_cnn", cnn, (1, 8, 8), xtr, xte, seed=12, softmax=True)

    if "signal_conv1d" in only:
        # (d) 1-D conv net with batch norm on a seeded synthetic signal.
        torch.manual_seed(3)
        length = 32
        sx, sy = synthetic_signals(600, length, seed=3)
        xtr, xte, ytr, yte = train_test_split(sx, sy, test_size=0.2, random_state=0, stratify=sy)
        xtr, xte = f32(xtr), f32(xte)
        sig = SignalNet(length)
        acc = train(sig, xtr, ytr, epochs=80, lr=3e-3, seed=3)
        test_acc = accuracy(sig, xte, yte)
        ops, nodes = export(sig, (1, length), "signal_conv1d.onnx", 13, True,
                            do_constant_folding=False, training=torch.onnx.TrainingMode.EVAL)
        if "BatchNormalization" not in ops:
            sys.exit("signal_conv1d.onnx: the exporter dropped BatchNormalization")
        add("signal_conv1d.onnx", "signal_conv1d", 13, (1, length), ops, nodes, True,
            "Conv1d, Relu, BatchNorm1d, AvgPool1d, Flatten, Gemm on seeded synthetic sine/square/triangle signals; "
            "do_constant_folding=False, TrainingMode.EVAL", acc, test_acc)
        references("signal_conv1d", sig, (1, length), xtr, xte, seed=13)

    # The eval-mode exporter folds a batch norm that directly follows a
    # convolution into it, whatever do_constant_folding says: record that.
    probe = {}
    for mode in ("EVAL", "PRESERVE"):
        m = nn.Sequential(nn.Conv1d(1, 2, 3), nn.BatchNorm1d(2)).eval()
        buf = io.BytesIO()
        torch.onnx.export(m, torch.zeros(1, 1, 8), buf, opset_version=13, do_constant_folding=False,
                          training=getattr(torch.onnx.TrainingMode, mode))
        probe[mode] = [n.op_type for n in onnx.load_from_string(buf.getvalue()).graph.node]
    manifest["conv_then_batchnorm_export"] = probe
    print("Conv1d directly followed by BatchNorm1d exports as", probe)

    if "wine_mlp" in only:
        # (e) a residual LayerNorm + GELU MLP on scikit-learn's wine data,
        # exported at opset 17 (LayerNormalization; GELU through Erf).
        torch.manual_seed(4)
        xtr, xte, ytr, yte = wine_split()
        wine = WineMLP(xtr.mean(0), xtr.std(0))
        acc = train(wine, xtr, ytr, epochs=300, lr=1e-3, batch=32, seed=4)
        test_acc = accuracy(wine, xte, yte)
        ops, nodes = export(wine, (13,), "wine_mlp.onnx", 17, True)
        add("wine_mlp.onnx", "wine_mlp", 17, (13,), ops, nodes, True,
            "residual MLP on scikit-learn's wine data: Sub/Div standardisation, Linear 32, LayerNorm, GELU, "
            "[Linear 32, GELU, + residual, LayerNorm], Linear 3; logits output", acc, test_acc)
        references("wine_mlp", as_exported(wine, "wine_mlp.onnx"), (13,), xtr, xte, seed=14, checks=checks)

    if "digits_reflect_cnn" in only:
        # (f) a CNN with reflection padding on the digits, opset 17: the
        # exporter computes the pads with a chain of constant nodes.
        torch.manual_seed(5)
        xtr, xte, ytr, yte = digits_split()
        rcnn = ReflectCNN()
        acc = train(rcnn, xtr, ytr, epochs=30, lr=3e-3, seed=5)
        test_acc = accuracy(rcnn, xte, yte)
        ops, nodes = export(rcnn, (1, 8, 8), "digits_reflect_cnn.onnx", 17, True)
        entry = add("digits_reflect_cnn.onnx", "digits_reflect_cnn", 17, (1, 8, 8), ops, nodes, True,
            "CNN on the 8x8 digits with nn.ReflectionPad2d((1, 2, 1, 0)) before a 3x3 Conv, Relu, MaxPool, "
            "Flatten, Gemm; logits output", acc, test_acc)
        entry["pad_chain"] = pad_chain(onnx.load(os.path.join(OUT, "digits_reflect_cnn.onnx")))
        references("digits_reflect_cnn", rcnn, (1, 8, 8), xtr, xte, seed=15, checks=checks)

    if "text_cnn" in only:
        # (g) a text classifier: int64 token ids -> embedding (Gather) -> Conv1d
        # -> mean over positions -> Linear, on seeded synthetic token sequences.
        torch.manual_seed(6)
        vocab = ["[pad]"] + invented_words(TEXT_VOCAB - 1, seed=6)
        with open(os.path.join(OUT, "text_cnn_vocab.txt"), "w") as f:
            f.write("\n".join(vocab) + "\n")
        xtr, xte, ytr, yte = tokens_split()
        text = TextCNN(TEXT_VOCAB)
        acc = train(text, xtr, ytr, epochs=40, lr=3e-3, seed=6, dtype=torch.long)
        test_acc = accuracy(text, xte, yte, dtype=torch.long)
        ops, nodes = export(text, (TEXT_LENGTH,), "text_cnn.onnx", 17, True, dtype=torch.long, input_name="ids")
        entry = add("text_cnn.onnx", "text_cnn", 17, (TEXT_LENGTH,), ops, nodes, True,
            f"text classifier on seeded synthetic token sequences (vocabulary text_cnn_vocab.txt, {TEXT_VOCAB} invented "
            "words, id 0 the padding token): int64 ids, Embedding 8, Conv1d 16 (kernel 3, padding 1), Relu, "
            "mean over positions, Linear 3; logits output", acc, test_acc)
        entry["input_dtype"] = "int64"

        m = onnx.load(os.path.join(OUT, "text_cnn.onnx"))
        (emb_name,) = [n.output[0] for n in m.graph.node if n.op_type == "Gather"]
        token_references("text_cnn", text, xte[:ROWS], 0, checks)
        manifest["tokens"] = {"fixture": "text_cnn.npz", "onnx": "text_cnn.onnx", "vocabulary": "text_cnn_vocab.txt",
                              "value": emb_name, "value_shape": [TEXT_LENGTH, 8], "pad_id": 0}

    if "layers" in only:
        manifest["layers"] = layer_sections(checks)
    for k, v in checks.items():
        print(f"  check {k}: {v:.3g}")
    manifest["checks"] = {k: float(f"{v:.3g}") for k, v in sorted(checks.items())}

    with open(path, "w") as f:
        json.dump(manifest, f, indent=1)
        f.write("\n")


def layer_sections(checks):
    """The layer and Grad-CAM references of the digits CNN and of the wine
    MLP, computed with the weights of the ONNX files as written (so that they
    match the committed models whatever machine trained them)."""
    layers = []
    cnn = load_weights(DigitsCNN(), "digits_cnn.onnx")
    ref = np.load(os.path.join(OUT, "digits_cnn.npz"))
    x = f32(digits_split()[1][:ROWS]).reshape(ROWS, -1)
    if not np.array_equal(x, ref["x"]):
        sys.exit("digits_cnn.npz holds other rows than the held-out split")
    m = onnx.load(os.path.join(OUT, "digits_cnn.onnx"))
    (conv_name,) = value_names(m, "Conv", ["Relu"])
    (pool_name,) = value_names(m, "MaxPool", ["Flatten"])
    entry = layer_references("digits_cnn_layer", cnn, cnn.conv, (1, 8, 8), x, ref["target"], conv_name, checks)
    with np.load(os.path.join(OUT, "digits_cnn_layer.npz")) as z:
        arrays = dict(z)
    checks["digits_cnn_layer: outputs against digits_cnn.npz, max difference"] = float(np.abs(arrays["out"] - ref["out"]).max())
    a, alpha, cam = grad_cam(cnn, cnn.pool, (1, 8, 8), x, ref["target"], checks)
    np.savez(os.path.join(OUT, "digits_cnn_layer.npz"), **arrays,
             gradcam_value=a.reshape(ROWS, -1).numpy(), gradcam_alpha=alpha.numpy(),
             gradcam_map=cam.reshape(ROWS, -1).numpy())
    entry.update({"onnx": "digits_cnn.onnx", "module": "conv", "producer": "Conv", "readers": ["Relu"],
                  "gradcam_value": pool_name, "gradcam_value_shape": list(a.shape[1:])})
    layers.append(entry)

    wine = as_exported(load_weights(WineMLP(np.zeros(13), np.ones(13)), "wine_mlp.onnx"), "wine_mlp.onnx")
    ref = np.load(os.path.join(OUT, "wine_mlp.npz"))
    x = f32(wine_split()[1][:ROWS])
    if not np.array_equal(x, ref["x"]):
        sys.exit("wine_mlp.npz holds other rows than the held-out split")
    m = onnx.load(os.path.join(OUT, "wine_mlp.onnx"))
    (gelu_name,) = [n for n in value_names(m, "Mul", ["Add", "Gemm"]) if n.startswith("/act1/")]
    entry = layer_references("wine_mlp_layer", wine, wine.act1, (13,), x, ref["target"], gelu_name, checks)
    with np.load(os.path.join(OUT, "wine_mlp_layer.npz")) as z:
        checks["wine_mlp_layer: outputs against wine_mlp.npz, max difference"] = float(np.abs(z["out"] - ref["out"]).max())
    entry.update({"onnx": "wine_mlp.onnx", "module": "act1", "producer": "Mul (the last node of the Erf form of GELU)",
                  "readers": ["Gemm", "Add"]})
    layers.append(entry)
    return layers


def load_weights(model, onnx_file):
    """Sets every float parameter and buffer of model from the initializer of
    the same name in onnx_file (torch.onnx.export names them so; a tensor the
    exporter merged into an equal one is read through its Identity node)."""
    m = onnx.load(os.path.join(OUT, onnx_file))
    inits = {i.name: onnx.numpy_helper.to_array(i) for i in m.graph.initializer}
    alias = {n.output[0]: n.input[0] for n in m.graph.node if n.op_type == "Identity"}
    state = model.state_dict()
    for k, v in state.items():
        if v.dtype != torch.float32:
            continue
        a = inits.get(k, inits.get(alias.get(k)))
        if a is None or a.shape != tuple(v.shape):
            sys.exit(f"{onnx_file}: no initializer for {k}")
        state[k] = torch.from_numpy(a.copy())
    model.load_state_dict(state)
    return model.eval()


def digits_split():
    dg = load_digits()
    dx = (dg.images / 16.0).reshape(-1, 1, 8, 8)
    xtr, xte, ytr, yte = train_test_split(dx, dg.target, test_size=0.2, random_state=0, stratify=dg.target)
    return f32(xtr), f32(xte), ytr, yte


def wine_split():
    wd = load_wine()
    xtr, xte, ytr, yte = train_test_split(wd.data, wd.target, test_size=0.2, random_state=0, stratify=wd.target)
    return f32(xtr), f32(xte), ytr, yte


def tokens_split():
    tx, ty = synthetic_tokens(600, TEXT_LENGTH, seed=6)
    return train_test_split(tx, ty, test_size=0.2, random_state=0, stratify=ty)


def synthetic_signals(n, length, seed):
    """Three classes of noisy periodic signals: sine, square and triangle
    waves with random frequency, phase and amplitude, plus Gaussian noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(length) / length
    y = np.arange(n) % 3
    freq = rng.uniform(1.5, 4.0, n)
    phase = rng.uniform(0, 1, n)
    amp = rng.uniform(0.5, 1.5, n)
    u = freq[:, None] * t[None, :] + phase[:, None]
    sine = np.sin(2 * np.pi * u)
    square = np.sign(np.sin(2 * np.pi * u))
    tri = 4 * np.abs(u - np.floor(u + 0.5)) - 1
    x = np.where(y[:, None] == 0, sine, np.where(y[:, None] == 1, square, tri))
    x = amp[:, None] * x + 0.2 * rng.standard_normal((n, length))
    return x.reshape(n, 1, length), y


def invented_words(n, seed):
    """n distinct invented three-syllable words (consonant + vowel, thrice)."""
    rng = np.random.default_rng(seed)
    cons, vows = list("bdfgklmnprstvz"), list("aeiou")
    words = []
    while len(words) < n:
        w = "".join(rng.choice(cons) + rng.choice(vows) for _ in range(3))
        if w not in words:
            words.append(w)
    return words


def synthetic_tokens(n, length, seed):
    """Token sequences in three classes. Ids 1-9 are marker words, three per
    class (1-3 class 0, 4-6 class 1, 7-9 class 2); ids 10 and up are filler.
    Each sequence has 5 to `length` tokens of filler with one or two markers
    of its class at random positions, and one marker of another class with
    probability 0.2; the rest is padding (id 0)."""
    rng = np.random.default_rng(seed)
    y = np.arange(n) % 3
    ids = np.zeros((n, length), dtype=np.int64)
    for i in range(n):
        k = rng.integers(5, length + 1)
        toks = rng.integers(10, TEXT_VOCAB, k)
        marks = rng.integers(1, 3)
        pos = rng.choice(k, marks + 1, replace=False)
        toks[pos[:marks]] = 1 + 3 * y[i] + rng.integers(0, 3, marks)
        if rng.random() < 0.2:
            other = (y[i] + rng.integers(1, 3)) % 3
            toks[pos[marks]] = 1 + 3 * other + rng.integers(0, 3)
        ids[i, :k] = toks
    return ids, y


def pad_chain(m):
    """The nodes that compute the pads of the reflect Pad, in graph order:
    operator, input and output names, attributes and constant values."""
    producer = {o: n for n in m.graph.node for o in n.output}
    (pad,) = [n for n in m.graph.node if n.op_type == "Pad"]
    chain, todo = set(), [pad.input[1]]
    while todo:
        name = todo.pop()
        if name in producer and name not in chain:
            chain.add(name)
            todo.extend(producer[name].input)
    out = []
    for n in m.graph.node:
        if n.output[0] not in chain:
            continue
        e = {"op": n.op_type, "inputs": list(n.input), "output": n.output[0]}
        for a in n.attribute:
            v = onnx.helper.get_attribute_value(a)
            if isinstance(v, onnx.TensorProto):
                v = onnx.numpy_helper.to_array(v).tolist()
            elif isinstance(v, bytes):
                v = v.decode()
            e[a.name] = v
        out.append(e)
    return out


if __name__ == "__main__":
    main()
