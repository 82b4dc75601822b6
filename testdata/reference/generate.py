#!/usr/bin/python3
"""Reference fixtures for apportion's nn and gradattr tests.

Trains four small PyTorch models on data that scikit-learn ships (or on a
seeded synthetic signal), exports them with torch.onnx.export, and computes
for ten held-out rows per model, with torch.autograd in float64, the outputs,
the input gradient of the predicted class, gradient x input, integrated
gradients to the exact integral (zero and training-mean baselines), SmoothGrad
and expected gradients, storing every random draw so that the Go tests can
replay them.

Run by hand (not in CI) with Debian's python3-torch, python3-sklearn and
python3-onnx:

    /usr/bin/python3 testdata/reference/generate.py

Everything is seeded; the files are written next to this script.
"""

import io
import json
import os
import sys

import numpy as np
import onnx
import onnx.numpy_helper
import sklearn
import torch
import torch.nn as nn
import torch.nn.functional as F
from sklearn.datasets import load_breast_cancer, load_digits
from sklearn.model_selection import train_test_split

OUT = os.path.dirname(os.path.abspath(__file__))

ROWS = 10  # held-out rows per model
IG_POINTS = 1 << 15  # midpoint points of the "exact" integral (>= 20,000)
SG_SAMPLES = 50
SG_NOISE = 0.15  # sigma = SG_NOISE * (max - min) of each sample
EG_DRAWS = 200
EG_REFS = 50
CHUNK = 4096  # points per autograd batch

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


def accuracy(model, x, y):
    with torch.no_grad():
        p = model.logits(torch.tensor(x, dtype=torch.float32)).argmax(1).numpy()
    return float((p == y).mean())


def train(model, x, y, epochs, lr, batch=64, seed=0):
    g = torch.Generator().manual_seed(seed)
    xt = torch.tensor(x, dtype=torch.float32)
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
    return accuracy(model, x, y)


def export(model, shape, path, opset, dynamic, **kw):
    dummy = torch.zeros((1,) + tuple(shape), dtype=torch.float32)
    axes = {"x": {0: "N"}, "y": {0: "N"}} if dynamic else None
    buf = io.BytesIO()
    torch.onnx.export(
        model, dummy, buf, opset_version=opset, input_names=["x"],
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


def references(name, model, shape, xtrain, xtest, seed, softmax=False):
    """Writes NAME.npz with every reference value for ROWS held-out rows."""
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


def main():
    manifest = {
        "generator": "testdata/reference/generate.py",
        "torch": torch.__version__, "sklearn": sklearn.__version__,
        "onnx": onnx.__version__, "numpy": np.__version__,
        "ig_points": IG_POINTS, "sg_samples": SG_SAMPLES, "sg_noise": SG_NOISE,
        "eg_draws": EG_DRAWS, "eg_refs": EG_REFS, "models": [],
    }

    def add(onnx_file, fixture, opset, shape, ops, nodes, dynamic, note, acc, test_acc):
        manifest["models"].append({
            "onnx": onnx_file, "fixture": fixture + ".npz", "opset": opset,
            "input_shape": list(shape), "dynamic_batch": dynamic, "ops": ops,
            "nodes": nodes, "train_accuracy": round(acc, 4),
            "test_accuracy": round(test_acc, 4), "note": note})
        print(f"{onnx_file}: opset {opset}, ops {ops}")

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

    with open(os.path.join(OUT, "manifest.json"), "w") as f:
        json.dump(manifest, f, indent=1)
        f.write("\n")


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


if __name__ == "__main__":
    main()
