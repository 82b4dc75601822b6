#!/usr/bin/python3
"""PyTorch side of apportion's benchmark comparison (bench/compare).

Rebuilds each zoo model (bench/models/*.onnx, written by `go run ./bench/zoo`)
as torch.nn modules, loads the weights from the ONNX initializers with the
onnx package, and answers JSON requests, one per line on stdin, one JSON
answer per line on stdout:

  {"cmd": "info"}                                  -> versions, threads
  {"cmd": "check", "model": M, "n": N}             -> outputs and input gradients
  {"cmd": "time", "model": M, "task": T, "iters": K, "samples": S}
                                                   -> seconds for K calls
  {"cmd": "forward", "path": P, "n": N}            -> outputs of N input rows
  {"cmd": "rows", "path": P, "rows": R, "batch": B, "iters": K}
                                                   -> seconds for K times R rows
                                                      forward, B per call

Tasks are the ones bench/compare times on the Go side: predict, gradient,
ig64 (one batched pass of 64 trapezoid points), smoothgrad50 (one batched
pass of 50 noisy copies) and ig64x (ig64 for each of S samples in turn). "forward" and "rows" load any
model file of the same operators plus Sub and Div by a constant and
Softmax (the demo models): the forward-only table of bench/compare.

Run with Debian's interpreter: /usr/bin/python3 bench/torch_side.py --threads 1
"""

import argparse
import json
import math
import os
import sys
import time

import numpy as np
import onnx
import onnx.numpy_helper
import torch
import torch.nn as nn

TARGET_IG_POINTS = 64
SMOOTHGRAD_COPIES = 50
SMOOTHGRAD_NOISE = 0.15  # σ = 0.15·(max x − min x), gradattr.DefaultNoise


def attr(node, name, default=None):
    for a in node.attribute:
        if a.name == name:
            return onnx.helper.get_attribute_value(a)
    return default


class Constant(nn.Module):
    """x − c or x / c for a constant c (ONNX Sub and Div with an initializer)."""

    def __init__(self, op, c):
        super().__init__()
        self.op = op
        self.register_buffer("c", torch.from_numpy(c.copy()))

    def forward(self, x):
        return x - self.c if self.op == "Sub" else x / self.c


def build(path):
    """Rebuild the ONNX graph (a chain of Sub/Div by constants, Conv, Relu,
    MaxPool, Flatten, Gemm, Softmax) as nn.Sequential."""
    m = onnx.load(path)
    inits = {t.name: onnx.numpy_helper.to_array(t) for t in m.graph.initializer}
    layers = []
    for node in m.graph.node:
        op = node.op_type
        if op == "Conv":
            w = inits[node.input[1]]
            b = inits[node.input[2]]
            pads = attr(node, "pads", [0, 0, 0, 0])
            strides = attr(node, "strides", [1, 1])
            assert pads[0] == pads[2] and pads[1] == pads[3], "asymmetric pads"
            conv = nn.Conv2d(w.shape[1], w.shape[0], tuple(w.shape[2:]), stride=tuple(strides), padding=(pads[0], pads[1]))
            conv.weight.data = torch.from_numpy(w.copy())
            conv.bias.data = torch.from_numpy(b.copy())
            layers.append(conv)
        elif op == "Relu":
            layers.append(nn.ReLU())
        elif op in ("Sub", "Div"):
            layers.append(Constant(op, inits[node.input[1]]))
        elif op == "Softmax":
            layers.append(nn.Softmax(dim=attr(node, "axis", -1)))
        elif op == "MaxPool":
            k = attr(node, "kernel_shape")
            s = attr(node, "strides", k)
            layers.append(nn.MaxPool2d(tuple(k), stride=tuple(s)))
        elif op == "Flatten":
            assert attr(node, "axis", 1) == 1
            layers.append(nn.Flatten())
        elif op == "Gemm":
            assert attr(node, "transA", 0) == 0
            assert attr(node, "alpha", 1.0) == 1.0 and attr(node, "beta", 1.0) == 1.0
            w = inits[node.input[1]]
            if attr(node, "transB", 0) == 0:  # B is (in, out); Linear keeps (out, in)
                w = w.T
            b = inits[node.input[2]]
            lin = nn.Linear(w.shape[1], w.shape[0])
            lin.weight.data = torch.from_numpy(w.copy())
            lin.bias.data = torch.from_numpy(b.copy())
            layers.append(lin)
        else:
            raise ValueError("unsupported op %s in %s" % (op, path))
    shape = [d.dim_value for d in m.graph.input[0].type.tensor_type.shape.dim[1:]]
    model = nn.Sequential(*layers).float().eval()
    for p in model.parameters():
        p.requires_grad_(False)
    return model, shape


def bench_input(shape, n):
    """The same input as bench.Input: element i is 0.5·sin(0.37·i + 0.1)."""
    size = n * int(np.prod(shape))
    i = np.arange(size, dtype=np.float64)
    x = 0.5 * np.sin(0.37 * i + 0.1)
    return torch.from_numpy(x.astype(np.float32)).reshape([n] + shape)


def gradient(model, x, target):
    x = x.clone().requires_grad_(True)
    out = model(x)
    out[:, target].sum().backward()
    return out.detach(), x.grad


def integrated_gradients(model, x, target, points=TARGET_IG_POINTS, base=None):
    """Trapezoid IG against baseline base (default zero), all points in one
    pass (Sundararajan et al. 2017, eq. 3 with the trapezoid rule)."""
    if base is None:
        base = torch.zeros_like(x)
    alpha = torch.linspace(0.0, 1.0, points, dtype=torch.float32)
    w = torch.full((points,), 1.0 / (points - 1), dtype=torch.float32)
    w[0] *= 0.5
    w[-1] *= 0.5
    view = [points] + [1] * (x.dim() - 1)
    pts = (base + alpha.view(view) * (x - base)).requires_grad_(True)
    out = model(pts)
    out[:, target].sum().backward()
    g = (pts.grad * w.view(view)).sum(0, keepdim=True)
    return (x - base) * g, out[-1, target].item() - out[0, target].item()


def smoothgrad(model, x, target, copies=SMOOTHGRAD_COPIES, gen=None):
    """SmoothGrad (Smilkov et al. 2017, eq. 3): the mean gradient over noisy copies."""
    sigma = SMOOTHGRAD_NOISE * (x.max() - x.min()).item()
    noise = torch.randn((copies,) + tuple(x.shape[1:]), generator=gen) * sigma
    pts = (x + noise).requires_grad_(True)
    out = model(pts)
    out[:, target].sum().backward()
    return pts.grad.mean(0, keepdim=True)


class Side:
    def __init__(self, models_dir):
        self.dir = models_dir
        self.models = {}
        self.gen = torch.Generator().manual_seed(1)
        self.warm = set()

    def model(self, name):
        return self.file(os.path.join(self.dir, name + ".onnx"))

    def file(self, path):
        if path not in self.models:
            self.models[path] = build(path)
        return self.models[path]

    def forward(self, req):
        model, shape = self.file(req["path"])
        with torch.no_grad():
            out = model(bench_input(shape, req.get("n", 1)))
        return {"out": out.flatten().tolist()}

    def rows(self, req):
        """Forward passes of req["rows"] rows in batches of req["batch"],
        req["iters"] times: the model cost of a forward-only method."""
        model, shape = self.file(req["path"])
        total, batch = req["rows"], req["batch"]
        x = bench_input(shape, min(batch, total))

        def call():
            with torch.no_grad():
                for lo in range(0, total, batch):
                    model(x[:min(batch, total - lo)])
        key = (req["path"], total, batch)
        if key not in self.warm:
            call()
            self.warm.add(key)
        t0 = time.perf_counter()
        for _ in range(req["iters"]):
            call()
        return {"seconds": time.perf_counter() - t0}

    def check(self, req):
        model, shape = self.model(req["model"])
        n = req.get("n", 1)
        x = bench_input(shape, n)
        with torch.no_grad():
            out = model(x)
        target = int(out[0].argmax())
        _, g = gradient(model, x, target)
        # From x' = 0.1·x: the zero baseline puts ties in every max-pooling
        # window at alpha = 0, where the gradient is not unique.
        ig, delta = integrated_gradients(model, x[:1], target, base=0.1 * x[:1])
        return {"out": out.flatten().tolist(), "target": target, "grad": g.flatten().tolist(),
                "ig": ig.flatten().tolist(), "ig_delta": delta}

    def time(self, req):
        model, shape = self.model(req["model"])
        task, iters = req["task"], req["iters"]
        samples = req.get("samples", 1)
        x = bench_input(shape, max(samples, 1))
        x1 = x[:1]
        with torch.no_grad():
            target = int(model(x1)[0].argmax())
        if task == "predict":
            def call():
                with torch.no_grad():
                    model(x1)
        elif task == "gradient":
            def call():
                gradient(model, x1, target)
        elif task == "ig64":
            def call():
                integrated_gradients(model, x1, target)
        elif task == "smoothgrad50":
            def call():
                smoothgrad(model, x1, target, gen=self.gen)
        elif task == "ig64x":
            def call():
                for i in range(samples):
                    integrated_gradients(model, x[i:i + 1], target)
        else:
            raise ValueError("unknown task %r" % task)
        key = (req["model"], task, samples)
        if key not in self.warm:  # warm up outside the timing, once
            call()
            self.warm.add(key)
        t0 = time.perf_counter()
        for _ in range(iters):
            call()
        return {"seconds": time.perf_counter() - t0}


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--models", default=os.path.join(os.path.dirname(os.path.abspath(__file__)), "models"))
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    side = Side(args.models)
    for line in sys.stdin:
        line = line.strip()
        if not line:
            continue
        try:
            req = json.loads(line)
            cmd = req["cmd"]
            if cmd == "info":
                resp = {"torch": torch.__version__, "numpy": np.__version__, "onnx": onnx.__version__,
                        "threads": torch.get_num_threads(), "python": sys.version.split()[0]}
            elif cmd == "check":
                resp = side.check(req)
            elif cmd == "time":
                resp = side.time(req)
            elif cmd == "forward":
                resp = side.forward(req)
            elif cmd == "rows":
                resp = side.rows(req)
            else:
                raise ValueError("unknown cmd %r" % cmd)
        except Exception as e:  # report, keep serving
            resp = {"error": "%s: %s" % (type(e).__name__, e)}
        sys.stdout.write(json.dumps(resp) + "\n")
        sys.stdout.flush()


if __name__ == "__main__":
    main()
