// Runs every case of testdata/ort/manifest.json through ONNX Runtime (npm
// onnxruntime-node, CPU execution provider) and writes its outputs as
// test_data_set_0/output_N.pb (TensorProto, raw_data), plus run.json: the
// versions used and, per case, the output shapes and how far ONNX Runtime's
// own graph optimisations move the results.
//
//   NODE_PATH=/path/to/node_modules node testdata/ort/run.js [testdata/ort]
//
// The outputs come from sessions with graph optimisations disabled (each
// operator runs as its own kernel) and one intra-op thread (so reductions
// run in one order); run.json records the largest deviation of a fully
// optimised session from them, in units of the fixtures' tolerance
// 1e-5 + 1e-4·|want|.
'use strict';

const fs = require('fs');
const path = require('path');
const ort = require('onnxruntime-node');

const WANT_VERSION = '1.30.0';

// ONNX TensorProto.DataType <-> onnxruntime-node tensor type.
const ONNX_TO_ORT = {1: 'float32', 2: 'uint8', 3: 'int8', 4: 'uint16', 5: 'int16', 6: 'int32', 7: 'int64',
  9: 'bool', 10: 'float16', 11: 'float64', 12: 'uint32', 13: 'uint64'};
const ORT_TO_ONNX = Object.fromEntries(Object.entries(ONNX_TO_ORT).map(([k, v]) => [v, Number(k)]));
const ELEM_SIZE = {float32: 4, uint8: 1, int8: 1, uint16: 2, int16: 2, int32: 4, int64: 8, bool: 1, float16: 2,
  float64: 8, uint32: 4, uint64: 8};
const TYPED = {float32: Float32Array, uint8: Uint8Array, int8: Int8Array, uint16: Uint16Array, int16: Int16Array,
  int32: Int32Array, int64: BigInt64Array, bool: Uint8Array, float16: Uint16Array, float64: Float64Array,
  uint32: Uint32Array, uint64: BigUint64Array};
const BFLOAT16 = 16;

function readVarint(buf, pos) {
  let v = 0n;
  let shift = 0n;
  for (;;) {
    if (pos >= buf.length) throw new Error('truncated varint');
    const b = buf[pos++];
    v |= BigInt(b & 0x7f) << shift;
    if ((b & 0x80) === 0) return [v, pos];
    shift += 7n;
  }
}

// parseTensor reads the fields of a TensorProto that onnxlite.EncodeTensor
// writes: dims, data_type, name and raw_data.
function parseTensor(buf) {
  const t = {dims: [], dataType: 0, name: '', raw: Buffer.alloc(0)};
  let pos = 0;
  while (pos < buf.length) {
    let key;
    [key, pos] = readVarint(buf, pos);
    const field = Number(key >> 3n);
    const wire = Number(key & 7n);
    if (wire === 0) {
      let v;
      [v, pos] = readVarint(buf, pos);
      if (field === 1) t.dims.push(Number(v));
      else if (field === 2) t.dataType = Number(v);
      else throw new Error(`unexpected varint field ${field}`);
    } else if (wire === 2) {
      let n;
      [n, pos] = readVarint(buf, pos);
      const body = buf.subarray(pos, pos + Number(n));
      pos += Number(n);
      if (field === 8) t.name = body.toString('utf8');
      else if (field === 9) t.raw = Buffer.from(body);
      else if (field === 1) {
        for (let p = 0; p < body.length;) {
          let v;
          [v, p] = readVarint(body, p);
          t.dims.push(Number(v));
        }
      } else throw new Error(`unexpected length-delimited field ${field}`);
    } else throw new Error(`unexpected wire type ${wire}`);
  }
  return t;
}

function varint(v) {
  const out = [];
  let x = BigInt(v);
  do {
    let b = Number(x & 0x7fn);
    x >>= 7n;
    if (x !== 0n) b |= 0x80;
    out.push(b);
  } while (x !== 0n);
  return Buffer.from(out);
}

// encodeTensor writes a TensorProto in the field order onnxlite.EncodeTensor
// uses: each dim, data_type, name, raw_data.
function encodeTensor(name, dataType, dims, raw) {
  const parts = [];
  for (const d of dims) parts.push(varint(1 << 3), varint(d));
  parts.push(varint(2 << 3), varint(dataType));
  const nb = Buffer.from(name, 'utf8');
  parts.push(varint((8 << 3) | 2), varint(nb.length), nb);
  parts.push(varint((9 << 3) | 2), varint(raw.length), raw);
  return Buffer.concat(parts);
}

function toOrtTensor(t) {
  // bfloat16 inputs go to the twin model as uint16 with the same bits.
  const type = t.dataType === BFLOAT16 ? 'uint16' : ONNX_TO_ORT[t.dataType];
  if (!type) throw new Error(`input ${t.name}: data type ${t.dataType} not handled`);
  const Typed = TYPED[type];
  const n = t.raw.length / ELEM_SIZE[type];
  const data = new Typed(n);
  Buffer.from(data.buffer).set(t.raw);
  return new ort.Tensor(type, data, t.dims);
}

function rawBytes(tensor) {
  const d = tensor.data;
  return Buffer.from(d.buffer, d.byteOffset, d.byteLength);
}

function asNumbers(tensor) {
  if (tensor.type === 'float16') {
    return Array.from(tensor.data, halfToFloat);
  }
  return Array.from(tensor.data, Number);
}

function halfToFloat(h) {
  const s = h & 0x8000 ? -1 : 1;
  const e = (h >> 10) & 0x1f;
  const m = h & 0x3ff;
  if (e === 0) return s * m * 2 ** -24;
  if (e === 31) return m ? NaN : s * Infinity;
  return s * (1 + m / 1024) * 2 ** (e - 15);
}

// deviation is max |a - b| / (1e-5 + 1e-4·|b|) over the elements.
function deviation(a, b) {
  let worst = 0;
  const x = asNumbers(a);
  const y = asNumbers(b);
  for (let i = 0; i < y.length; i++) {
    if (Number.isNaN(x[i]) && Number.isNaN(y[i])) continue;
    if (x[i] === y[i]) continue;
    worst = Math.max(worst, Math.abs(x[i] - y[i]) / (1e-5 + 1e-4 * Math.abs(y[i])));
  }
  return worst;
}

async function session(file, level) {
  return ort.InferenceSession.create(fs.readFileSync(file), {
    executionProviders: ['cpu'],
    graphOptimizationLevel: level,
    intraOpNumThreads: 1,
    interOpNumThreads: 1,
    logSeverityLevel: 3,
  });
}

async function main() {
  const root = process.argv[2] || path.join('testdata', 'ort');
  if (ort.env.versions.node !== WANT_VERSION) {
    throw new Error(`onnxruntime-node ${ort.env.versions.node}; the fixtures are made with ${WANT_VERSION}`);
  }
  const manifest = JSON.parse(fs.readFileSync(path.join(root, 'manifest.json'), 'utf8'));
  const record = {
    'onnxruntime-node': ort.env.versions.node,
    node: process.versions.node,
    execution_provider: 'cpu',
    graph_optimization_level: 'disabled',
    intra_op_threads: 1,
    optimized_deviation_note: 'largest |all - disabled| / (1e-5 + 1e-4·|disabled|) over the outputs of a session with graphOptimizationLevel "all"',
    cases: {},
  };
  let failed = 0;
  for (const c of manifest.cases) {
    const dir = path.join(root, c.dir);
    const model = path.join(dir, c.ort_model || 'model.onnx');
    try {
      const feeds = {};
      c.inputs.forEach((inp, i) => {
        const t = parseTensor(fs.readFileSync(path.join(dir, 'test_data_set_0', `input_${i}.pb`)));
        if (t.name !== inp.name) throw new Error(`input_${i}.pb holds ${t.name}, the manifest says ${inp.name}`);
        feeds[inp.name] = toOrtTensor(t);
      });
      const names = c.outputs.map((o) => o.name);
      const plain = await (await session(model, 'disabled')).run(feeds, names);
      const opt = await (await session(model, 'all')).run(feeds, names);
      const shapes = [];
      let dev = 0;
      c.outputs.forEach((o, i) => {
        const t = plain[o.name];
        if (t.type !== o.dtype) throw new Error(`output ${o.name} is ${t.type}, the manifest says ${o.dtype}`);
        const buf = encodeTensor(o.name, ORT_TO_ONNX[t.type], t.dims, rawBytes(t));
        fs.writeFileSync(path.join(dir, 'test_data_set_0', `output_${i}.pb`), buf);
        shapes.push(t.dims);
        dev = Math.max(dev, deviation(opt[o.name], t));
      });
      record.cases[c.name] = {output_shapes: shapes, optimized_deviation: Number(dev.toPrecision(3))};
    } catch (e) {
      failed++;
      console.error(`${c.name}: ${e.message}`);
    }
  }
  fs.writeFileSync(path.join(root, 'run.json'), JSON.stringify(record, null, 1) + '\n');
  const n = manifest.cases.length;
  console.log(`onnxruntime-node ${ort.env.versions.node}, node ${process.versions.node}: ${n - failed} of ${n} cases run`);
  if (failed) process.exit(1);
}

main().catch((e) => {
  console.error(e);
  process.exit(1);
});
