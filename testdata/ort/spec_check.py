#!/usr/bin/python3
"""A second opinion on the ONNX Runtime fixtures: evaluates every case's
graph with numpy in float64, each operator written from the ONNX 1.23
specification (../shared/onnx-spec/Operators.md and Changelog.md), and
compares with the committed output_N.pb in units of the fixtures' tolerance
1e-5 + 1e-4*|want|. Not needed to regenerate the fixtures; run by hand with
Debian's python3-onnx and python3-numpy:

    /usr/bin/python3 testdata/ort/spec_check.py testdata/ort

The half-precision cases are skipped. It prints every output that deviates
by more than the tolerance and the largest deviations.

With --reference it evaluates instead every ONNX file of the torch.autograd
fixtures in float64 and compares with the torch outputs stored beside them:

    /usr/bin/python3 testdata/ort/spec_check.py --reference testdata/reference
"""
import json, math, os, sys
import numpy as np
import onnx, onnx.numpy_helper as nh
from onnx import helper


def load(p):
    t = onnx.TensorProto(); t.ParseFromString(open(p, 'rb').read()); return nh.to_array(t)

def attrs(n):
    return {a.name: helper.get_attribute_value(a) for a in n.attribute}

def s(v): return v.decode() if isinstance(v, bytes) else v

# ---------------- resize, per spec
def coord(xr, scale, lin, lout, ctm, roi=None, owf=None):
    if ctm == 'half_pixel': return (xr + 0.5) / scale - 0.5
    if ctm == 'pytorch_half_pixel': return (xr + 0.5) / scale - 0.5 if lout > 1 else 0.0
    if ctm == 'align_corners': return 0.0 if lout == 1 else xr * (lin - 1) / (lout - 1)
    if ctm == 'asymmetric': return xr / scale
    if ctm == 'half_pixel_symmetric':
        adj = lout / owf; center = lin / 2; off = center * (1 - adj)
        return off + (xr + 0.5) / scale - 0.5
    if ctm == 'tf_crop_and_resize':
        st, en = roi
        return st * (lin - 1) + xr * (en - st) * (lin - 1) / (lout - 1) if lout > 1 else 0.5 * (st + en) * (lin - 1)
    raise ValueError(ctm)

def nearest_idx(x, mode):
    if mode == 'round_prefer_floor': return math.ceil(x - 0.5) if x - math.floor(x) == 0.5 else round(x)
    if mode == 'round_prefer_ceil': return math.floor(x + 0.5)
    if mode == 'floor': return math.floor(x)
    if mode == 'ceil': return math.ceil(x)

def resize(x, a, roi, scales, sizes):
    r = x.ndim
    axes = [ax % r for ax in a.get('axes', range(r))]
    mode = s(a.get('mode', 'nearest')); ctm = s(a.get('coordinate_transformation_mode', 'half_pixel'))
    nm = s(a.get('nearest_mode', 'round_prefer_floor')); pol = s(a.get('keep_aspect_ratio_policy', 'stretch'))
    ext = a.get('extrapolation_value', 0.0); aa = a.get('antialias', 0)
    sc = [1.0] * r; out = list(x.shape); owf = list(map(float, x.shape)); rois = [(0.0, 1.0)] * r
    if scales is not None and len(scales):
        for i, ax in enumerate(axes):
            sc[ax] = float(scales[i]); owf[ax] = x.shape[ax] * sc[ax]; out[ax] = int(math.floor(owf[ax]))
    else:
        if pol != 'stretch':
            f = min if pol == 'not_larger' else max
            k = f(sizes[i] / x.shape[ax] for i, ax in enumerate(axes))
            for ax in axes:
                out[ax] = int(math.floor(k * x.shape[ax] + 0.5)); sc[ax] = k; owf[ax] = k * x.shape[ax]
        else:
            for i, ax in enumerate(axes):
                out[ax] = int(sizes[i]); sc[ax] = out[ax] / x.shape[ax]; owf[ax] = out[ax]
    if roi is not None and len(roi):
        n = len(axes)
        for i, ax in enumerate(axes): rois[ax] = (float(roi[i]), float(roi[n + i]))
    y = x.astype(np.float64)
    for ax in range(r):
        if out[ax] == x.shape[ax] and sc[ax] == 1.0 and ctm != 'tf_crop_and_resize': continue
        lin = y.shape[ax]; cols = []
        for xr in range(out[ax]):
            xo = coord(xr, sc[ax], lin, out[ax], ctm, rois[ax], owf[ax])
            sl = lambda i: np.take(y, [i], axis=ax)
            if ctm == 'tf_crop_and_resize' and (xo < 0 or xo > lin - 1):
                cols.append(np.full_like(sl(0), ext)); continue
            if mode == 'nearest':
                i = min(max(nearest_idx(xo, nm), 0), lin - 1); cols.append(sl(i))
            elif mode == 'linear' and not (aa and sc[ax] < 1):
                xo = min(max(xo, 0), lin - 1)
                i0 = int(math.floor(xo)); i1 = min(i0 + 1, lin - 1); w = xo - i0
                cols.append(sl(i0) * (1 - w) + sl(i1) * w)
            else:
                # Antialiased linear: the triangle filter stretched by
                # 1/scale, normalised over the whole filter; taps outside
                # the input read the edge pixel (what ONNX Runtime does; the
                # specification does not say).
                supp = 1.0 / sc[ax]
                lo, hi = int(math.floor(xo - supp)), int(math.ceil(xo + supp))
                ws = [max(0.0, 1 - abs(i - xo) / supp) for i in range(lo, hi + 1)]
                tot = sum(ws)
                cols.append(sum(w / tot * sl(min(max(i, 0), lin - 1)) for w, i in zip(ws, range(lo, hi + 1)) if w > 0))
        y = np.concatenate(cols, axis=ax)
    return y

# ---------------- pooling, per spec
def pool(x, a, kind):
    k = a['kernel_shape']; nd = len(k)
    st = a.get('strides', [1] * nd); dl = a.get('dilations', [1] * nd); pd = a.get('pads', [0] * 2 * nd)
    ceil = a.get('ceil_mode', 0); cip = a.get('count_include_pad', 0)
    sp = x.shape[2:]; outs = []
    for i in range(nd):
        eff = dl[i] * (k[i] - 1) + 1
        v = (sp[i] + pd[i] + pd[nd + i] - eff) / st[i] + 1
        o = math.ceil(v) if ceil else math.floor(v)
        if ceil and (o - 1) * st[i] >= sp[i] + pd[i]: o -= 1  # windows starting in the right padding are dropped
        outs.append(o)
    y = np.zeros(x.shape[:2] + tuple(outs))
    for idx in np.ndindex(*outs):
        vals = []; n_pad_in = 0
        taps = [[idx[i] * st[i] - pd[i] + j * dl[i] for j in range(k[i])] for i in range(nd)]
        cnt = 0; acc = []
        for t in np.ndindex(*k):
            pos = [taps[i][t[i]] for i in range(nd)]
            inside = all(0 <= pos[i] < sp[i] for i in range(nd))
            inpad = all(-pd[i] <= pos[i] < sp[i] + pd[nd + i] for i in range(nd))
            if inside: acc.append(x[(slice(None), slice(None)) + tuple(pos)])
            if inpad: cnt += 1
        if kind == 'max': y[(slice(None), slice(None)) + idx] = np.max(acc, axis=0)
        else:
            den = cnt if cip else len(acc)
            y[(slice(None), slice(None)) + idx] = np.sum(acc, axis=0) / den
    return y

def conv(x, w, b, a):
    nd = w.ndim - 2; g = a.get('group', 1); k = w.shape[2:]
    st = a.get('strides', [1] * nd); dl = a.get('dilations', [1] * nd); pd = list(a.get('pads', [0] * 2 * nd))
    ap = s(a.get('auto_pad', 'NOTSET'))
    if ap.startswith('SAME'):
        for i in range(nd):
            o = -(-x.shape[2 + i] // st[i]); tot = max(0, (o - 1) * st[i] + dl[i] * (k[i] - 1) + 1 - x.shape[2 + i])
            lo = tot // 2 if ap == 'SAME_UPPER' else tot - tot // 2
            pd[i] = lo; pd[nd + i] = tot - lo
    xp = np.pad(x, [(0, 0), (0, 0)] + [(pd[i], pd[nd + i]) for i in range(nd)])
    outs = [(xp.shape[2 + i] - dl[i] * (k[i] - 1) - 1) // st[i] + 1 for i in range(nd)]
    M = w.shape[0]; cg = w.shape[1]; y = np.zeros((x.shape[0], M) + tuple(outs))
    for m in range(M):
        gi = m // (M // g)
        for idx in np.ndindex(*outs):
            acc = 0
            for t in np.ndindex(*k):
                pos = tuple(idx[i] * st[i] + t[i] * dl[i] for i in range(nd))
                acc = acc + np.einsum('nc,c->n', xp[(slice(None), slice(gi * cg, (gi + 1) * cg)) + pos], w[(m, slice(None)) + t])
            y[(slice(None), m) + idx] = acc + (b[m] if b is not None else 0)
    return y

def reduce(op, x, axes, a):
    if axes is None and 'axes' in a:  # an attribute before opset 18 (13 for ReduceSum)
        axes = a['axes']
    kd = a.get('keepdims', 1); noop = a.get('noop_with_empty_axes', 0)
    if axes is None or len(axes) == 0:
        if noop: return x
        axes = tuple(range(x.ndim))
    axes = tuple(int(v) % x.ndim for v in axes)
    f = {'ReduceMean': np.mean, 'ReduceSum': np.sum, 'ReduceMax': np.max, 'ReduceMin': np.min,
         'ReduceL2': lambda v, axis, keepdims: np.sqrt(np.sum(v * v, axis=axis, keepdims=keepdims)),
         'ReduceLogSumExp': lambda v, axis, keepdims: (lambda m: np.log(np.sum(np.exp(v - m), axis=axis, keepdims=True)) + m)(np.max(v, axis=axis, keepdims=True)).reshape(np.sum(v, axis=axis, keepdims=keepdims).shape)}[op]
    return f(x, axis=axes, keepdims=bool(kd))

def pad(x, pads, mode, cval, axes):
    r = x.ndim
    axes = list(range(r)) if axes is None else [int(v) % r for v in axes]
    n = len(axes); pw = [(0, 0)] * r
    for i, ax in enumerate(axes): pw[ax] = (int(pads[i]), int(pads[n + i]))
    # negative pads crop
    sl = tuple(slice(-min(b, 0), x.shape[i] + min(e, 0)) for i, (b, e) in enumerate(pw))
    x = x[sl]; pw = [(max(b, 0), max(e, 0)) for b, e in pw]
    m = {'constant': 'constant', 'reflect': 'reflect', 'edge': 'edge', 'wrap': 'wrap'}[mode]
    return np.pad(x, pw, mode=m, constant_values=cval) if m == 'constant' else np.pad(x, pw, mode=m)

def erf(v): return np.vectorize(math.erf)(v)

def run(model, feeds):
    # Every float32 value (inputs, initializers, results) is widened to
    # float64 on the way in, so each operator computes in float64.
    wide = lambda v: v.astype(np.float64) if isinstance(v, np.ndarray) and v.dtype == np.float32 else v
    env = {k: wide(v) for k, v in feeds.items()}
    for init in model.graph.initializer: env[init.name] = wide(nh.to_array(init))
    env[''] = None
    for n in model.graph.node:
        a = attrs(n); I = [env[i] if i else None for i in n.input]; op = n.op_type
        x = I[0] if I else None
        if x is not None and isinstance(x, np.ndarray) and x.dtype == np.float32: x = x.astype(np.float64)
        un = {'Abs': np.abs, 'Neg': np.negative, 'Sqrt': np.sqrt, 'Exp': np.exp, 'Log': np.log, 'Tanh': np.tanh,
              'Sigmoid': lambda v: 1 / (1 + np.exp(-v)), 'Erf': erf, 'Relu': lambda v: np.maximum(v, 0),
              'Reciprocal': lambda v: 1 / v, 'Sign': np.sign, 'Floor': np.floor, 'Ceil': np.ceil, 'Round': np.round,
              'Softplus': lambda v: np.log1p(np.exp(v)), 'Softsign': lambda v: v / (1 + np.abs(v)),
              'Mish': lambda v: v * np.tanh(np.log1p(np.exp(v))), 'Identity': lambda v: v,
              'HardSwish': lambda v: v * np.clip(v / 6 + 0.5, 0, 1)}
        if op in un: y = un[op](x)
        elif op == 'Elu': al = a.get('alpha', 1.0); y = np.where(x > 0, x, al * (np.exp(x) - 1))
        elif op == 'Celu': al = a.get('alpha', 1.0); y = np.maximum(0, x) + np.minimum(0, al * (np.exp(x / al) - 1))
        elif op == 'Selu':
            al = a.get('alpha', 1.67326319217681884765625); g = a.get('gamma', 1.05070102214813232421875)
            y = g * np.where(x > 0, x, al * (np.exp(x) - 1))
        elif op == 'LeakyRelu': y = np.where(x >= 0, x, a.get('alpha', 0.01) * x)
        elif op == 'ThresholdedRelu': y = np.where(x > a.get('alpha', 1.0), x, 0)
        elif op == 'HardSigmoid': y = np.clip(a.get('alpha', 0.2) * x + a.get('beta', 0.5), 0, 1)
        elif op == 'Gelu':
            if s(a.get('approximate', 'none')) == 'tanh': y = 0.5 * x * (1 + np.tanh(math.sqrt(2 / math.pi) * (x + 0.044715 * x ** 3)))
            else: y = 0.5 * x * (1 + erf(x / math.sqrt(2)))
        elif op in ('Add', 'Sub', 'Mul', 'Div', 'Pow'):
            b = I[1].astype(np.float64) if I[1].dtype == np.float32 else I[1]
            y = {'Add': np.add, 'Sub': np.subtract, 'Mul': np.multiply, 'Div': np.divide, 'Pow': np.power}[op](x, b)
            if I[0].dtype in (np.int64,): y = y.astype(np.int64)
        elif op == 'PRelu': y = np.where(x >= 0, x, I[1] * x)
        elif op in ('Min', 'Max', 'Sum', 'Mean'):
            vs = np.broadcast_arrays(*[v.astype(np.float64) for v in I])
            y = {'Min': lambda: np.min(vs, 0), 'Max': lambda: np.max(vs, 0), 'Sum': lambda: np.sum(vs, 0), 'Mean': lambda: np.mean(vs, 0)}[op]()
        elif op == 'Clip':
            lo = I[1] if len(I) > 1 and I[1] is not None else -np.inf; hi = I[2] if len(I) > 2 and I[2] is not None else np.inf
            y = np.clip(x, lo, hi)
        elif op in ('Softmax', 'LogSoftmax'):
            ax = a.get('axis', -1); e = np.exp(x - x.max(axis=ax, keepdims=True)); sm = e / e.sum(axis=ax, keepdims=True)
            y = sm if op == 'Softmax' else np.log(sm)
        elif op == 'MatMul': y = np.matmul(x, I[1])
        elif op == 'Gemm':
            A = x.T if a.get('transA', 0) else x; B = I[1].T if a.get('transB', 0) else I[1]
            y = a.get('alpha', 1.0) * (A @ B) + (a.get('beta', 1.0) * I[2] if len(I) > 2 and I[2] is not None else 0)
        elif op == 'Concat': y = np.concatenate(I, axis=a['axis'])
        elif op == 'Gather': y = np.take(x, I[1], axis=a.get('axis', 0))
        elif op == 'Slice':
            st, en = I[1], I[2]; axes = I[3] if len(I) > 3 and I[3] is not None else range(len(st))
            steps = I[4] if len(I) > 4 and I[4] is not None else [1] * len(st)
            sl = [slice(None)] * x.ndim
            for s0, e0, ax, sp in zip(st, en, axes, steps):
                d = x.shape[ax]; s0 = int(s0); e0 = int(e0); sp = int(sp)
                s0 = s0 + d if s0 < 0 else s0; e0 = e0 + d if e0 < 0 else e0
                if sp > 0: s0 = min(max(s0, 0), d); e0 = min(max(e0, 0), d)
                else: s0 = min(max(s0, -1), d - 1); e0 = min(max(e0, -1), d - 1)
                sl[int(ax)] = slice(s0, e0 if e0 >= 0 else None, sp)
            y = x[tuple(sl)]
        elif op == 'Range': y = np.arange(float(I[0]), float(I[1]), float(I[2]))
        elif op == 'BatchNormalization': sh = (1, -1) + (1,) * (x.ndim - 2); y = (x - I[3].reshape(sh)) / np.sqrt(I[4].reshape(sh) + a.get('epsilon', 1e-5)) * I[1].reshape(sh) + I[2].reshape(sh)
        elif op == 'InstanceNormalization':
            ax = tuple(range(2, x.ndim)); sh = (1, -1) + (1,) * (x.ndim - 2)
            y = (x - x.mean(ax, keepdims=True)) / np.sqrt(x.var(ax, keepdims=True) + a.get('epsilon', 1e-5)) * I[1].reshape(sh) + I[2].reshape(sh)
        elif op == 'LayerNormalization':
            ax0 = a.get('axis', -1) % x.ndim; ax = tuple(range(ax0, x.ndim)); eps = a.get('epsilon', 1e-5)
            mu = x.mean(ax, keepdims=True); var = x.var(ax, keepdims=True); inv = 1 / np.sqrt(var + eps)
            y = (x - mu) * inv * I[1] + (I[2] if len(I) > 2 and I[2] is not None else 0)
            outs = [y, mu, inv]
            for o, v in zip(n.output, outs): env[o] = wide(v)
            continue
        elif op == 'GroupNormalization':
            G = a['num_groups']; eps = a.get('epsilon', 1e-5); N, C = x.shape[:2]
            xg = x.reshape(N, G, -1); mu = xg.mean(2, keepdims=True); var = xg.var(2, keepdims=True)
            xn = ((xg - mu) / np.sqrt(var + eps)).reshape(x.shape); sh = (1, -1) + (1,) * (x.ndim - 2)
            sc, bi = I[1], I[2]
            if sc.shape[0] == G and G != C: sc = np.repeat(sc, C // G); bi = np.repeat(bi, C // G)
            y = xn * sc.reshape(sh) + bi.reshape(sh)
        elif op == 'Where': y = np.where(I[0], I[1], I[2])
        elif op in ('Equal', 'Less', 'Greater'): y = {'Equal': np.equal, 'Less': np.less, 'Greater': np.greater}[op](I[0], I[1])
        elif op == 'Expand': y = x * np.ones(tuple(int(v) for v in I[1]))
        elif op == 'Tile': y = np.tile(x, tuple(int(v) for v in I[1]))
        elif op == 'Split':
            ax = a.get('axis', 0) % x.ndim; d = x.shape[ax]; no = len(n.output)
            if len(I) > 1 and I[1] is not None: parts = [int(v) for v in I[1]]
            else:
                ch = -(-d // no); parts = [min(ch, d - i * ch) for i in range(no)]
            ys = np.split(x, np.cumsum(parts)[:-1], axis=ax)
            for o, v in zip(n.output, ys): env[o] = wide(v)
            continue
        elif op.startswith('Reduce'): y = reduce(op, x, I[1] if len(I) > 1 else None, a)
        elif op == 'Pad':
            y = pad(x, I[1], s(a.get('mode', 'constant')), float(I[2]) if len(I) > 2 and I[2] is not None else 0.0, I[3] if len(I) > 3 else None)
        elif op in ('MaxPool', 'AveragePool'): y = pool(x, a, 'max' if op == 'MaxPool' else 'avg')
        elif op == 'GlobalAveragePool': y = x.mean(tuple(range(2, x.ndim)), keepdims=True)
        elif op == 'GlobalMaxPool': y = x.max(tuple(range(2, x.ndim)), keepdims=True)
        elif op == 'Conv': y = conv(x, I[1], I[2] if len(I) > 2 else None, a)
        elif op == 'Flatten': ax = a.get('axis', 1) % x.ndim; y = x.reshape(int(np.prod(x.shape[:ax])), -1)
        elif op == 'Reshape':
            shp = [int(v) for v in I[1]]; shp = [x.shape[i] if v == 0 else v for i, v in enumerate(shp)]; y = x.reshape(shp)
        elif op == 'Transpose': y = np.transpose(x, a.get('perm', None))
        elif op == 'Squeeze': y = np.squeeze(x, axis=tuple(int(v) for v in I[1]) if len(I) > 1 else None)
        elif op == 'Unsqueeze':
            r = x.ndim + len(I[1]); y = x
            for ax in sorted(int(v) % r for v in I[1]): y = np.expand_dims(y, ax)
        elif op == 'Dropout': y = x
        elif op == 'Constant':
            if 'value' in a: y = nh.to_array(a['value'])
            elif 'value_float' in a: y = np.array(a['value_float'], np.float32)
            elif 'value_ints' in a: y = np.array(a['value_ints'], np.int64)
        elif op == 'Cast':
            to = a['to']; dt = {1: np.float32, 10: np.float16, 11: np.float64, 7: np.int64}[to]
            y = I[0].astype(dt) if to != 1 else I[0].astype(np.float32)
            if to == 11: y = I[0].astype(np.float64)
        elif op == 'Shape':
            shp = np.array(x.shape, np.int64); st = a.get('start', 0); en = a.get('end', None); y = shp[st:en]
        elif op == 'ConstantOfShape': y = np.full(tuple(int(v) for v in x), nh.to_array(a['value'])[0])
        elif op in ('Resize', 'Upsample'):
            if op == 'Upsample':
                sc = a['scales'] if 'scales' in a else I[1]; aa = {'mode': a.get('mode', b'nearest'), 'coordinate_transformation_mode': 'asymmetric', 'nearest_mode': 'floor'}
                y = resize(x, aa, None, sc, None)
            else:
                y = resize(x, a, I[1] if len(I) > 1 else None, I[2] if len(I) > 2 else None, I[3] if len(I) > 3 else None)
        else:
            raise NotImplementedError(op)
        env[n.output[0]] = wide(np.asarray(y))
    return [env[o.name] for o in model.graph.output]

def check_ort(root):
    man = json.load(open(os.path.join(root, 'manifest.json')))
    worst = []
    for c in man['cases']:
        d = os.path.join(root, c['dir'])
        m = onnx.load(os.path.join(d, 'model.onnx'))
        if c['name'].startswith(('bfloat16', 'float16')): continue
        feeds = {i['name']: load(os.path.join(d, 'test_data_set_0', f'input_{k}.pb')) for k, i in enumerate(c['inputs'])}
        try:
            got = run(m, feeds)
        except NotImplementedError as e:
            print(c['name'], 'not implemented here:', e); continue
        for k, (o, g) in enumerate(zip(c['outputs'], got)):
            want = load(os.path.join(d, 'test_data_set_0', f'output_{k}.pb'))
            g = np.asarray(g)
            if g.shape != want.shape:
                print(f"{c['name']} output {k}: shape numpy {g.shape} ORT {want.shape}"); continue
            if want.dtype.kind in 'iub':
                ok = np.array_equal(g.astype(want.dtype), want); r = 0 if ok else np.inf
            else:
                r = float(np.max(np.abs(g - want.astype(np.float64)) / (1e-5 + 1e-4 * np.abs(want.astype(np.float64))), initial=0))
            worst.append((r, c['name'], k))
            if r > 1: print(f"{c['name']} output {k}: deviation {r:.3g} (in units of the tolerance)")
    worst.sort(reverse=True)
    print('checked', len(worst), 'outputs; largest deviations:', worst[:8])


def check_reference(root):
    man = json.load(open(os.path.join(root, 'manifest.json')))
    for e in man['models'] + man.get('new_models', []):
        m = onnx.load(os.path.join(root, e['onnx']))
        z = np.load(os.path.join(root, e['fixture']))
        x = z['ids'] if 'ids' in z.files else z['x']
        x = x.reshape([len(x)] + e['input_shape'])
        inp = m.graph.input[0].name
        if e['dynamic_batch']:
            out = run(m, {inp: x})[0]
        else:
            out = np.concatenate([run(m, {inp: x[r:r + 1]})[0] for r in range(len(x))])
        r = float(np.abs(out - z['out']).max() / np.abs(z['out']).max())
        print(f"{e['onnx']}: numpy float64 evaluation against torch float64 outputs, max relative difference {r:.3g}")


if len(sys.argv) > 2 and sys.argv[1] == '--reference':
    check_reference(sys.argv[2])
else:
    check_ort(sys.argv[1] if len(sys.argv) > 1 else os.path.join('testdata', 'ort'))
